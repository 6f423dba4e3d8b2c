"""The invented demo calibration sample: Tully-Fisher discs and Fundamental-Plane early
types in groups of the Corvid Reach, a few with reference distance moduli, the discs
cut at an apparent-magnitude limit, the early types at a limit on their total
magnitude in the FP band and a cut in log sigma_0.

Invented data for the demo of the calibrate target only. Members of a group share one
cosmological distance (and a group peculiar velocity plus an internal spread); the
observables are generated forward by the demo survey's generator (``galdist.demo``),
through the run's extinction law, K-correction templates and Tully-Fisher calibration,
so fitting the sample recovers that calibration's slope, zero point and scatter.
The early types follow the FP calibration's plane the same way (``demo._observe``);
they carry no HI, so the Tully-Fisher fit leaves them out (and the FP fit the discs),
and they come from their own random stream, so the discs do not depend on them.
Reference moduli (standing in for Cepheid or TRGB distances) are the true modulus plus
an error drawn with the stated size. Galaxies are named ``CRC-<number>``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from . import demo

PREFIX = "CRC"


@dataclass(frozen=True)
class CalibrationDemo:
    """The shape of the invented sample."""

    n_groups: int = 14
    per_group: int = 40
    cz_range: tuple = (1500.0, 5000.0)  # km/s, group distances
    group_spread_kms: float = 150.0  # internal velocity dispersion of a group
    n_reference_groups: int = 2  # groups with a member of known modulus
    n_reference_field: int = 10  # field galaxies with their own reference modulus
    field_cz_range: tuple = (400.0, 1500.0)
    reference_err: float = 0.08  # mag
    mag_limit: float = 13.0  # apparent magnitude limit in the Tully-Fisher band
    early_per_group: int = 30  # early types per group (FP inputs), before their cuts
    fp_mag_limit: float = 10.2  # limit on the total magnitude in the FP band (fp_mu_e, fp_re_arcsec)
    fp_log_sigma_min: float = 2.15  # cut on log10 sigma_0 (aperture-corrected, km/s)


def make_calibration_sample(seed: int, settings: demo.DemoSettings | None = None,
                            shape: CalibrationDemo | None = None) -> pa.Table:
    """A deterministic invented calibration sample (canonical columns plus group_id,
    mu_ref, mu_ref_err): discs limited at ``shape.mag_limit`` in the Tully-Fisher band,
    then early types (where the config has the FP band) limited at ``shape.fp_mag_limit``
    in total magnitude and ``shape.fp_log_sigma_min`` in log sigma_0."""
    settings = settings or demo.settings_from_config()
    shape = shape or CalibrationDemo()
    rng = np.random.default_rng(seed)
    conf = settings.config
    g, m = shape.n_groups, shape.per_group
    # group centres in the demo's invented patch; members within ~1 degree
    ra0, dec0 = demo._positions(rng, g)
    cz_group = rng.uniform(*shape.cz_range, g)
    ra = np.repeat(ra0, m) + rng.normal(0.0, 0.7, g * m)
    dec = np.clip(np.repeat(dec0, m) + rng.normal(0.0, 0.7, g * m), -89.0, 89.0)
    z_cos = np.repeat(cz_group, m) / demo.C_KMS
    v_pec = np.repeat(rng.normal(0.0, 250.0, g), m) + rng.normal(0.0, shape.group_spread_kms, g * m)
    group = np.repeat([f"{PREFIX}-G{k:02d}" for k in range(g)], m).astype(object)
    # field galaxies with reference moduli, each its own group
    nf = shape.n_reference_field
    fra, fdec = demo._positions(rng, nf)
    ra, dec = np.concatenate([ra, fra]), np.concatenate([dec, fdec])
    z_cos = np.concatenate([z_cos, rng.uniform(*shape.field_cz_range, nf) / demo.C_KMS])
    v_pec = np.concatenate([v_pec, rng.normal(0.0, 150.0, nf)])
    group = np.concatenate([group, np.array([f"{PREFIX}-F{k:02d}" for k in range(nf)], dtype=object)])
    n = ra.size
    cols = demo._observe(rng, ra, dec, z_cos, v_pec, np.ones(n, dtype=bool), conf)
    mu_true = _mu(conf, z_cos)
    has_ref = np.zeros(n, dtype=bool)
    has_ref[g * m:] = True
    ref_groups = rng.choice(g, shape.n_reference_groups, replace=False)
    ref_err = np.where(has_ref, shape.reference_err, np.nan)
    mu_ref = np.where(has_ref, mu_true + rng.normal(0.0, shape.reference_err, n), np.nan)
    for k in ref_groups:  # one TRGB-like modulus for the whole group, on every member
        rows = slice(k * m, (k + 1) * m)
        mu_ref[rows] = mu_true[k * m] + rng.normal(0.0, shape.reference_err)
        ref_err[rows] = shape.reference_err
    band = conf["tully_fisher"]["band"]
    keep = cols[f"mag_{band}"] < shape.mag_limit
    cols.update(group_id=group, mu_ref=mu_ref, mu_ref_err=ref_err)
    cols["galaxy_id"] = np.array([f"{PREFIX}-{i:06d}" for i in range(1, n + 1)], dtype=object)
    order = ["galaxy_id", "group_id", "ra", "dec", "z_helio", "z_helio_err", "ebv", "ebv_err"]
    for b in conf["bands"]:
        order += [f"mag_{b}", f"mag_{b}_err"]
    order += ["w50", "w50_err", "axis_ratio", "axis_ratio_err", "hi_flux", "mu_ref", "mu_ref_err"]
    discs = {k: np.asarray(cols[k])[keep] for k in order}
    early = _early_types(seed, shape, conf, ra0, dec0, cz_group, v_pec[: g * m].reshape(g, m).mean(axis=1),
                         mu_ref[: g * m : m], ref_err[: g * m : m], n + 1)
    if early is None:
        return pa.table(discs)
    order += list(demo.FP_COLUMNS)
    size = discs["galaxy_id"].size
    discs |= {k: np.full(size, np.nan) for k in demo.FP_COLUMNS}
    return pa.table({k: np.concatenate([discs[k], early[k]]) for k in order})


def _early_types(seed, shape, conf, ra0, dec0, cz_group, v_group, mu_ref, ref_err, first_id):
    """The groups' early types with FP inputs (no HI), from their own random stream, cut
    at the FP total-magnitude limit and the log sigma_0 cut; None without the FP band."""
    from . import fp
    from .calibration import load_calibration

    if not shape.early_per_group or conf["fp"]["band"] not in conf["bands"]:
        return None
    rng = np.random.default_rng([seed, 1])
    g, m = len(ra0), shape.early_per_group
    n = g * m
    ra = np.repeat(ra0, m) + rng.normal(0.0, 0.7, n)
    dec = np.clip(np.repeat(dec0, m) + rng.normal(0.0, 0.7, n), -89.0, 89.0)
    v_pec = np.repeat(v_group, m) + rng.normal(0.0, shape.group_spread_kms, n)
    cols = demo._observe(rng, ra, dec, np.repeat(cz_group, m) / demo.C_KMS, v_pec, np.zeros(n, dtype=bool), conf)
    for k in ("w50", "w50_err", "axis_ratio", "axis_ratio_err", "hi_flux"):
        cols[k] = np.full(n, np.nan)
    cols["group_id"] = np.repeat([f"{PREFIX}-G{k:02d}" for k in range(g)], m).astype(object)
    cols["mu_ref"], cols["mu_ref_err"] = np.repeat(mu_ref, m), np.repeat(ref_err, m)
    cols["galaxy_id"] = np.array([f"{PREFIX}-{i:06d}" for i in range(first_id, first_id + n)], dtype=object)
    terms = fp.plane_terms(load_calibration(conf["fp"]["calibration"]))
    theta = cols["fp_re_arcsec"]
    total = cols["fp_mu_e"] - fp.mean_surface_brightness(0.0, theta)
    s = np.log10(fp.aperture_corrected_sigma(cols["fp_sigma"], cols["fp_aperture_arcsec"], theta,
                                             terms.aperture_exponent, terms.aperture_fraction))
    keep = (total <= shape.fp_mag_limit) & (s >= shape.fp_log_sigma_min)
    return {k: np.asarray(v)[keep] for k, v in cols.items()}


def _mu(conf, z_cos):
    from . import stages

    return stages.mu_grid(conf["redshift"]).mu(z_cos)
