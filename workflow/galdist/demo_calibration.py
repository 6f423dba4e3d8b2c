"""The invented demo calibration sample: Tully-Fisher discs in groups of the Corvid
Reach, a few with reference distance moduli, cut at an apparent-magnitude limit.

Invented data for the demo of the calibrate target only. Members of a group share one
cosmological distance (and a group peculiar velocity plus an internal spread); the
observables are generated forward by the demo survey's generator (``galdist.demo``),
through the run's extinction law, K-correction templates and Tully-Fisher calibration,
so fitting the sample recovers that calibration's slope, zero point and scatter.
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


def make_calibration_sample(seed: int, settings: demo.DemoSettings | None = None,
                            shape: CalibrationDemo | None = None) -> pa.Table:
    """A deterministic invented calibration sample (canonical columns plus group_id,
    mu_ref, mu_ref_err), limited at ``shape.mag_limit`` in the Tully-Fisher band."""
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
    return pa.table({k: np.asarray(cols[k])[keep] for k in order})


def _mu(conf, z_cos):
    from . import stages

    return stages.mu_grid(conf["redshift"]).mu(z_cos)
