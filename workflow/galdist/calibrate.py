"""The calibration stage: a calibration sample's corrected quantities, its fit, and the
fitted relation written as an ordinary calibration file.

The sample goes through the same ingest, extinction and K stages as a survey; this
module takes those stage columns and asks the method's own module for the corrected
quantities (Tully-Fisher: log W^i and the magnitude corrected for Galactic and
internal extinction and K, by ``tully_fisher.tully_fisher_distance``; SBF: the
dereddened colour and fluctuation magnitude, by ``sbf.sbf_distance``; FP: s = log
sigma_0 (aperture-corrected), i = log <I_e> (corrected for extinction, K and the
(1 + z)^4 dimming) and the size, by ``fp.plane_coordinates``), evaluated with a
neutral placeholder calibration of the run's band and system. Their errors and the
correlation of the two (the axis-ratio error moves both log W^i and the internal
extinction; E(B-V) moves both SBF quantities) follow from the same functions by
central differences; the FP's measurement covariance of (r, s, i) is fp's own.
``galdist.relation_fit`` fits them; ``calibration_yaml`` writes the result in the
calibration schema, which the method's stage then accepts by path.

FP sizes. A galaxy's physical size at its group's distance modulus mu_g (a reference
modulus, or fitted) is r = log10(theta_e D_A) in kpc with the angular-diameter distance
D_A = D_L / (1 + z_helio)^2, D_L = 10^(0.2 mu_g - 5) Mpc: the reciprocity
``fp.fp_distance`` inverts with the same observed redshift, so a fitted plane gives
the group's modulus back. ``fp.plane_coordinates`` evaluated at mu = 0 gives r0, and
r = r0 + 0.2 mu_g. The sizes are then in kpc at the reference moduli's distance scale,
independent of H0 (``conventions.zero_point_h0``: null).
"""

from __future__ import annotations

import dataclasses
import datetime
from collections.abc import Mapping

import numpy as np
import yaml

from . import flags as F
from . import relation_fit as rf
from .calibration import Calibration
from .conventions import run_extinction_convention

#: the methods and forms the calibration target fits
METHODS = ("tully_fisher", "sbf", "fp")
#: Method bits that keep a galaxy out of the fit (its inputs are unusable)
EXCLUDING = F.Method.MISSING_INPUT | F.Method.LOW_INCLINATION


# ------------------------------------------------------------------ the placeholder

def placeholder(config: Mapping) -> Calibration:
    """A neutral calibration (M = 0) in the run's band and system for the method of
    ``config['calibrate']``: evaluating the method with it returns the corrected
    quantities without any relation."""
    from .passbands import of_band

    cal = config["calibrate"]
    method = cal["method"]
    section, bands = config[method], config["bands"]
    band = bands[section["band"]]
    common = dict(name="placeholder", method=method, system=band["system"], pivot=0.0,
                  covariance=np.zeros((1, 1)), scatter=0.0, valid_range=(-50.0, 50.0),
                  reference={"authors": "", "year": 0, "journal": ""}, provenance="placeholder",
                  band=of_band(band) or section["band"])
    if method == "fp":
        return _fp_placeholder(config, common)
    if method == "tully_fisher":
        from .passbands import canonical
        from .tully_fisher import INTERNAL_EXTINCTION_GAMMA

        # the band under the name the method's default internal-extinction gamma is keyed by
        common["band"] = next((k for k in INTERNAL_EXTINCTION_GAMMA if canonical(k) == canonical(common["band"])),
                              common["band"])
        return Calibration(form="luminosity", predictor="log_w_i", coefficients=np.zeros(1),
                           width_definition=section["width_definition"], **common)
    blue, red = section["color_bands"]
    return Calibration(form="colour_polynomial", predictor=f"{blue}-{red}", coefficients=np.zeros(1),
                       color_bands=(of_band(bands[blue]) or blue, of_band(bands[red]) or red), **common)


def method_settings(config: Mapping, cal: Calibration):
    """The method's settings for the run, without Monte Carlo, never refusing a range."""
    from .methods import REGISTRY

    spec = REGISTRY[config["calibrate"]["method"]]
    settings = spec.check(config, cal)
    if spec.name == "fp":  # the plane chain only: no distance, no survey selection
        settings = dataclasses.replace(settings, estimator="plane", selection_log_sigma_min=None,
                                       selection_mag_limit=None, malmquist=False)
    return dataclasses.replace(settings, mc_draws=0, allow_extrapolation=True)


def form_of(settings: Mapping) -> str:
    """The ``calibrate.form``, null meaning the method's own: plane for FP, else forward."""
    return settings["form"] or ("plane" if settings["method"] == "fp" else "forward")


# ----------------------------------------------------------- corrected quantities

def corrected(method: str, inputs: Mapping[str, np.ndarray], cal: Calibration, settings) -> dict:
    """Predictor x, corrected magnitude y, the observed magnitude the sample's limit
    applies to, their errors, the x-y error covariance and the method's flags."""
    if method == "tully_fisher":
        return _tf_corrected(inputs, cal, settings)
    if method == "fp":
        return _fp_corrected(inputs, cal, settings)
    return _sbf_corrected(inputs, cal, settings)


def _zero_nan(a):
    a = np.asarray(a, dtype=float)
    return np.where(np.isfinite(a), a, 0.0)


def _tf_corrected(inputs, cal, settings):
    from .tully_fisher import tully_fisher_distance

    def run(**change):
        out = tully_fisher_distance({**inputs, **change}, cal, settings)
        return out["tf_logw_i"], out["tf_mag_corr"], out["tf_flags"]

    x, y, fl = run()
    w, q = np.asarray(inputs["w50"], float), np.asarray(inputs["axis_ratio"], float)
    dw, dq = 1e-4 * np.abs(w) + 1e-6, np.full(w.shape, 1e-5)
    xp, yp, _ = run(w50=w + dw)
    xm, ym, _ = run(w50=w - dw)
    dxdw, dydw = (xp - xm) / (2 * dw), (yp - ym) / (2 * dw)
    # one-sided at the ends of (0, 1]: b/a = 1 has no larger neighbour
    qp, qm = np.minimum(q + dq, 1.0), np.maximum(q - dq, 1e-6)
    xp, yp, _ = run(axis_ratio=qp)
    xm, ym, _ = run(axis_ratio=qm)
    dxdq, dydq = (xp - xm) / (qp - qm), (yp - ym) / (qp - qm)
    sw = _zero_nan(inputs.get("w50_err", 0.0))
    sq = _zero_nan(inputs.get("axis_ratio_err", 0.0))
    terms_y = [inputs.get(k, 0.0) for k in ("mag_err", "a_gal_err", "k_corr_err")]
    var_y = sum(_zero_nan(t) ** 2 for t in terms_y) + (dydw * sw) ** 2 + (dydq * sq) ** 2
    var_x = (dxdw * sw) ** 2 + (dxdq * sq) ** 2
    cov = dxdw * dydw * sw ** 2 + dxdq * dydq * sq ** 2
    hi = np.asarray(inputs["hi_flux"], float) if "hi_flux" in inputs else np.full(x.shape, np.nan)
    return {"x": x, "y": y, "observed": np.asarray(inputs["mag"], float), "x_err": np.sqrt(var_x),
            "y_err": np.sqrt(var_y), "xy_cov": cov, "flags": fl, "hi_flux": hi}


def _sbf_corrected(inputs, cal, settings):
    from .sbf import sbf_distance

    out = sbf_distance(inputs, cal, settings)
    g = {k: _zero_nan(inputs.get(k, 0.0)) for k in ("sbf_mag_err", "sbf_color_err", "A_mag_err", "A_blue_err",
                                                  "A_red_err", "K_mag_err", "K_blue_err", "K_red_err")}
    k_on = settings.apply_kcorrection
    # m0 = m - A_m - K_m, c0 = c - (A_b - A_r) - (K_b - K_r); the three A errors are one
    # source (E(B-V)), as in galdist.sbf
    e_m, e_c = g["A_mag_err"], g["A_blue_err"] - g["A_red_err"]
    var_y = g["sbf_mag_err"] ** 2 + e_m ** 2 + (g["K_mag_err"] ** 2 if k_on else 0.0)
    var_x = g["sbf_color_err"] ** 2 + e_c ** 2 + ((g["K_blue_err"] ** 2 + g["K_red_err"] ** 2) if k_on else 0.0)
    n = out["sbf_mu"].size

    def rows(a):
        return np.broadcast_to(np.asarray(a, dtype=float), (n,)).copy()

    return {"x": out["sbf_color_0"], "y": out["sbf_mag_0"], "observed": rows(inputs["sbf_mag"]),
            "x_err": rows(np.sqrt(var_x)), "y_err": rows(np.sqrt(var_y)), "xy_cov": rows(e_m * e_c),
            "flags": out["sbf_flags"]}


# -------------------------------------------------------------------- groups

def group_references(group_ids: np.ndarray, mu_ref: np.ndarray, mu_ref_err: np.ndarray):
    """Integer group codes and one reference modulus per group.

    A group's reference is the inverse-variance mean of its members' distinct
    (mu_ref, mu_ref_err) pairs (a value repeated on every member counts once; an error of
    0, or none, fixes the modulus); NaN where no member has one. Returns (names, codes,
    ref, err).
    """
    names, codes = np.unique(np.asarray(group_ids, dtype=str), return_inverse=True)
    ref, err = np.full(names.size, np.nan), np.full(names.size, np.nan)
    for g in range(names.size):
        m = (codes == g) & np.isfinite(mu_ref)
        if not m.any():
            continue
        e = np.where(np.isfinite(mu_ref_err[m]), mu_ref_err[m], 0.0)
        pairs = np.unique(np.stack([mu_ref[m], e], axis=1), axis=0)
        exact = pairs[pairs[:, 1] == 0.0]
        if exact.size:
            ref[g], err[g] = float(exact[:, 0].mean()), 0.0
        else:
            w = 1.0 / pairs[:, 1] ** 2
            ref[g], err[g] = float(np.sum(w * pairs[:, 0]) / w.sum()), float(1.0 / np.sqrt(w.sum()))
    return names, codes, ref, err


def _small_free_groups(gid, used, mu_ref, minimum: int) -> np.ndarray:
    """Per row: its group has no reference modulus and fewer than ``minimum`` used members."""
    key = np.asarray(gid, dtype=object).astype(str)
    names, codes = np.unique(key, return_inverse=True)
    members = np.bincount(codes, weights=used.astype(float), minlength=names.size)
    has_ref = np.bincount(codes, weights=(used & np.isfinite(mu_ref)).astype(float), minlength=names.size) > 0
    return ((members < minimum) & ~has_ref)[codes]


def _groups_of_used(reason, gid, mu_ref, mu_ref_err, settings: Mapping):
    """Leave out small free groups (their reason set in place); (used, group_references
    of the used rows)."""
    # a free group's modulus rests on its members alone: a few members near the limit let
    # the truncated likelihood push it away without bound (their density piles up at the
    # limit as mu grows), so small groups without a reference modulus are left out
    used = reason == ""
    small = _small_free_groups(gid, used, np.asarray(mu_ref, float), settings["min_group_members"])
    minimum = settings["min_group_members"]
    reason[used & small] = f"group without reference modulus has fewer than {minimum} usable members"
    used = reason == ""
    return used, group_references(np.where(used, gid, "").astype(str)[used], np.asarray(mu_ref, float)[used],
                                  np.asarray(mu_ref_err, float)[used])


def _no_group(gid) -> np.ndarray:
    return np.array([g is None or str(g).strip() == "" for g in gid], dtype=bool)


def build_sample(q: Mapping, group_ids, mu_ref, mu_ref_err, settings: Mapping):
    """The fit's ``relation_fit.Sample`` from ``corrected``'s columns and the group
    columns, and a per-row reason a galaxy is left out ('' = used).

    ``settings`` is the ``calibrate`` config section: ``selection.mag_limit`` (the
    sample's limit on the observed magnitude, moved to each galaxy's corrected
    magnitude by its own corrections), ``selection.predictor_min`` and
    ``min_group_members`` (free groups smaller than this are left out).
    """
    n = q["x"].size
    gid = np.asarray(group_ids, dtype=object)
    no_group = _no_group(gid)
    reason = np.full(n, "", dtype=object)
    bad_flags = F.has(q["flags"], EXCLUDING)
    unusable = ~(np.isfinite(q["x"]) & np.isfinite(q["y"]) & np.isfinite(q["x_err"]) & np.isfinite(q["y_err"]))
    reason[unusable | bad_flags] = "input missing, flagged invalid or too face-on (see the method's flags)"
    reason[(reason == "") & no_group] = "no group_id"
    sel = settings["selection"]
    y_limit = x_limit = None
    offset = q["observed"] - q["y"]
    if sel["mag_limit"] is not None:
        y_limit_all = sel["mag_limit"] - offset
        reason[(reason == "") & ~(q["observed"] <= sel["mag_limit"])] = "fainter than selection.mag_limit"
    if sel["predictor_min"] is not None:
        reason[(reason == "") & ~(q["x"] >= sel["predictor_min"])] = "predictor below selection.predictor_min"
    hi_limit = sel.get("hi_flux_limit")
    if hi_limit is not None:
        hi = q.get("hi_flux", np.full(n, np.nan))
        reason[(reason == "") & ~(hi > 0)] = "no HI flux (selection.hi_flux_limit is set)"
        reason[(reason == "") & ~(hi >= hi_limit)] = "below selection.hi_flux_limit"
    used, (names, codes, ref, err) = _groups_of_used(reason, gid, mu_ref, mu_ref_err, settings)
    if sel["mag_limit"] is not None:
        y_limit = y_limit_all[used]
    if sel["predictor_min"] is not None:
        x_limit = np.full(int(used.sum()), float(sel["predictor_min"]))
    hi_cols = {}
    if hi_limit is not None:
        k = int(used.sum())
        with np.errstate(divide="ignore", invalid="ignore"):
            hi_cols = {"s": -2.5 * np.log10(q["hi_flux"][used]), "s_err": np.zeros(k),
                       "s_limit": np.full(k, -2.5 * np.log10(hi_limit))}
    sample = rf.Sample(q["x"][used], q["y"][used], q["x_err"][used], q["y_err"][used], q["xy_cov"][used],
                       codes, ref, err, y_limit=y_limit, x_limit=x_limit, group_names=tuple(names), **hi_cols)
    return sample, reason


def model_for(settings: Mapping, method: str, sample, start_slopes=None):
    """The ``relation_fit.Model`` of the ``calibrate`` section; a null pivot is 2.5 for
    log W^i (as the shipped Tully-Fisher files) and the sample's median colour rounded to
    0.05 for SBF; a null magnitude pivot the median absolute magnitude rounded to 0.1.
    FP: a ``relation_fit.PlaneModel`` pivoted at the sample's median s (or ``pivot``) and
    median i, rounded to 0.01, its search started at ``start_slopes`` (a, b) if given."""
    if method == "fp":
        sel = settings["selection"]
        pivot = settings["pivot"]
        pivot = round(float(np.median(sample.s)), 2) if pivot is None else float(pivot)
        extra = {} if start_slopes is None else {"start_slopes": tuple(float(v) for v in start_slopes)}
        return rf.PlaneModel(pivot, round(float(np.median(sample.i)), 2),
                             selection=sel["mag_limit"] is not None or sel["predictor_min"] is not None, **extra)
    pivot = settings["pivot"]
    if pivot is None:
        pivot = 2.5 if method == "tully_fisher" else round(float(np.median(sample.x)) * 20) / 20
    mp = settings["magnitude_pivot"]
    if mp is None and form_of(settings) == "inverse":
        first = rf.fit(sample, rf.Model("forward", pivot=pivot, selection=False), covariance=False)
        mp = round(float(np.median(sample.y - first.group_mu[sample.group])) * 10) / 10
    sel = settings["selection"]
    hi = sel.get("hi_flux_limit") is not None
    return rf.Model(form_of(settings), degree=settings["degree"], pivot=float(pivot),
                    magnitude_pivot=float(mp or 0.0), curvature_break=settings["curvature_break"],
                    selection=sel["mag_limit"] is not None or sel["predictor_min"] is not None or hi,
                    hi_flux=hi)


# --------------------------------------------------------------------- the fit

def fit_sample(sample, model, n_bootstrap: int, seed: int) -> dict:
    """Selection-aware and naive fits, the bootstrap over groups; plain numbers."""
    if isinstance(sample, rf.PlaneSample):
        best = rf.fit_plane(sample, model)
        plain = rf.fit_plane(sample, rf.naive(model)) if model.selection else best
        boot = (rf.bootstrap_plane(sample, model, n_bootstrap, seed, best=best) if n_bootstrap
                else np.empty((0, 0)))
        return {"fit": best, "naive": plain, "bootstrap": boot}
    best = rf.fit(sample, model)
    plain = rf.fit(sample, rf.naive(model)) if model.selection else best
    boot = rf.bootstrap(sample, model, n_bootstrap, seed, best=best) if n_bootstrap else np.empty((0, 0))
    return {"fit": best, "naive": plain, "bootstrap": boot}


def _fit_numbers(f) -> dict:
    out = {"coefficients": f.coefficients.tolist(), "errors": f.coefficient_errors.tolist(),
           "covariance": f.covariance.tolist(), "scatter": f.scatter, "scatter_err": f.scatter_err,
           "neg_log_likelihood": f.neg_log_like, "selection_in_likelihood": f.model.selection}
    if isinstance(f, rf.PlaneFit):
        out |= {"centre_log_sigma_log_ie": f.centre.tolist(), "centre_err": f.centre_err.tolist(),
                "sigmas": f.sigmas.tolist(), "sigmas_err": f.sigmas_err.tolist()}
    return out


def residuals(sample, fit) -> np.ndarray:
    """Per fitted galaxy: magnitude residual (mag), or for FP r - r_plane (dex)."""
    return rf.plane_residuals(sample, fit) if isinstance(sample, rf.PlaneSample) else rf.residuals(sample, fit)


def _group_rows(sample, best, res, residual_key: str) -> list[dict]:
    """Per group of the fit: members, fitted modulus, reference, mean residual."""
    groups = []
    for g, gname in enumerate(sample.group_names):
        m = sample.group == g
        groups.append({"group": str(gname), "n": int(m.sum()), "mu": float(best.group_mu[g]),
                       "mu_err": float(best.group_mu_err[g]), "fixed": bool(not best.group_free[g]),
                       "ref_mu": None if not np.isfinite(sample.ref_mu[g]) else float(sample.ref_mu[g]),
                       "ref_err": None if not np.isfinite(sample.ref_err[g]) else float(sample.ref_err[g]),
                       residual_key: float(res[m].mean()) if m.any() else None})
    return groups


def summary(sample, result: dict, reason: np.ndarray, name: str) -> dict:
    """The fit report's numbers (summary JSON)."""
    best, boot = result["fit"], result["bootstrap"]
    res = residuals(sample, best)
    if isinstance(sample, rf.PlaneSample):
        return _plane_summary(sample, result, reason, name, res)
    groups = _group_rows(sample, best, res, "mean_residual")
    out = {"calibration": name, "form": best.model.form, "degree": best.model.degree,
           "pivot": best.model.pivot, "curvature_break": best.model.curvature_break,
           "magnitude_pivot": best.model.magnitude_pivot if best.model.form == "inverse" else None,
           "rows": int(reason.size), "galaxies_fitted": int(sample.x.size), "groups": int(sample.n_groups),
           "groups_with_reference": int(np.isfinite(sample.ref_mu).sum()),
           "rows_left_out": {str(r): int((reason == r).sum()) for r in sorted(set(reason) - {""})},
           "predictor_range": [float(sample.x.min()), float(sample.x.max())],
           "selection_aware": _fit_numbers(best), "naive": _fit_numbers(result["naive"]),
           "group_moduli": groups, "residual_rms": float(np.sqrt(np.mean(res ** 2))),
           "hi_relation": best.hi_relation}
    if boot.size:
        cov = np.cov(boot[:, :-1], rowvar=False).reshape(best.coefficients.size, -1)
        out["bootstrap"] = {"draws": int(boot.shape[0]), "covariance": cov.tolist(),
                            "errors": np.sqrt(np.diag(cov)).tolist(),
                            "scatter_err": float(np.std(boot[:, -1], ddof=1))}
    return out


# ------------------------------------------------------------ the calibration file

def calibration_data(config: Mapping, sample, best, name: str, catalogs: list[dict]) -> dict:
    """The fitted relation as calibration-file data (``workflow/schemas/calibration.schema.yaml``)."""
    if isinstance(best, rf.PlaneFit):
        return _plane_calibration_data(config, sample, best, name, catalogs)
    cfg = config["calibrate"]
    method = cfg["method"]
    ph = placeholder(config)
    model = best.model
    nd = model.degree + 1
    coeffs = best.coefficients[:nd]
    cov = best.covariance[:nd, :nd]
    data = {"name": name, "method": method,
            "form": {"inverse": "inverse"}.get(model.form, "luminosity" if method == "tully_fisher"
                                               else "colour_polynomial"),
            "band": ph.band, "system": ph.system, "predictor": ph.predictor}
    if method == "tully_fisher":
        data["width_definition"] = ph.width_definition
    else:
        data["color_bands"] = list(ph.color_bands)
    data["pivot"] = float(model.pivot)
    if model.form == "inverse":
        data["magnitude_pivot"] = float(model.magnitude_pivot)
    data["coefficients"] = [float(c) for c in coeffs]
    data["coefficient_errors"] = [float(e) for e in np.sqrt(np.clip(np.diag(cov), 0.0, None))]
    data["covariance"] = [[float(v) for v in row] for row in 0.5 * (cov + cov.T)]
    if model.curvature_break is not None:
        data["quadratic"] = {"break": float(model.curvature_break), "coefficient": float(best.coefficients[-1]),
                             "error": float(best.coefficient_errors[-1])}
    data["scatter"] = float(best.scatter)
    data["zero_point_error"] = 0.0
    data["valid_range"] = [float(sample.x.min()), float(sample.x.max())]
    data["reference"] = {"authors": "galdist", "year": datetime.date.today().year,
                         "journal": "fitted from the user's calibration sample (not published)",
                         "where": ", ".join(c["path"] for c in catalogs)}
    data["provenance"] = "fitted by galdist"
    data["conventions"] = {"extinction": run_extinction_convention(config), "zero_point_h0": None}
    data["fit"] = model.form
    data["fitted_from"] = {
        "catalogs": catalogs, "galaxies": int(sample.x.size), "groups": int(sample.n_groups),
        "groups_with_reference": int(np.isfinite(sample.ref_mu).sum()),
        "selection_in_likelihood": bool(model.selection),
        "config": {k: config[k] for k in ("calibrate", method, "bands", "extinction", "kcorr")}}
    data["notes"] = (
        f"Fitted by galdist's calibrate target ({model.form} maximum likelihood"
        + (", sample selection modelled as a truncation" if model.selection else "")
        + "). coefficient_errors and covariance are the ML (Hessian) ones and include the reference "
        "moduli's errors, so the zero-point error is inside coefficient_errors[0]; the bootstrap over "
        "groups is in the fit report. valid_range is the predictor range of the fitted galaxies. "
        + ("scatter is in magnitudes (s_x / |b1| of the inverse fit). " if model.form == "inverse" else "")
        + ("scatter is in magnitudes (s_perp sqrt(1 + a1^2) of the orthogonal fit). "
           if model.form == "bivariate" else ""))
    return data


def calibration_yaml(data: dict) -> str:
    head = ("# Calibration fitted by galdist from the user's calibration sample (galdist.calibrate).\n"
            "# Read with yaml.safe_load, validated by workflow/schemas/calibration.schema.yaml.\n")
    return head + yaml.safe_dump(data, sort_keys=False, allow_unicode=True, width=100)


# --------------------------------------------------------------------------- report

def report_figure(sample, result: dict, path, xlabel: str) -> None:
    """The fit report: relation with data (both fits), residuals against predictor and
    against group modulus (the signature of a selection bias), per-group offsets."""
    if isinstance(sample, rf.PlaneSample):
        return _plane_report_figure(sample, result, path)
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    best, plain = result["fit"], result["naive"]
    abs_mag = sample.y - best.group_mu[sample.group]
    res = rf.residuals(sample, best)
    fig, ax = plt.subplots(2, 2, figsize=(11, 8.5))
    grid = np.linspace(sample.x.min(), sample.x.max(), 200)
    ax[0, 0].errorbar(sample.x, abs_mag, xerr=sample.x_err, yerr=sample.y_err, fmt=".", ms=3, alpha=0.4,
                      color="0.4", lw=0.5)
    ax[0, 0].plot(grid, best.magnitude(grid), "C0-", label=f"{best.model.form}, selection-aware"
                  if best.model.selection else best.model.form)
    if plain is not best:
        ax[0, 0].plot(grid, plain.magnitude(grid), "C3--", label="naive (no selection)")
    ax[0, 0].invert_yaxis()
    ax[0, 0].set(xlabel=xlabel, ylabel="corrected magnitude - group modulus (mag)", title="relation")
    ax[0, 0].legend()
    _residual_panels(ax, sample, best, res, sample.x, xlabel, "predictor", "residual (mag)", "mag")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


# ----------------------------------------------------------------- the stage, on files

def sample_plan(config: Mapping):
    """The ingest plan of the calibration catalog: the run's columns, units and bands,
    the calibrating method's columns (``ingest.plan``; raises IngestError naming a
    missing column)."""
    from . import ingest
    from .config import extra_required_columns

    cfg = config["calibrate"]
    paths, fmt = sample_paths(config)
    as_run = {**config, "methods": [cfg["method"]]}
    extra = dict(extra_required_columns(as_run))
    if cfg["selection"]["hi_flux_limit"] is not None:
        extra["hi_flux"] = "calibrate.selection.hi_flux_limit is set"
    return ingest.plan(paths, fmt, config["columns"], config["units"], list(config["bands"]), [cfg["method"]],
                       extra)


def sample_paths(config: Mapping) -> tuple[list[str], str]:
    cfg = config["calibrate"]
    paths = cfg["catalog"]
    return ([paths] if isinstance(paths, str) else list(paths or [])), cfg["format"]


def group_column_names(config: Mapping) -> dict[str, str]:
    """Role (group_id, mu_ref, mu_ref_err) -> the catalog's column name."""
    cols = config["calibrate"]["columns"]
    return {role: cols[role] for role in ("group_id", "mu_ref", "mu_ref_err")}


def group_column_problems(config: Mapping) -> list[str]:
    """Messages for group columns the calibration catalog lacks (``mu_ref`` and
    ``mu_ref_err`` are optional, but one without the other is refused)."""
    names = group_column_names(config)
    problems = []
    for one, have in sample_file_columns(config):
        if names["group_id"] not in have:
            problems.append(f"config key 'calibrate.columns.group_id': calibration catalog {one} has no "
                            f"column '{names['group_id']}' (galaxies sharing a distance); add it or "
                            "name yours there")
        if (names["mu_ref"] in have) != (names["mu_ref_err"] in have):
            problems.append(f"calibration catalog {one}: give both '{names['mu_ref']}' and "
                            f"'{names['mu_ref_err']}' (reference modulus and its error) or neither "
                            "(config keys calibrate.columns.mu_ref / mu_ref_err)")
    return problems


def sample_file_columns(config: Mapping):
    """(file, the columns it has) for every file of the calibration sample."""
    from .catalog import describe, detect_format, source_files

    paths, fmt = sample_paths(config)
    for path in paths:
        f = detect_format(path, fmt)
        for one in source_files(path, f):
            yield one, describe(one, f)


def read_group_columns(plan, config: Mapping) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """group_id (text), mu_ref and mu_ref_err (NaN where absent) of every row, in the
    order ingest wrote the rows (file by file, as ``plan.files``)."""
    from .catalog import describe, iter_batches
    from .ingest import _to_float, _to_text

    names = group_column_names(config)
    gid, ref, err = [], [], []
    for source in plan.files:
        have = describe(source.path, plan.fmt)
        wanted = [names["group_id"]] + ([names["mu_ref"], names["mu_ref_err"]] if names["mu_ref"] in have else [])
        first = 0
        for batch in iter_batches(source.path, plan.fmt, wanted, 65536):
            g = _to_text(batch[names["group_id"]], numeric=have[names["group_id"]].kind != "text")
            n = len(g)
            gid.append(g)
            where = f"calibration catalog {source.path}: "
            if len(wanted) > 1:
                ref.append(_to_float(batch[names["mu_ref"]], names["mu_ref"], first, where))
                err.append(_to_float(batch[names["mu_ref_err"]], names["mu_ref_err"], first, where))
            else:
                ref.append(np.full(n, np.nan))
                err.append(np.full(n, np.nan))
            first += n
    return np.concatenate(gid), np.concatenate(ref), np.concatenate(err)


def run_stage(config: Mapping, files: Mapping[str, str], out: Mapping[str, str]) -> dict:
    """The calibrate target's one job: the sample's stage columns (``files``: ingest shard,
    extinction, kcorr), the method's corrected quantities, the fit, and its products
    (``out``: calibration YAML, summary JSON, per-galaxy Parquet, report PNG)."""
    from . import io
    from .methods import REGISTRY

    cfg = config["calibrate"]
    method = cfg["method"]
    spec = REGISTRY[method]
    section = config[method]
    ph = placeholder(config)
    settings = method_settings(config, ph)
    # stages the calibrate target does not run (the redshift stage, which FP's eta uses)
    wanted = {stage: c for stage, c in spec.stage_columns(section).items() if stage in files}
    others = {stage: files[stage] for stage in wanted if stage != "ingest"}
    cols, _ = io.read_shard(files["ingest"], wanted.get("ingest", []) + ["galaxy_id"], others,
                            {stage: wanted[stage] for stage in others})
    n = len(cols["galaxy_id"])
    labels = spec.band_labels(section)
    for inp in spec.inputs.values():
        cols.setdefault(inp.column.format(**labels), np.full(n, np.nan))
    inputs = spec.inputs_from(cols, section)
    inputs = {k: v for k, v in inputs.items() if spec.inputs[k].kind != "optional" or np.isfinite(v).any()}
    q = corrected(method, inputs, ph, settings)
    plan = sample_plan(config)
    gid, ref, err = read_group_columns(plan, config)
    if gid.size != n:
        raise ValueError(f"calibration catalog: {gid.size} rows of group columns, {n} ingested rows")
    plane = method == "fp"
    sample, reason = (build_plane_sample if plane else build_sample)(q, gid, ref, err, cfg)
    fitted = sample.s.size if plane else sample.x.size
    if fitted < (10 if plane else 3):
        raise ValueError(f"calibration sample: only {fitted} usable galaxies; the fit needs more")
    start = None
    if plane:
        from .calibration import load_calibration

        start = load_calibration(section["calibration"]).coefficients[:2]
    model = model_for(cfg, method, sample, start)
    result = fit_sample(sample, model, cfg["bootstrap"], cfg["seed"])
    name = fitted_name(config)
    catalogs = [{"path": str(p), "sha256": io.sha256_of(p)} for p in plan.paths]
    data = calibration_data(config, sample, result["fit"], name, catalogs)
    text = calibration_yaml(data)
    with io.atomic_path(out["calibration"]) as tmp:
        tmp.write_text(text, encoding="utf-8")
    report = summary(sample, result, reason, name) | {"catalogs": catalogs, "method": method}
    io.write_json(report, out["summary"])
    # every row of the calibration catalog, with what the fit made of it
    used = reason == ""
    res = np.full(used.size, np.nan)
    res[used] = residuals(sample, result["fit"])
    table = {"galaxy_id": cols["galaxy_id"], "group_id": gid}
    if plane:
        e = np.sqrt(np.clip(np.diagonal(q["cov"], axis1=1, axis2=2), 0.0, None))
        table |= {"log_re_at_mu0": q["r0"], "log_sigma_0": q["s"], "log_ie": q["i"], "log_re_err": e[:, 0],
                  "log_sigma_0_err": e[:, 1], "log_ie_err": e[:, 2], "observed_mag": q["observed"]}
        units = {"log_re_at_mu0": "dex(kpc)", "log_sigma_0": "dex(km / s)", "log_ie": "dex(Lsun / pc2)",
                 "log_re_err": "dex", "log_sigma_0_err": "dex", "log_ie_err": "dex", "observed_mag": "mag",
                 "residual": "dex"}
    else:
        table |= {"x": q["x"], "y": q["y"], "x_err": q["x_err"], "y_err": q["y_err"], "xy_cov": q["xy_cov"]}
        units = {"y": "mag", "y_err": "mag", "residual": "mag"}
    table |= {"used": used, "left_out_because": np.asarray(reason, dtype=object), "residual": res}
    io.write_parquet(io.table_from_columns(table, units), out["galaxies"])
    xlabel = r"$\log_{10} W^i$ (W in km/s)" if method == "tully_fisher" else f"({ph.predictor})$_0$ (mag)"
    with io.atomic_path(out["report"]) as tmp:
        report_figure(sample, result, tmp, xlabel)
    return report


# ------------------------------------------------------------- the Fundamental Plane

def _fp_placeholder(config: Mapping, common: dict) -> Calibration:
    """The FP placeholder: M_sun (defines i) and the aperture terms, with the band and
    system they hold in, from the run's FP calibration (config ``fp.calibration``)."""
    from .calibration import load_calibration
    from .fp import plane_terms

    run_cal = load_calibration(config["fp"]["calibration"])
    if run_cal.method != "fp":
        raise ValueError(f"config key 'fp.calibration': {run_cal.name} is a {run_cal.method} calibration; "
                         "the FP fit takes M_sun and the aperture terms from an FP one")
    terms = plane_terms(run_cal)
    plane = {"abs_mag_sun": terms.abs_mag_sun, "aperture_exponent": terms.aperture_exponent,
             "aperture_fraction": terms.aperture_fraction}
    common = {**common, "band": run_cal.band, "system": run_cal.system, "covariance": np.zeros((3, 3))}
    return Calibration(form="plane", predictor="log_sigma", coefficients=np.zeros(3),
                       text=yaml.safe_dump({"plane": plane}), **common)


def _fp_corrected(inputs, cal, settings):
    """r0 (log R_e in kpc at mu = 0, D_A = D_L / (1 + z_helio)^2), s, i, their measurement
    covariance (n, 3, 3), the observed total magnitude the sample's limit applies to
    (fp_mag, or <mu_e> - 2.5 log10(2 pi R_e^2)) and the flags, by ``fp.plane_coordinates``."""
    from .fp import mean_surface_brightness, plane_coordinates

    z = np.asarray(inputs["z_helio"], dtype=float)
    given = {k: v for k, v in inputs.items() if k not in ("z_cmb", "mu_z")}
    q = plane_coordinates({**given, "z_cmb": z, "mu_z": 0.0}, cal, settings)
    n = q["s"].size

    def rows(key):
        return np.broadcast_to(np.asarray(inputs.get(key, np.nan), dtype=float), (n,))

    theta = rows("fp_re_arcsec")
    with np.errstate(invalid="ignore", divide="ignore"):
        observed = np.where(np.isfinite(rows("fp_mu_e")), rows("fp_mu_e") - mean_surface_brightness(0.0, theta),
                            rows("fp_mag"))
    return {"r0": q["r_z"], "s": q["s"], "i": q["i"], "cov": q["cov"], "observed": observed, "flags": q["flags"]}


def build_plane_sample(q: Mapping, group_ids, mu_ref, mu_ref_err, settings: Mapping):
    """The plane fit's ``relation_fit.PlaneSample`` from ``_fp_corrected``'s columns and a
    per-row reason a galaxy is left out ('' = used).

    ``selection.mag_limit`` applies to the observed total magnitude in the FP band; at
    the group's modulus mu it is the cut 2 r + i >= u_limit0 + 0.4 mu with u_limit0 =
    (m - m_lim) / 2.5 + 2 r0 + i (m = const - 2.5 (2 r + i) + mu for fixed extinction,
    K and z; definitions of i and r). ``selection.predictor_min`` cuts s = log sigma_0.
    """
    n = q["s"].size
    gid = np.asarray(group_ids, dtype=object)
    reason = np.full(n, "", dtype=object)
    finite = (np.isfinite(q["r0"]) & np.isfinite(q["s"]) & np.isfinite(q["i"])
              & np.isfinite(q["cov"]).all(axis=(1, 2)))
    reason[~finite | F.has(q["flags"], EXCLUDING)] = "input missing or flagged invalid (see the method's flags)"
    reason[(reason == "") & _no_group(gid)] = "no group_id"
    sel = settings["selection"]
    if sel["mag_limit"] is not None:
        reason[(reason == "") & ~(q["observed"] <= sel["mag_limit"])] = "fainter than selection.mag_limit"
    if sel["predictor_min"] is not None:
        reason[(reason == "") & ~(q["s"] >= sel["predictor_min"])] = "log sigma_0 below selection.predictor_min"
    used, (names, codes, ref, err) = _groups_of_used(reason, gid, mu_ref, mu_ref_err, settings)
    u_limit0 = None
    if sel["mag_limit"] is not None:
        u_limit0 = ((q["observed"] - sel["mag_limit"]) / 2.5 + 2.0 * q["r0"] + q["i"])[used]
    s_min = None if sel["predictor_min"] is None else float(sel["predictor_min"])
    sample = rf.PlaneSample(q["r0"][used], q["s"][used], q["i"][used], q["cov"][used], codes, ref, err,
                            s_min, u_limit0, tuple(names))
    return sample, reason


def _plane_summary(sample: rf.PlaneSample, result: dict, reason, name: str, res) -> dict:
    best, boot = result["fit"], result["bootstrap"]
    groups = _group_rows(sample, best, res, "mean_residual_dex")
    out = {"calibration": name, "form": "plane", "pivot": best.model.pivot_s, "pivot_log_ie": best.model.pivot_i,
           "rows": int(reason.size), "galaxies_fitted": int(sample.s.size), "groups": int(sample.n_groups),
           "groups_with_reference": int(np.isfinite(sample.ref_mu).sum()),
           "rows_left_out": {str(r): int((reason == r).sum()) for r in sorted(set(reason) - {""})},
           "predictor_range": [float(sample.s.min()), float(sample.s.max())],
           "log_ie_range": [float(sample.i.min()), float(sample.i.max())],
           "selection_aware": _fit_numbers(best), "naive": _fit_numbers(result["naive"]),
           "group_moduli": groups, "residual_rms": float(np.sqrt(np.mean(res ** 2))),
           "normal_is_thinnest_axis": best.normal_is_thinnest}
    if boot.size:
        cov = np.cov(boot[:, :-1], rowvar=False)
        out["bootstrap"] = {"draws": int(boot.shape[0]), "covariance": cov.tolist(),
                            "errors": np.sqrt(np.diag(cov)).tolist(),
                            "scatter_err": float(np.std(boot[:, -1], ddof=1))}
    return out


def _plane_calibration_data(config: Mapping, sample: rf.PlaneSample, best: rf.PlaneFit, name: str,
                            catalogs: list[dict]) -> dict:
    """The fitted plane in the shipped FP files' format (``fp.PlaneTerms``)."""
    from .fp import plane_terms

    ph = placeholder(config)
    terms = plane_terms(ph)
    model = best.model
    cov = 0.5 * (best.covariance + best.covariance.T)
    sel = config["calibrate"]["selection"]
    data = {"name": name, "method": "fp", "form": "plane", "band": ph.band, "system": ph.system,
            "predictor": "log_sigma", "pivot": float(model.pivot_s),
            "coefficients": [float(c) for c in best.coefficients],
            "coefficient_errors": [float(e) for e in np.sqrt(np.clip(np.diag(cov), 0.0, None))],
            "covariance": [[float(v) for v in row] for row in cov],
            "scatter": float(best.scatter), "zero_point_error": 0.0,
            "valid_range": [float(sample.s.min()), float(sample.s.max())],
            "conventions": {"extinction": run_extinction_convention(config), "zero_point_h0": None},
            "fit": "gaussian_3d",
            "reference": {"authors": "galdist", "year": datetime.date.today().year,
                          "journal": "fitted from the user's calibration sample (not published)",
                          "where": ", ".join(c["path"] for c in catalogs)},
            "provenance": "fitted by galdist",
            "fitted_from": {"catalogs": catalogs, "galaxies": int(sample.s.size), "groups": int(sample.n_groups),
                            "groups_with_reference": int(np.isfinite(sample.ref_mu).sum()),
                            "selection_in_likelihood": bool(model.selection),
                            "config": {k: config[k] for k in ("calibrate", "fp", "bands", "extinction", "kcorr")}},
            "plane": {"abs_mag_sun": terms.abs_mag_sun, "pivot_log_ie": float(model.pivot_i),
                      "log_ie_range": [float(sample.i.min()), float(sample.i.max())],
                      "aperture_exponent": terms.aperture_exponent, "aperture_fraction": terms.aperture_fraction,
                      "gaussian": {"mean_log_sigma": float(best.centre[0]), "mean_log_ie": float(best.centre[1]),
                                   "sigmas": [float(v) for v in best.sigmas]}}}
    cuts = [f"log sigma_0 >= {sel['predictor_min']}" if sel["predictor_min"] is not None else "",
            f"total magnitude <= {sel['mag_limit']}" if sel["mag_limit"] is not None else ""]
    cuts = " and ".join(c for c in cuts if c)
    data["notes"] = (
        "Fitted by galdist's calibrate target: the 3-D Gaussian of (r, s, i) by maximum likelihood with each "
        "galaxy's measurement covariance (Magoulas et al. 2012, MNRAS 427, 245)"
        + (f", the sample's selection ({cuts}) modelled as a truncation" if model.selection else "")
        + ". r = log10 R_e in kpc at the group distances (D_A = D_L / (1 + z)^2 from the reference or fitted "
        "moduli), so the sizes do not assume an H0. coefficient_errors and covariance are the ML (Hessian) "
        "ones and include the reference moduli's errors; the bootstrap over groups is in the fit report. "
        "scatter = sigma_1 sqrt(1 + a^2 + b^2) (dex in r). valid_range and log_ie_range span the fitted "
        "galaxies; abs_mag_sun and the aperture terms are those of the run's FP calibration.")
    return data


def _residual_panels(ax, sample, best, res, x, xlabel: str, xname: str, ylabel: str, unit: str) -> None:
    """The report's residual panels, shared by relations and planes: against ``x``, against
    the group modulus (the signature of a selection bias), and per-group mean offsets."""
    ax[0, 1].plot(x, res, ".", ms=3, color="0.3")
    ax[0, 1].axhline(0, color="C0")
    ax[0, 1].set(xlabel=xlabel, ylabel=ylabel, title=f"residuals against {xname}")
    ax[1, 0].plot(best.group_mu[sample.group], res, ".", ms=3, color="0.3")
    ax[1, 0].axhline(0, color="C0")
    ax[1, 0].set(xlabel="group distance modulus (mag)", ylabel=ylabel, title="residuals against distance")
    offsets = np.array([res[sample.group == g].mean() for g in range(sample.n_groups)])
    counts = np.bincount(sample.group, minlength=sample.n_groups)
    ax[1, 1].errorbar(np.arange(sample.n_groups), offsets, yerr=best.scatter / np.sqrt(np.maximum(counts, 1)),
                      fmt="o", ms=4)
    ax[1, 1].axhline(0, color="C0")
    ax[1, 1].set_xticks(np.arange(sample.n_groups), [str(g) for g in sample.group_names], rotation=90, fontsize=6)
    ax[1, 1].set(ylabel=f"mean residual ({unit})", title="per-group offsets")


def _plane_report_figure(sample: rf.PlaneSample, result: dict, path) -> None:
    """The FP fit report: the plane edge-on (both fits), residuals against s and against
    the group modulus (the signature of a selection bias), per-group offsets."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    best, plain = result["fit"], result["naive"]
    r = sample.r0 + 0.2 * best.group_mu[sample.group]
    pred = best.log_radius(sample.s, sample.i)
    res = r - pred
    fig, ax = plt.subplots(2, 2, figsize=(11, 8.5))
    ax[0, 0].plot(pred, r, ".", ms=3, color="0.4")
    lim = [min(pred.min(), r.min()), max(pred.max(), r.max())]
    ax[0, 0].plot(lim, lim, "C0-", label="selection-aware" if best.model.selection else "fit")
    if plain is not best:
        ax[0, 0].plot(plain.log_radius(sample.s, sample.i), r, "x", ms=2, color="C3", alpha=0.4,
                      label="naive (no selection)")
    ax[0, 0].set(xlabel=r"$a (s - s_p) + b (i - i_p) + c$", ylabel=r"$\log_{10} R_e$ (kpc) at the group distance",
                 title="plane, edge-on")
    ax[0, 0].legend()
    _residual_panels(ax, sample, best, res, sample.s, r"$\log_{10} \sigma_0$ (km/s)", "s", "residual in r (dex)",
                     "dex")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


# ------------------------------------------------------------- workflow and checks

#: the calibration sample is one shard: calibration samples hold hundreds to thousands
SAMPLE_SHARD_ROWS = 10 ** 9


def fitted_name(config: Mapping) -> str:
    """The fitted calibration's name: ``calibrate.name`` or <prefix>_fitted_<run>."""
    from .methods import REGISTRY

    cfg = config["calibrate"]
    if cfg["name"]:
        return cfg["name"]
    raw = f"{REGISTRY[cfg['method']].prefix}_fitted_{config['run']}".lower()
    return "".join(ch if ch.isalnum() or ch == "_" else "_" for ch in raw)


def used_config(config: Mapping) -> dict:
    """The configuration the fit job reads (a change elsewhere does not re-run it)."""
    method = config["calibrate"]["method"]
    return {k: config[k] for k in ("calibrate", method, "bands", "columns", "units", "extinction", "kcorr", "run")}


def _plane_option_problems(cfg: Mapping, form: str) -> list[str]:
    """The calibrate options a Fundamental-Plane fit does not take."""
    out = []
    if form != "plane":
        out.append(f"config key 'calibrate.form': {form} is not a Fundamental-Plane fit; set plane or null "
                   "(the 3-D Gaussian of Magoulas et al. 2012)")
    if cfg["degree"] != 1:
        out.append("config key 'calibrate.degree': the Fundamental Plane is linear; remove the key (or set 1)")
    for key in ("curvature_break", "magnitude_pivot"):
        if cfg[key] is not None:
            out.append(f"config key 'calibrate.{key}': not used by the Fundamental Plane; remove it")
    if cfg["selection"]["hi_flux_limit"] is not None:
        out.append("config key 'calibrate.selection.hi_flux_limit': Tully-Fisher only; the Fundamental Plane's "
                   "sample is cut by selection.mag_limit (total magnitude) and selection.predictor_min "
                   "(log sigma_0)")
    return out


def _plane_column_problems(config: Mapping) -> list[str]:
    """The FP needs <mu_e> or the total magnitude in every calibration file."""
    names = config["columns"]
    mu_e, mag = names.get("fp_mu_e", "fp_mu_e"), names.get("fp_mag", "fp_mag")
    return [f"calibration catalog {one}: the Fundamental Plane needs column '{mu_e}' (mean surface brightness "
            f"within R_e) or '{mag}' (total magnitude); add one, or name yours in config key 'columns' "
            "(fp_mu_e / fp_mag)" for one, have in sample_file_columns(config) if mu_e not in have and mag not in have]


def check(config: Mapping, buildable=frozenset()) -> None:
    """Everything the calibrate target would refuse, before any job (ConfigError lines
    naming the key): form and method, the method's bands and settings, the extinction
    convention, the catalog's files, structure and group columns."""
    from pathlib import Path

    from .errors import ConfigError, IngestError

    cfg = config["calibrate"]
    method, form = cfg["method"], form_of(config["calibrate"])
    problems = []
    if method == "fp":
        problems += _plane_option_problems(cfg, form)
    elif form == "plane":
        problems.append(f"config key 'calibrate.form': plane is the Fundamental Plane's form; {method} takes "
                        "forward, inverse (Tully-Fisher) or bivariate")
    if form == "inverse" and method != "tully_fisher":
        problems.append("config key 'calibrate.form': the inverse form is Tully-Fisher only")
    if form == "inverse" and (cfg["degree"] != 1 or cfg["curvature_break"] is not None):
        problems.append("config key 'calibrate.form': the inverse form is a straight line (degree 1, "
                        "no curvature_break)")
    if method == "tully_fisher" and cfg["degree"] != 1:
        problems.append("config key 'calibrate.degree': Tully-Fisher is linear (use curvature_break for a "
                        "quadratic term above a break)")
    if method == "sbf" and cfg["curvature_break"] is not None:
        problems.append("config key 'calibrate.curvature_break': Tully-Fisher only; SBF takes calibrate.degree")
    if cfg["selection"]["hi_flux_limit"] is not None and method != "fp" and (method != "tully_fisher"
                                                                            or form != "forward"):
        problems.append("config key 'calibrate.selection.hi_flux_limit': modelled for the Tully-Fisher "
                        "forward form only (calibrate.method tully_fisher, calibrate.form forward)")
    if run_extinction_convention(config) is None:
        ext = config["extinction"]
        problems.append(f"config key 'extinction': the fitted calibration must state its extinction convention, "
                        f"and this run's ({ext['coefficients']}, law {ext['law']}, R_V {ext['r_v']}, ebv_scale "
                        f"{ext['ebv_scale']}) is neither sf11 (law F99, r_v 3.1, ebv_scale 0.86) nor sfd98 "
                        "(law O94, r_v 3.1, ebv_scale 1)")
    section, bands = config[method], config["bands"]
    from .methods import REGISTRY

    for key in REGISTRY[method].band_keys():
        for label in section[key] if isinstance(section[key], list) else [section[key]]:
            if label not in bands:
                problems.append(f"config key '{method}.{key}': '{label}' is not a configured band "
                                "(the calibrate target uses it)")
    if not problems:
        try:
            method_settings(config, placeholder(config))
        except (ValueError, ConfigError) as exc:
            problems.append(f"calibrate ({method}): {exc}")
    paths, _ = sample_paths(config)
    missing = [p for p in paths if not Path(p).exists() and p not in buildable]
    problems += [f"config key 'calibrate.catalog': file not found: {p}" for p in missing]
    if not problems and all(Path(p).exists() for p in paths):
        try:
            sample_plan(config)
        except IngestError as exc:
            problems.append(f"calibration catalog: {exc}")
        problems += group_column_problems(config)
        if method == "fp":
            problems += _plane_column_problems(config)
    if problems:
        raise ConfigError("calibration sample:\n  - " + "\n  - ".join(problems))
