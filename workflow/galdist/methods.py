"""The distance methods galdist knows: one ``MethodSpec`` each, in ``REGISTRY``.

Everything that lists methods reads this registry and nothing else: the config and
calibration schemas' enums, ingest's columns and their checks, the pre-flight checks,
the one per-shard rule of ``workflow/rules/methods.smk`` and its script, the product's
prefixes and flag columns, the cross-check, the plots, the SLURM profile (one rule for
all methods) and the contract tests (``tests/test_methods.py``).

Adding a method is four things: its module (``galdist/<name>.py``, with a distance
function ``f(inputs: dict, calibration, settings) -> dict`` that returns the method's
own columns followed by ``distance.finish``'s), its entry here, its section in
``workflow/schemas/config.schema.yaml`` (the keys ``COMMON_KEYS`` and its own, each with
a default), and its calibration files (``galdist/data/calibrations/<prefix>_*.yaml``,
with any keys of its own under ``$defs/method_keys/<name>`` of the calibration schema).

A spec holds declarations only; the method's module is imported when first used, so
reading the registry costs nothing.
"""

from __future__ import annotations

import dataclasses
import importlib
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np

from .columns import Column

#: Keys every method's config section has: the generic machinery reads them.
COMMON_KEYS = ("calibration", "mc_draws", "mc_seed", "mc_max_rows", "malmquist", "malmquist_kind",
               "allow_extrapolation", "accept_passband_mismatch")

#: Columns every method writes last (``galdist.distance.finish``), after its prefix, with units.
#: mu_err is the random error (measurement, intrinsic scatter), mu_err_sys the systematic
#: one (calibration coefficients and zero point, common to all galaxies).
COMMON_OUTPUTS = {"mu": "mag", "mu_err": "mag", "mu_err_sys": "mag", "mu_err_mc": "mag", "d_mpc": "Mpc",
                  "d_err_mpc": "Mpc", "malmquist_applied": "", "flags": ""}
#: What each of COMMON_OUTPUTS means ("{title}": the method's title), for the column dictionary
#: (``galdist.dictionary``): a column added to COMMON_OUTPUTS needs its line here.
COMMON_DESCRIPTIONS = {
    "mu": "{title} distance modulus, mu = 5 log10(d_L / 10 pc)",
    "mu_err": "random error of mu (first order): the inputs' errors, the extinction and K errors and the "
               "calibration's intrinsic scatter; galaxy by galaxy",
    "mu_err_sys": "systematic error of mu: the calibration's coefficients and zero point (common to every "
                  "galaxy; not in mu_err)",
    "mu_err_mc": "Monte Carlo of the random error of mu (NaN beyond mc_max_rows measured rows, or with "
                 "mc_draws 0)",
    "d_mpc": "{title} luminosity distance, 10^((mu - 25) / 5), times the Malmquist factor where "
             "malmquist_applied",
    "d_err_mpc": "error of d_mpc, first order from mu_err",
    "malmquist_applied": "true where d_mpc and d_err_mpc carry the Malmquist-bias factor (mu never does)",
    "flags": "{title} flags, a bit per reason",
}

#: The per-shard stages whose files a method may read, in DAG order.
STAGES = ("ingest", "extinction", "kcorr", "redshift")


@dataclass(frozen=True)
class Input:
    """One input of a distance function: the stage file and column it comes from (a
    template of the method's band roles, e.g. ``A_{band}``), its unit, the value of a
    typical galaxy (for the contract tests and as documentation), and its kind: a
    ``value`` without which there is no distance, an ``error``, an ``optional`` value
    whose absence skips a step (or serves only some calibration forms), or ``flags``."""

    stage: str
    column: str
    unit: str
    typical: float
    kind: str = "value"


def _err(stage: str, column: str, unit: str, typical: float) -> Input:
    return Input(stage, column, unit, typical, "error")


def _flags(stage: str, column: str) -> Input:
    return Input(stage, column, "", 0, "flags")


@dataclass(frozen=True)
class RelationPlot:
    """The calibration-relation plot of a method, in one of two views.

    ``absolute``: product column ``y`` minus mu_z (the absolute magnitude the redshift
    distance implies) against ``x``, with the calibration's curve, brighter up.
    ``identity``: ``y`` against ``x``, two estimates of one quantity (the Fundamental
    Plane edge-on: the size at the redshift distance against the plane's prediction),
    with the 1:1 line. Both draw the calibration's scatter (in ``scatter_unit``) as a
    band. ``x`` (without the prefix) is also the predictor of the dmu-against-predictor
    plot. Labels may name ``{colour}`` (the calibration's colour bands joined by '-')
    and ``{band}`` (the run's band of the method: label, filter curve, and the
    calibration's passband where it differs)."""

    x: str
    y: str
    xlabel: str
    title: str
    ylabel: str = "absolute magnitude in {band}, from $\\mu_z$ (mag)"
    view: str = "absolute"
    scatter_unit: str = "mag"


@dataclass(frozen=True)
class MethodSpec:
    """What the workflow, the checks, the product and the tests know about one method."""

    name: str  # the config section and the entry of config `methods`
    prefix: str  # of every column it writes
    title: str  # for people: logs, plots
    colour: str  # matplotlib colour of its points
    marker: str  # matplotlib marker of its points (filled: usable; hollow: flagged)
    module: str  # galdist.<module> holds the science
    function: str  # the distance function in the module
    settings: str  # its settings class (``galdist.settings.MethodSettings``-like: ``from_config``)
    forms: tuple[str, ...]  # calibration forms it accepts
    catalog_columns: tuple[Column, ...]  # canonical catalog columns, with bounds and ingest bit
    bands: Mapping[str, str]  # band role -> config key naming it ("color_bands.0": first of a list)
    inputs: Mapping[str, Input]  # distance-function input -> where it comes from
    outputs: Mapping[str, str]  # its own columns (without prefix) -> unit, before COMMON_OUTPUTS
    descriptions: Mapping[str, str]  # its own columns (without prefix) -> what they mean (column dictionary)
    derive: Callable[[dict, object], dict] = lambda config, calibration: {}  # from ``used_config``
    uses: tuple[str, ...] = ()  # config sections besides its own and ``bands`` its settings derive from
    setup_check: str | Callable | None = None  # (calibration, settings) -> raise ValueError; str: in the module
    relation_plot: RelationPlot | None = None
    # a function of the module (inputs, calibration, settings, eta grid) -> each row's eta likelihood
    # (rows, grid) or None, for an error model that is not Gaussian (galdist.likelihood), and when
    # its section asks for it; without one, the Monte Carlo draws decide
    posterior: str | None = None
    posterior_applies: Callable[[Mapping], bool] = lambda section: True

    # --- declarations ------------------------------------------------------------------
    @property
    def flags_column(self) -> str:
        return f"{self.prefix}_flags"

    def output_units(self) -> dict[str, str]:
        """Every column the method writes, in order, with its unit ("" dimensionless)."""
        own = {f"{self.prefix}_{k}": u for k, u in self.outputs.items()}
        return own | {f"{self.prefix}_{k}": u for k, u in COMMON_OUTPUTS.items()}

    def output_descriptions(self) -> dict[str, str]:
        """What every column the method writes means, in order (a column without a
        description is missing from the result; the dictionary's tests catch it)."""
        own = {f"{self.prefix}_{k}": t for k, t in self.descriptions.items()}
        return own | {f"{self.prefix}_{k}": t.format(title=self.title) for k, t in COMMON_DESCRIPTIONS.items()}

    def band_keys(self) -> list[str]:
        """The config keys of the section that name band labels."""
        return list(dict.fromkeys(key.split(".")[0] for key in self.bands.values()))

    def band_labels(self, section: Mapping) -> dict[str, str]:
        """Band role -> configured band label, from the method's config section."""
        out = {}
        for role, key in self.bands.items():
            name, _, index = key.partition(".")
            value = section[name]
            out[role] = value[int(index)] if index else value
        return out

    def stage_columns(self, section: Mapping) -> dict[str, list[str]]:
        """Stage -> the columns of its file the method reads."""
        labels = self.band_labels(section)
        out: dict[str, list[str]] = {}
        for inp in self.inputs.values():
            out.setdefault(inp.stage, []).append(inp.column.format(**labels))
        return {stage: list(dict.fromkeys(out[stage])) for stage in STAGES if stage in out}

    def catalog_band_columns(self, section: Mapping) -> dict[str, str]:
        """Band magnitude columns the method reads from the catalog -> the config key
        naming the band (these columns then become required)."""
        labels = self.band_labels(section)
        out = {}
        for inp in self.inputs.values():
            role = re.search(r"\{(\w+)\}", inp.column)
            if inp.stage == "ingest" and role:
                out[inp.column.format(**labels)] = f"{self.name}.{self.bands[role.group(1)].split('.')[0]}"
        return out

    # --- the science, imported on use ----------------------------------------------------
    def _attr(self, name: str):
        return getattr(importlib.import_module(f"galdist.{self.module}"), name)

    def distance_function(self):
        return self._attr(self.function)

    def settings_class(self):
        return self._attr(self.settings)

    def used_config(self, config: Mapping, calibration=None, cache_dir=None) -> dict:
        """The part of the configuration the method's jobs read: its section, the bands,
        the sections in ``uses`` (a change elsewhere does not re-run them), ``likelihoods``
        where its jobs compute eta likelihoods (``computes_likelihood``) and, given the
        calibration, what its conventions mean for this run (``conventions_for``; ``cache_dir``
        as there)."""
        out = {key: config[key] for key in (self.name, "bands", *self.uses)}
        if self.computes_likelihood(config):
            out["likelihoods"] = config.get("likelihoods", {})
        if calibration is not None:
            out["conventions"] = self.conventions_for(config, calibration, cache_dir)
        return out

    def writes_likelihood(self, config: Mapping) -> bool:
        """Whether the method's jobs write an eta-likelihood part file (``likelihoods.write``)."""
        return bool(config.get("likelihoods", {}).get("write", True))

    def computes_likelihood(self, config: Mapping) -> bool:
        """Whether the method's jobs compute eta likelihoods (its posterior, or its Monte
        Carlo draws where they are not Gaussian): only then do the grid and mu_z reach them."""
        section = config[self.name]
        return self.writes_likelihood(config) and (
            (self.posterior is not None and self.posterior_applies(section))
            or (section.get("mc_draws", 0) > 1 and section.get("mc_max_rows", 0) > 0))

    def job_stage_columns(self, config: Mapping) -> dict[str, list[str]]:
        """``stage_columns`` plus the redshift stage's mu_z where the job computes likelihoods."""
        out = self.stage_columns(config[self.name])
        if self.computes_likelihood(config) and "mu_z" not in out.get("redshift", []):
            out["redshift"] = [*out.get("redshift", []), "mu_z"]
        return out

    def extinction_bands(self, section: Mapping) -> dict[str, str]:
        """Extinction-stage input columns the method reads (A_<band>, A_<band>_err) -> band label."""
        labels = self.band_labels(section)
        out = {}
        for inp in self.inputs.values():
            role = re.search(r"\{(\w+)\}", inp.column)
            if inp.stage == "extinction" and role:
                out[inp.column.format(**labels)] = labels[role.group(1)]
        return out

    def conventions_for(self, config: Mapping, calibration, cache_dir=None) -> dict:
        """The run's H0 (the calibration's zero point is moved to it) and, per band whose
        A_<band> the method reads, the factor onto the calibration's extinction convention
        (``galdist.conventions``; ``cache_dir``: where to remember the factors)."""
        from . import conventions

        bands = sorted(set(self.extinction_bands(config[self.name]).values()))
        return {"h0": conventions.run_h0(config), "extinction": calibration.extinction_convention,
                "extinction_factors": conventions.extinction_factors(config, calibration.extinction_convention,
                                                                     bands, cache_dir=cache_dir)}

    def settings_for(self, config: Mapping, calibration):
        """The method's settings: its config section, validated by the schema, plus what
        follows from the rest of ``config`` (``derive``)."""
        from .settings import WORKFLOW_KEYS

        return self.settings_class().from_config(config[self.name], ignore=WORKFLOW_KEYS,
                                                 **self.derive(config, calibration))

    def check(self, config: Mapping, calibration):
        """Everything the method's jobs would refuse, raised now (ValueError): the
        calibration's method and form, the settings, the module's own set-up check.
        Returns the settings."""
        where = f"calibration {calibration.name} ({calibration.path or 'in memory'})"
        if calibration.method != self.name:
            raise ValueError(f"{where} is a {calibration.method} calibration, not {self.name}")
        if calibration.form not in self.forms:
            raise ValueError(f"{where}: form {calibration.form!r} is not one {self.name} accepts "
                             f"({', '.join(self.forms)})")
        settings = self.settings_for(config, calibration)
        if self.setup_check:
            hook = self._attr(self.setup_check) if isinstance(self.setup_check, str) else self.setup_check
            hook(calibration, settings)
        return settings

    def inputs_from(self, columns: Mapping, section: Mapping, extinction_factors: Mapping | None = None) -> dict:
        """The distance function's inputs from the stage columns read for one shard, the
        extinction columns rescaled onto the calibration's convention (``extinction_factors``:
        band -> factor, from ``conventions_for``)."""
        labels = self.band_labels(section)
        scaled = {column: float(extinction_factors[band])
                  for column, band in self.extinction_bands(section).items()} if extinction_factors else {}
        out = {}
        for name, inp in self.inputs.items():
            column = inp.column.format(**labels)
            out[name] = columns[column] if column not in scaled else np.asarray(columns[column], dtype=float) * scaled[column]
        return out

    def distances(self, inputs: Mapping, calibration, settings, config: Mapping, draws: list | None = None) -> dict:
        """The method's columns for one shard: every row analytically, the Monte Carlo
        on at most ``mc_max_rows`` measured rows, PASSBAND_OVERRIDE where config
        accepted a passband mismatch. With a list ``draws``: (rows, their Monte Carlo
        draws of mu) is appended (``uncertainty.monte_carlo_on_subsample``)."""
        from . import passbands, uncertainty

        fn = self.distance_function()
        no_mc = dataclasses.replace(settings, mc_draws=0)
        out = uncertainty.monte_carlo_on_subsample(
            lambda rows, mc: fn(rows, calibration, settings if mc else no_mc),
            inputs, f"{self.prefix}_mu", f"{self.prefix}_mu_err_mc", config[self.name]["mc_max_rows"], draws)
        passbands.flag_override(out[self.flags_column], self.name, calibration, config[self.name], config["bands"])
        return out

    def likelihood_parts(self, section: Mapping, inputs: Mapping, calibration, settings, out: Mapping, mu_z,
                         draws: list, grid: np.ndarray):
        """The rows of one shard whose eta likelihood is not the analytic Gaussian, a block
        at a time: (rows, curves, kind) for ``likelihood.write_part``. The method's
        posterior where it has one for these settings (every row with a distance), else
        the Monte Carlo draws' rows that fail ``likelihood.non_gaussian``."""
        from . import likelihood as lk

        mu = np.asarray(out[f"{self.prefix}_mu"], dtype=float)
        n = len(mu)
        if self.posterior and self.posterior_applies(section):
            fn = self._attr(self.posterior)
            for a in range(0, n, lk.BLOCK_ROWS):
                b = min(n, a + lk.BLOCK_ROWS)
                sub = {k: (v[a:b] if isinstance(v, np.ndarray) and v.ndim and v.shape[0] == n else v)
                       for k, v in inputs.items()}
                curves = fn(sub, calibration, settings, grid)
                if curves is None:
                    raise ValueError(f"{self.name}: its posterior does not apply to these settings")
                keep = np.isfinite(mu[a:b]) & np.isfinite(curves).all(axis=1)
                yield a + np.flatnonzero(keep), curves[keep], lk.POSTERIOR
            return
        for rows, mu_draws in draws:
            eta = (np.asarray(mu_z, dtype=float)[rows, None] - mu_draws) / 5.0
            sigma = np.asarray(out[f"{self.prefix}_mu_err"], dtype=float)[rows] / 5.0
            odd = lk.non_gaussian(eta, sigma) & np.isfinite(mu[rows]) & np.isfinite(np.asarray(mu_z)[rows])
            for a in range(0, int(odd.sum()), lk.BLOCK_ROWS):
                pick = np.flatnonzero(odd)[a:a + lk.BLOCK_ROWS]
                curves = lk.from_draws(eta[pick], grid)
                keep = np.isfinite(curves).all(axis=1)
                yield rows[pick][keep], curves[keep], lk.DRAWS


def shard_distances(method: str, files: Mapping[str, str], config: Mapping, calibration_path: str,
                    out_path: str, likelihood_path: str | None = None) -> int:
    """One method's columns for one shard, written beside the shard (``io.write_stage_columns``,
    stamped with the shard's fingerprint and the calibration's SHA-256). ``files``: stage ->
    its file for this shard; ``config``: at least the method's ``used_config``. With
    ``likelihood_path``, the shard's eta-likelihood part file (``galdist.likelihood``:
    the rows whose likelihood is not the analytic Gaussian, maybe none), same stamps.
    Returns the number of rows."""
    from . import calibration as gcal
    from . import io

    from .conventions import at_run_h0

    spec = REGISTRY[method]
    loaded = gcal.load_calibration(calibration_path)
    conv = config["conventions"] if "conventions" in config else spec.conventions_for(config, loaded)
    cal = at_run_h0(loaded, conv["h0"])
    section = config[method]
    settings = spec.settings_for(config, cal)
    computes = likelihood_path is not None and spec.computes_likelihood(config)
    wanted = spec.job_stage_columns(config) if computes else spec.stage_columns(section)
    others = {stage: files[stage] for stage in wanted if stage != "ingest"}
    cols, fingerprint = io.read_shard(files["ingest"], wanted.get("ingest", []), others,
                                      {stage: wanted[stage] for stage in others})
    inputs = spec.inputs_from(cols, section, conv["extinction_factors"])
    draws: list = []
    out = spec.distances(inputs, cal, settings, config, draws if computes else None)
    stamps = {"galdist.calibration.sha256": cal.sha256, "galdist.calibration.name": cal.name}
    io.write_stage_columns(out, out_path, fingerprint, spec.output_units(), stamps)
    if likelihood_path is not None:
        from . import likelihood as lk

        lkc = config.get("likelihoods", {})
        grid = lk.eta_grid(lkc.get("eta_min", -0.5), lkc.get("eta_max", 0.5), lkc.get("eta_step", 0.005))
        blocks = spec.likelihood_parts(section, inputs, cal, settings, out, cols["mu_z"], draws, grid) if computes else ()
        lk.write_part(likelihood_path, blocks, grid,
                      {io.FINGERPRINT_KEY: fingerprint.encode()} | {k.encode(): v.encode() for k, v in stamps.items()})
    return len(out[spec.flags_column])


def plot_names(method_prefixes) -> list[str]:
    """The plots of a run whose methods have these prefixes: the Hubble diagram, the
    relation plot of each method that has one, the dmu histograms, dmu against cz and
    against each method's predictor, the method-against-method plot (two methods or
    more) and the sky map (a panel per method or pair); none when no method ran (every
    plot would be empty)."""
    if not method_prefixes:
        return []
    relations = [f"{p}_relation" for p in method_prefixes if (s := by_prefix(p)) and s.relation_plot]
    pairs = ["method_comparison"] if len(method_prefixes) > 1 else []
    return ["hubble_diagram", *relations, "dmu_histograms", "dmu_cz", "dmu_predictor", *pairs, "vpec_sky"]


def by_prefix(prefix: str) -> MethodSpec | None:
    return next((s for s in REGISTRY.values() if s.prefix == prefix), None)


def prefixes(methods=None) -> list[str]:
    """Column prefixes of ``methods`` (names; default every registered method), in order."""
    return [REGISTRY[m].prefix for m in (REGISTRY if methods is None else methods)]


# ------------------------------------------------------------------------------ entries

def _tf_derive(config, calibration) -> dict:
    """The magnitudes' system and AB - Vega offset, from the band of ``tully_fisher.band``."""
    band = config["bands"][config["tully_fisher"]["band"]]
    return {"input_system": band["system"], "ab_minus_vega": band.get("ab_minus_vega")}


def _sbf_derive(config, calibration) -> dict:
    """System offsets of the fluctuation magnitude and of the colour onto the calibration's."""
    from .photometry import color_system_offset, system_offset

    section, bands = config["sbf"], config["bands"]
    band, (blue, red) = bands[section["band"]], (bands[b] for b in section["color_bands"])
    return {"mag_offset": system_offset(band["system"], calibration.system, band.get("ab_minus_vega")),
            "color_offset": color_system_offset(blue["system"], blue.get("ab_minus_vega"), red["system"],
                                                red.get("ab_minus_vega"), calibration.system)}


TULLY_FISHER = MethodSpec(
    name="tully_fisher", prefix="tf", title="Tully–Fisher", colour="tab:blue", marker="o",
    module="tully_fisher", function="tully_fisher_distance", settings="TFSettings", setup_check="check_setup",
    forms=("luminosity", "inverse", "baryonic"),
    # bounds of a usable value (common practice unless a source is named; the flag texts in
    # galdist.flags.Quality say the same)
    catalog_columns=(
        # 1 km/s: narrower than the thermal FWHM of cold (100 K) HI, 2.1 km/s (kinetic theory)
        Column("w50", "km / s", "observed HI width at 50% of peak", (1.0, 2000.0), "WIDTH_INVALID"),
        # an error wider than the widest line
        Column("w50_err", "km / s", "error of w50", (0.0, 2000.0), "WIDTH_ERR_INVALID"),
        # no observed disc is thinner than 0.01 (the flattest edge-on discs reach b/a ~ 0.05, from memory)
        Column("axis_ratio", "", "optical b/a", (0.01, 1.0), "AXIS_RATIO_INVALID"),
        Column("axis_ratio_err", "", "error of axis_ratio", (0.0, 1.0), "AXIS_RATIO_ERR_INVALID"),
    ),
    bands={"band": "band"},
    inputs={
        "mag": Input("ingest", "mag_{band}", "mag", 13.2), "mag_err": _err("ingest", "mag_{band}_err", "mag", 0.05),
        "w50": Input("ingest", "w50", "km / s", 300.0), "w50_err": _err("ingest", "w50_err", "km / s", 6.0),
        "axis_ratio": Input("ingest", "axis_ratio", "", 0.4),
        "axis_ratio_err": _err("ingest", "axis_ratio_err", "", 0.015),
        "z_helio": Input("ingest", "z_helio", "", 0.01),
        "hi_flux": Input("ingest", "hi_flux", "Jy km / s", 5.0, "optional"),  # the baryonic form's gas mass
        "w50_resolution": Input("ingest", "w50_resolution", "km / s", 10.0, "optional"),
        "quality_flags": _flags("ingest", "quality_flags"),
        "a_gal": Input("extinction", "A_{band}", "mag", 0.05),
        "a_gal_err": _err("extinction", "A_{band}_err", "mag", 0.01),
        "ext_flags": _flags("extinction", "ext_flags"),
        "k_corr": Input("kcorr", "K_{band}", "mag", 0.01),
        "k_corr_err": _err("kcorr", "K_{band}_err", "mag", 0.01),
        "kcorr_flags": _flags("kcorr", "kcorr_flags"),
    },
    outputs={"inclination_deg": "deg", "w_z": "km / s", "w_r": "km / s", "logw_i": "dex(km / s)",
             "a_int": "mag", "mag_corr": "mag", "abs_mag": "mag"},
    descriptions={
        "inclination_deg": "disc inclination from axis_ratio (oblate disc of intrinsic axis ratio tully_fisher.q0)",
        "w_z": "w50 corrected for instrumental resolution (where w50_resolution is given) and divided by "
               "(1 + z_helio): the rest-frame width",
        "w_r": "w_z corrected for turbulent broadening",
        "logw_i": "log10 of the inclination-corrected width, W^i = w_r / sin(inclination)",
        "a_int": "internal extinction of the disc in the calibration's band (subtracted; depends on "
                 "axis_ratio and logw_i)",
        "mag_corr": "magnitude corrected for Galactic and internal extinction and K, in the calibration's "
                    "photometric system",
        "abs_mag": "absolute magnitude (baryonic form: the same for the magnitude the predicted mass implies)",
    },
    derive=_tf_derive,
    relation_plot=RelationPlot("logw_i", "mag_corr", r"$\log_{10} W^i$ (W in km/s)", "Tully-Fisher relation"),
)

SBF = MethodSpec(
    name="sbf", prefix="sbf", title="SBF", colour="tab:red", marker="s",
    module="sbf", function="sbf_distance", settings="SBFSettings", setup_check="check_setup",
    forms=("colour_polynomial",),
    catalog_columns=(
        Column("sbf_mag", "mag", "fluctuation magnitude in the SBF calibration's band", (-10.0, 50.0),
               "SBF_MAG_INVALID"),
        Column("sbf_mag_err", "mag", "error of sbf_mag", (0.0, 10.0), "SBF_ERR_INVALID"),
        Column("sbf_color", "mag", "the SBF calibration's colour, as observed", (-2.0, 5.0), "SBF_COLOR_INVALID"),
        Column("sbf_color_err", "mag", "error of sbf_color", (0.0, 10.0), "SBF_ERR_INVALID"),
    ),
    bands={"band": "band", "blue": "color_bands.0", "red": "color_bands.1"},
    inputs={
        "sbf_mag": Input("ingest", "sbf_mag", "mag", 29.5), "sbf_mag_err": _err("ingest", "sbf_mag_err", "mag", 0.05),
        "sbf_color": Input("ingest", "sbf_color", "mag", 1.2),
        "sbf_color_err": _err("ingest", "sbf_color_err", "mag", 0.02),
        "quality_flags": _flags("ingest", "quality_flags"),
        "A_mag": Input("extinction", "A_{band}", "mag", 0.075),
        "A_mag_err": _err("extinction", "A_{band}_err", "mag", 0.012),
        "A_blue": Input("extinction", "A_{blue}", "mag", 0.137),
        "A_blue_err": _err("extinction", "A_{blue}_err", "mag", 0.022),
        "A_red": Input("extinction", "A_{red}", "mag", 0.075),
        "A_red_err": _err("extinction", "A_{red}_err", "mag", 0.012),
        "ext_flags": _flags("extinction", "ext_flags"),
        "K_mag": Input("kcorr", "K_{band}", "mag", 0.01), "K_blue": Input("kcorr", "K_{blue}", "mag", 0.03),
        "K_red": Input("kcorr", "K_{red}", "mag", 0.01),
        "K_mag_err": _err("kcorr", "K_{band}_err", "mag", 0.01), "K_blue_err": _err("kcorr", "K_{blue}_err", "mag", 0.02),
        "K_red_err": _err("kcorr", "K_{red}_err", "mag", 0.01),
        "kcorr_flags": _flags("kcorr", "kcorr_flags"),
    },
    outputs={"color_0": "mag", "mag_0": "mag", "abs_mag": "mag"},
    descriptions={
        "color_0": "sbf_color corrected for Galactic extinction and K, in the calibration's system",
        "mag_0": "sbf_mag corrected for Galactic extinction and K, in the calibration's system",
        "abs_mag": "absolute fluctuation magnitude the calibration gives at color_0",
    },
    derive=_sbf_derive,
    relation_plot=RelationPlot("color_0", "mag_0", "dereddened colour ({colour})$_0$ (mag)",
                               r"SBF: $\bar M$ against colour"),
)

def _fp_derive(config, calibration) -> dict:
    """The run's H0 (the calibration's sizes are rescaled to it) and the system offset of
    <mu_e> and m onto the calibration's."""
    from .conventions import run_h0
    from .photometry import system_offset

    band = config["bands"][config["fp"]["band"]]
    return {"hubble_constant": run_h0(config),
            "mag_offset": system_offset(band["system"], calibration.system, band.get("ab_minus_vega"))}


def _fp_setup(calibration, settings) -> None:
    """The calibration's plane terms must be complete (``fp.check_calibration``)."""
    from .fp import check_calibration

    check_calibration(calibration)


def _optional(name, unit, meaning, valid):
    return Column(name, unit, meaning, valid, required=False)


FUNDAMENTAL_PLANE = MethodSpec(
    name="fp", prefix="fp", title="Fundamental Plane", colour="tab:green", marker="^",
    module="fp", function="fp_distance", settings="FPSettings", setup_check=_fp_setup,
    forms=("plane",),
    # bounds as galdist.fp.PHYSICAL_BOUNDS (generous: impossible, not merely uncalibrated)
    catalog_columns=(
        Column("fp_sigma", "km / s", "central velocity dispersion in the spectroscopic aperture", (0.0, 1500.0)),
        Column("fp_sigma_err", "km / s", "error of fp_sigma", (0.0, 1500.0)),
        Column("fp_aperture_arcsec", "arcsec", "radius of the circular spectroscopic aperture", (0.0, 600.0)),
        Column("fp_re_arcsec", "arcsec", "effective (half-light) radius, angular", (0.0, 3600.0)),
        Column("fp_re_err", "arcsec", "error of fp_re_arcsec", (0.0, 3600.0)),
        # <mu_e> or, where it is missing, the total magnitude: either column may be absent
        _optional("fp_mu_e", "mag / arcsec2", "mean surface brightness within R_e, observed", (5.0, 35.0)),
        _optional("fp_mu_e_err", "mag / arcsec2", "error of fp_mu_e", (0.0, 10.0)),
        _optional("fp_mag", "mag", "total magnitude in the FP band, observed (where fp_mu_e is missing)",
                  (-10.0, 40.0)),
        _optional("fp_mag_err", "mag", "error of fp_mag", (0.0, 10.0)),
        _optional("fp_re_mu_corr", "", "correlation of the errors of fp_re_arcsec and fp_mu_e", (-1.0, 1.0)),
        _optional("fp_re_mag_corr", "", "correlation of the errors of fp_re_arcsec and fp_mag", (-1.0, 1.0)),
        _optional("fp_sigma_re_corr", "", "correlation of the errors of fp_sigma and fp_re_arcsec", (-1.0, 1.0)),
        _optional("fp_sigma_mu_corr", "", "correlation of the errors of fp_sigma and fp_mu_e", (-1.0, 1.0)),
    ),
    bands={"band": "band"},
    inputs={
        "fp_sigma": Input("ingest", "fp_sigma", "km / s", 200.0),
        "fp_sigma_err": _err("ingest", "fp_sigma_err", "km / s", 8.0),
        "fp_aperture_arcsec": Input("ingest", "fp_aperture_arcsec", "arcsec", 3.35),
        "fp_re_arcsec": Input("ingest", "fp_re_arcsec", "arcsec", 5.0),
        "fp_re_err": _err("ingest", "fp_re_err", "arcsec", 0.3),
        "fp_mu_e": Input("ingest", "fp_mu_e", "mag / arcsec2", 17.5, "optional"),  # or fp_mag
        "fp_mu_e_err": _err("ingest", "fp_mu_e_err", "mag / arcsec2", 0.05),
        "fp_mag": Input("ingest", "fp_mag", "mag", float("nan"), "optional"),
        "fp_mag_err": _err("ingest", "fp_mag_err", "mag", float("nan")),
        **{c: Input("ingest", c, "", 0.0, "optional")
           for c in ("fp_re_mu_corr", "fp_re_mag_corr", "fp_sigma_re_corr", "fp_sigma_mu_corr")},
        "z_helio": Input("ingest", "z_helio", "", 0.03),
        "quality_flags": _flags("ingest", "quality_flags"),
        "a_gal": Input("extinction", "A_{band}", "mag", 0.02),
        "a_gal_err": _err("extinction", "A_{band}_err", "mag", 0.005),
        "ext_flags": _flags("extinction", "ext_flags"),
        "k_corr": Input("kcorr", "K_{band}", "mag", 0.03),
        "k_corr_err": _err("kcorr", "K_{band}_err", "mag", 0.01),
        "kcorr_flags": _flags("kcorr", "kcorr_flags"),
        # eta needs the redshift distance (and the gaussian estimator both)
        "z_cmb": Input("redshift", "z_cmb", "", 0.03, "optional"),
        "mu_z": Input("redshift", "mu_z", "mag", 35.6, "optional"),
    },
    outputs={"sigma_0": "km / s", "mu_e_0": "mag / arcsec2", "log_sigma_0": "dex(km / s)",
             "log_ie": "dex(Lsun / pc2)", "log_re_z": "dex(kpc)", "log_re_pred": "dex(kpc)", "eta": "dex",
             "eta_err": "dex", "eta_post_std": "dex", "eta_post_mode": "dex"},
    descriptions={
        "sigma_0": "velocity dispersion corrected to the standard aperture (the calibration's fraction of R_e)",
        "mu_e_0": "mean surface brightness within R_e corrected for Galactic extinction, K and the (1 + z)^4 "
                  "dimming, in the calibration's system",
        "log_sigma_0": "log10 sigma_0",
        "log_ie": "log10 of the mean surface brightness within R_e, in Lsun / pc2",
        "log_re_z": "log10 of R_e in kpc at the redshift distance D_A(z)",
        "log_re_pred": "log10 of R_e in kpc the plane predicts from log_sigma_0 and log_ie (its sizes rescaled "
                       "to the run's H0)",
        "eta": "log distance ratio log10(D_A(z) / D_A), angular-diameter distances: log_re_z - log_re_pred "
               "(estimator plane) or the mean of its posterior (estimator gaussian)",
        "eta_err": "error of eta",
        "eta_post_std": "standard deviation of the posterior of eta (estimator gaussian)",
        "eta_post_mode": "mode of the posterior of eta (estimator gaussian)",
    },
    derive=_fp_derive, uses=("redshift",),
    posterior="eta_likelihood", posterior_applies=lambda section: section.get("estimator") == "gaussian",
    relation_plot=RelationPlot("log_re_pred", "log_re_z",
                               r"$\log_{10} R_e$ predicted by the plane from $\sigma_0$ and $\langle I_e\rangle$ "
                               "(kpc at the calibration's $H_0$)", "Fundamental Plane, edge-on",
                               ylabel=r"$\log_{10} R_e$ at the redshift distance (kpc at the calibration's $H_0$)",
                               view="identity", scatter_unit="dex"),
)

#: Every distance method, by config name, in the order of the product's columns.
REGISTRY: dict[str, MethodSpec] = {spec.name: spec for spec in (TULLY_FISHER, SBF, FUNDAMENTAL_PLANE)}
