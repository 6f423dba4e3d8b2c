"""The invented demo survey (Corvid Reach Survey) and synthetic benchmark catalogs.

Invented data, for the demo and the benchmark only: never a check value for
science tests. Galaxies get a true cosmological redshift and distance, a
peculiar velocity, and observables generated forward through the corrections the
pipeline undoes.

Discs carry HI (Tully-Fisher); early types carry SBF and Fundamental-Plane inputs,
and a few lenticulars HI as well, so every pair of methods has galaxies in common.
Every early type gets FP inputs (where the config has the FP band): a velocity
dispersion from the survey's own spectrum and R_e and <mu_e> from its imaging are all
the FP needs, which is why real FP samples are many times larger than SBF samples and
reach farther; giving FP to all of them also keeps the demo's FP zero point tested
on as many galaxies as SBF's.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa

from .io import write_parquet

C_KMS = 299792.458
SURVEY_PREFIX = "CRS"
#: the Fundamental-Plane columns of the demo's early types
FP_COLUMNS = ("fp_sigma", "fp_sigma_err", "fp_aperture_arcsec", "fp_re_arcsec", "fp_re_err", "fp_mu_e",
              "fp_mu_e_err")
#: the demo survey's spectra: fibres 3 arcsec across (invented survey), so r_ap = 1.5 arcsec
FP_APERTURE_ARCSEC = 1.5
#: in-plane margin (dex) kept from the ends of the calibrated ranges of s and i (see ``_plane_sample``)
FP_RANGE_MARGIN = 0.08


@dataclass(frozen=True)
class DemoSettings:
    """What the demo follows: the run's bands, stage settings and calibrations."""

    config: dict = field(default_factory=dict)
    disc_fraction: float = 0.65
    cz_range: tuple = (1500.0, 15000.0)
    sigma_vpec: float = 300.0
    bad_fraction: float = 0.02


def settings_from_config(path=None) -> DemoSettings:
    """Demo settings following a galdist config (default config/config.yaml)."""
    from . import config as cfg

    defaults = cfg.load(cfg.DEFAULT_CONFIG)
    return DemoSettings(config=cfg.validate(cfg.layered(cfg.load(path), defaults) if path else defaults))


def _positions(rng, n):
    ra = rng.uniform(160.0, 220.0, n)
    sin_dec = rng.uniform(np.sin(np.radians(-5.0)), np.sin(np.radians(35.0)), n)
    return ra, np.degrees(np.arcsin(sin_dec))


def _cosmological_redshift(rng, n, cz_range):
    """Uniform in volume between the cz limits (low-z approximation for the sampling only)."""
    lo, hi = cz_range
    r3 = rng.uniform(lo**3, hi**3, n)
    return np.cbrt(r3) / C_KMS


def make_catalog(n: int, seed: int, settings: DemoSettings | None = None, first_id: int = 1) -> pa.Table:
    """A deterministic invented catalog of ``n`` galaxies in canonical columns.

    IDs run from ``first_id``, so a large catalog can be written in chunks
    (different seeds, consecutive ``first_id``) without holding it in memory.
    """
    settings = settings or settings_from_config()
    rng = np.random.default_rng(seed)
    ra, dec = _positions(rng, n)
    z_cos = _cosmological_redshift(rng, n, settings.cz_range)
    v_pec = rng.normal(0.0, settings.sigma_vpec, n)
    is_disc = rng.uniform(size=n) < settings.disc_fraction
    cols = _observe(rng, ra, dec, z_cos, v_pec, is_disc, settings.config)
    cols["galaxy_id"] = np.array([f"{SURVEY_PREFIX}-{i:08d}" for i in range(first_id, first_id + n)], dtype=object)
    cols["galaxy_class"] = np.where(is_disc, "disc", "early-type").astype(object)
    _sprinkle_bad_rows(rng, cols, settings)
    order = ["galaxy_id", "ra", "dec", "z_helio", "z_helio_err", "ebv", "ebv_err"]
    for b in settings.config["bands"]:
        order += [f"mag_{b}", f"mag_{b}_err"]
    order += ["w50", "w50_err", "axis_ratio", "axis_ratio_err", "hi_flux",
              "sbf_mag", "sbf_mag_err", "sbf_color", "sbf_color_err", *FP_COLUMNS, "galaxy_class"]
    return pa.table({k: cols[k] for k in order if k in cols})


def _observed_width(w_r, w_t, w_c):
    """Invert the turbulence correction: the W whose W_R is ``w_r`` (monotonic, tabulated)."""
    from .tully_fisher import turbulence_correction

    w = np.linspace(w_t + 1e-3, 3000.0, 60000)
    return np.interp(w_r, turbulence_correction(w, w_t, w_c), w)


def _disc(rng, n, cal, band_cfg, z_helio, mu, a_gal, k_corr, tf_cfg):
    """Observed magnitude, width and axis ratio of discs following a TF calibration."""
    from . import tully_fisher as tf
    from .photometry import convert

    lo, hi = cal.valid_range
    logw_i = np.clip(rng.normal(0.5 * (lo + hi), 0.15, n), lo + 0.02, hi - 0.02)
    abs_mag = cal.polynomial(logw_i) + rng.normal(0.0, cal.scatter, n)
    cos_i = rng.uniform(np.cos(np.radians(88.0)), np.cos(np.radians(25.0)), n)
    q0 = tf_cfg["q0"]
    axis_ratio = np.sqrt(cos_i**2 * (1.0 - q0**2) + q0**2)
    g0, g1 = tf.INTERNAL_EXTINCTION_GAMMA[cal.band]
    a_int = tf.internal_extinction(axis_ratio, logw_i, g0, g1)
    w_t, w_c = tf.TURBULENCE_CONSTANTS[tf_cfg["width_definition"]]
    w50 = _observed_width(10.0**logw_i * np.sqrt(1.0 - cos_i**2), w_t, w_c) * (1.0 + z_helio)
    m_cal = abs_mag + mu + a_gal + k_corr + a_int
    mag = convert(m_cal, cal.system, band_cfg["system"], band_cfg["ab_minus_vega"])
    return mag, w50, axis_ratio


def _observe(rng, ra, dec, z_cos, v_pec, is_disc, conf):
    """Observables generated forward through every correction the pipeline undoes,
    with the run's extinction law, K-correction templates and calibrations."""
    from . import kcorr, redshift, stages
    from .calibration import load_calibration
    from .conventions import at_run_h0, extinction_factors, run_h0
    from .ebv_maps import galactic_coordinates
    from .photometry import color_system_offset, system_offset

    n = len(ra)
    bands = conf["bands"]
    rcfg = conf["redshift"]
    grid = stages.mu_grid(rcfg)
    mu = grid.mu(z_cos)
    z_cmb = (1.0 + z_cos) * (1.0 + v_pec / C_KMS) - 1.0
    l, b = galactic_coordinates(ra, dec)
    apex = 1.0 + rcfg["v_sun_kms"] / C_KMS * redshift.cos_angle_to_apex(l, b, rcfg["apex_l_deg"], rcfg["apex_b_deg"])
    z_helio = (1.0 + z_cmb) / apex - 1.0
    # dust: E(B-V) on the input scale; a few galaxies behind an invented dust lane
    ebv = 0.012 + rng.gamma(2.0, 0.012, n)
    dusty = rng.uniform(size=n) < 0.01
    ebv[dusty] = rng.uniform(0.5, 1.0, dusty.sum())
    r = stages.extinction_coefficients(conf).per_true_ebv()
    a = {band: r[band] * conf["extinction"]["ebv_scale"] * ebv for band in bands}

    def calibration_and_extinction(section):
        """A method's calibration at the run's H0 and the extinction in its convention
        (galdist.conventions), as the method will apply them."""
        cal = at_run_h0(load_calibration(section["calibration"]), run_h0(conf))
        factor = extinction_factors(conf, cal.extinction_convention)
        return cal, {band: a[band] * factor[band] for band in bands}

    # K-corrections: discs star-forming templates, early types passive ones
    kcfg = conf["kcorr"]
    kgrid = stages.kcorr_grid(conf)
    nt = kgrid.n_steps  # templates per track; evaluate() takes a position along the first
    template = np.where(is_disc, rng.uniform(nt / 2.0, nt - 1.0, n), rng.uniform(0.0, 1.5, n))
    k, colour = kcorr.evaluate(kgrid, z_helio, template)
    z_err = np.full(n, 3e-5)
    cols = {"ra": ra, "dec": dec, "z_helio": z_helio + rng.normal(0.0, 1.0, n) * z_err, "z_helio_err": z_err}
    ebv_err = 0.002 + 0.05 * ebv
    cols["ebv"], cols["ebv_err"] = ebv + rng.normal(0.0, 1.0, n) * ebv_err, ebv_err
    # broadband magnitudes: the TF band from the TF relation (discs) or a luminosity
    # function (early types); other bands from the template colour
    tcfg, scfg = conf["tully_fisher"], conf["sbf"]
    tf_band = tcfg["band"]
    tf_cal, a_tf = calibration_and_extinction(tcfg)
    tf_mag, w50, axis_ratio = _disc(rng, n, tf_cal, bands[tf_band], z_helio, mu, a_tf[tf_band], k[tf_band], tcfg)
    # a few lenticulars carry both HI and SBF measurements, so the methods can be compared
    has_hi = is_disc | (rng.uniform(size=n) < 0.08)
    mags = {tf_band: np.where(has_hi, tf_mag, rng.normal(-22.0, 0.8, n) + mu + a[tf_band] + k[tf_band])}
    blue, red = kcfg["colour_pair"] or (None, None)
    ref = red if red in mags or blue is None else tf_band
    if blue is not None:
        # the colour the K stage matches, Galactic extinction and a disc's internal
        # reddening added back
        per_a_i = kgrid.meta.get("disc_reddening_per_a_i")
        e_int = (np.where(has_hi, kcorr.disc_colour_excess(w50, axis_ratio, z_helio, per_a_i, tcfg["q0"]), 0.0)
                 if per_a_i is not None else 0.0)
        if red == tf_band:
            mags[blue] = mags[red] - a[red] + a[blue] + colour + e_int
        elif blue == tf_band:
            mags[red] = mags[blue] - a[blue] + a[red] - colour - e_int
    for band in bands:
        if band not in mags:  # a band outside the colour pair: a plain rest-frame colour of 2 mag
            mags[band] = mags[ref] - a[ref] - k[ref] - 2.0 + a[band] + k[band]
    for band in bands:
        err = rng.uniform(0.02, 0.05, n)
        cols[f"mag_{band}"] = mags[band] + rng.normal(0.0, 1.0, n) * err
        cols[f"mag_{band}_err"] = err
    # HI for discs only
    w_err = np.full(n, 6.0)
    ba_err = np.full(n, 0.02)
    cols["w50"] = np.where(has_hi, w50 + rng.normal(0.0, 1.0, n) * w_err, np.nan)
    cols["w50_err"] = np.where(has_hi, w_err, np.nan)
    cols["axis_ratio"] = np.where(has_hi, np.clip(axis_ratio + rng.normal(0.0, 1.0, n) * ba_err, 0.05, 1.0), np.nan)
    cols["axis_ratio_err"] = np.where(has_hi, ba_err, np.nan)
    cols["hi_flux"] = np.where(has_hi, 10 ** rng.normal(0.5, 0.3, n), np.nan)
    # SBF for early types, following the SBF calibration
    cal, a_sbf = calibration_and_extinction(scfg)
    sb, (cb, cr) = scfg["band"], scfg["color_bands"]
    lo, hi = cal.valid_range
    color_0 = rng.uniform(lo + 0.02, hi - 0.02, n)
    abs_sbf = cal.polynomial(color_0) + rng.normal(0.0, cal.scatter, n)
    m_off = system_offset(bands[sb]["system"], cal.system, bands[sb]["ab_minus_vega"])
    c_off = color_system_offset(bands[cb]["system"], bands[cb]["ab_minus_vega"], bands[cr]["system"],
                                bands[cr]["ab_minus_vega"], cal.system)
    sbf_mag = abs_sbf + mu + a_sbf[sb] + k[sb] - m_off
    sbf_color = color_0 + (a_sbf[cb] - a_sbf[cr]) + (k[cb] - k[cr]) - c_off
    m_err, c_err = rng.uniform(0.04, 0.10, n), np.full(n, 0.02)
    cols["sbf_mag"] = np.where(is_disc, np.nan, sbf_mag + rng.normal(0.0, 1.0, n) * m_err)
    cols["sbf_mag_err"] = np.where(is_disc, np.nan, m_err)
    cols["sbf_color"] = np.where(is_disc, np.nan, sbf_color + rng.normal(0.0, 1.0, n) * c_err)
    cols["sbf_color_err"] = np.where(is_disc, np.nan, c_err)
    # FP for every early type (see make_catalog), where the config has the FP band
    if conf["fp"]["band"] in bands:
        _, a_fp = calibration_and_extinction(conf["fp"])
        fp_cols, _ = _fundamental_plane(rng, n, conf, z_helio, mu, a_fp[conf["fp"]["band"]], k[conf["fp"]["band"]])
        for name, values in fp_cols.items():
            cols[name] = np.where(is_disc, np.nan, values)
    return cols


def _plane_sample(rng, n, cal, terms):
    """True (r, s, i) of ``n`` early types on the calibration's plane.

    With the calibration's 3-D Gaussian (Magoulas et al. 2012; ``galdist.fp``): the
    position in the plane from its two in-plane axes v2, v3, kept (redrawn) while
    that position lies within the calibrated ranges of s and i less
    ``FP_RANGE_MARGIN``, then the offset from the plane along its normal v1. The cut
    is on the in-plane position only, which is independent of the offset from the
    plane: a cut on s or i themselves (which carry part of that offset) would select
    on it and bias the plane estimator (about +0.04 mag in mu for a cut at the
    Gaussian's 1.1 sigma in s, by a first-order calculation). Without a Gaussian: s
    and i uniform within the ranges (less the margin), r = the plane + the
    calibration's scatter in r.
    """
    from .fp import plane_axes, plane_log_radius

    lo, hi = cal.valid_range
    i_lo, i_hi = terms.log_ie_range or (terms.pivot_log_ie - 0.5, terms.pivot_log_ie + 0.5)
    m = FP_RANGE_MARGIN
    g = terms.gaussian
    if g is None:
        s = rng.uniform(lo + m, hi - m, n)
        i = rng.uniform(i_lo + m, i_hi - m, n)
        return plane_log_radius(cal, terms, s, i) + rng.normal(0.0, cal.scatter, n), s, i
    a, b = cal.coefficients[0], cal.coefficients[1]
    v1, v2, v3 = plane_axes(a, b)
    centre = np.array([float(plane_log_radius(cal, terms, g.mean_log_sigma, g.mean_log_ie)),
                       g.mean_log_sigma, g.mean_log_ie])
    inplane = np.empty((n, 3))
    todo = np.arange(n)
    for _ in range(200):  # rejection: the ranges hold most of the Gaussian, few rounds
        x = (centre + rng.normal(0.0, g.sigmas[1], (todo.size, 1)) * v2
             + rng.normal(0.0, g.sigmas[2], (todo.size, 1)) * v3)
        ok = (x[:, 1] >= lo + m) & (x[:, 1] <= hi - m) & (x[:, 2] >= i_lo + m) & (x[:, 2] <= i_hi - m)
        inplane[todo[ok]] = x[ok]
        todo = todo[~ok]
        if not todo.size:
            break
    else:
        raise ValueError(f"calibration {cal.name}: its 3-D Gaussian hardly meets its calibrated ranges")
    x = inplane + rng.normal(0.0, g.sigmas[0], (n, 1)) * v1
    return x[:, 0], x[:, 1], x[:, 2]


def _fundamental_plane(rng, n, conf, z_helio, mu, a_gal, k_corr, noise: bool = True):
    """Observed FP inputs of galaxies on the configured FP calibration's plane.

    Forward through every step ``galdist.fp`` undoes, in reverse: the physical radius
    (kpc at the calibration's H0, rescaled to the run's) at the angular-diameter
    distance of the true distance, D_A = D_L / (1 + z_helio)^2 (the reciprocity
    ``fp`` applies with the observed redshift), so fp_mu is the true mu as TF and SBF
    see it; <mu_e> from i with the calibration's M_sun, plus the Tolman dimming,
    Galactic extinction and K, onto the band's photometric system; sigma in the
    demo's fibre from sigma_0 by the aperture correction; then measurement errors.
    Steps the config switches off are not applied here either. ``noise=False``
    leaves the measurement errors out (the values stay exact, the errors are quoted).
    Returns (catalog columns, the true {"r", "s", "i"}).
    """
    from . import fp
    from .calibration import load_calibration
    from .methods import FUNDAMENTAL_PLANE

    section = conf["fp"]
    cal = load_calibration(section["calibration"])
    terms = fp.check_calibration(cal)
    derived = FUNDAMENTAL_PLANE.derive(conf, cal)
    r, s, i = _plane_sample(rng, n, cal, terms)
    # the size: r is log10 R_e in kpc at the calibration's H0; at the run's H0, r - h
    h = 0.0 if terms.hubble_constant is None else np.log10(derived["hubble_constant"] / terms.hubble_constant)
    log_da = 0.2 * mu - 5.0 - 2.0 * np.log10(1.0 + z_helio)                      # Mpc
    theta = 10.0 ** (r - h - log_da - 3.0) * fp.ARCSEC_PER_RAD                    # arcsec
    mu_0 = terms.abs_mag_sun + fp.SB_ZERO_POINT - 2.5 * i
    mu_obs = mu_0
    if section.get("apply_dimming", True):
        mu_obs = mu_obs + fp.surface_brightness_dimming(z_helio)
    if section.get("apply_galactic_extinction", True):
        mu_obs = mu_obs + a_gal
    if section.get("apply_kcorrection", True):
        mu_obs = mu_obs + k_corr
    mu_e = mu_obs - derived["mag_offset"]
    sigma_0 = 10.0 ** s
    aperture = np.full(n, FP_APERTURE_ARCSEC)
    if section.get("apply_aperture_correction", True):
        # sigma_0 = sigma_ap (r_ap / (f R_e))^alpha, so sigma_ap = sigma_0 / that factor
        sigma_ap = sigma_0 / fp.aperture_corrected_sigma(1.0, aperture, theta, terms.aperture_exponent,
                                                         terms.aperture_fraction)
    else:
        sigma_ap = sigma_0
    sigma_err = sigma_ap * rng.uniform(0.03, 0.07, n)
    re_err = theta * rng.uniform(0.03, 0.08, n)
    mu_e_err = rng.uniform(0.03, 0.06, n)
    scale = 1.0 if noise else 0.0
    return {
        "fp_sigma": sigma_ap + scale * rng.normal(0.0, 1.0, n) * sigma_err, "fp_sigma_err": sigma_err,
        "fp_aperture_arcsec": aperture,
        "fp_re_arcsec": theta + scale * rng.normal(0.0, 1.0, n) * re_err, "fp_re_err": re_err,
        "fp_mu_e": mu_e + scale * rng.normal(0.0, 1.0, n) * mu_e_err, "fp_mu_e_err": mu_e_err,
    }, {"r": r, "s": s, "i": i}


def _sprinkle_bad_rows(rng, cols, settings):
    """Corrupt a few rows with each kind of bad value the ingest flags."""
    n = len(cols["ra"])
    n_bad = max(1, int(settings.bad_fraction * n / 16))
    band = next(iter(settings.config["bands"]))
    kinds = [
        ("ra", np.nan), ("dec", 95.0), ("z_helio", -0.01), ("z_helio", 1.5), ("z_helio_err", -1e-4),
        (f"mag_{band}", np.inf), (f"mag_{band}_err", -0.1), ("w50", -50.0), ("w50", 0.0),
        ("axis_ratio", 1.3), ("axis_ratio_err", np.nan), ("sbf_mag", np.nan), ("sbf_color", 9.0),
        ("sbf_mag_err", -0.2), ("ebv", -0.05), ("hi_flux", -1.0),
        ("fp_sigma", -30.0), ("fp_re_arcsec", 0.0), ("fp_mu_e_err", -0.1),
    ]
    idx = rng.permutation(n)
    k = 0
    for name, value in kinds:
        if name not in cols:  # a method the run's config leaves out
            continue
        rows = idx[k:k + n_bad]
        k += n_bad
        cols[name][rows] = value


def write(table: pa.Table, path: str | Path) -> None:
    write_parquet(table, path, compression="zstd")
