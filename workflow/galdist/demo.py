"""The invented demo survey (Corvid Reach Survey) and synthetic benchmark catalogs.

Invented data, for the demo and the benchmark only: never a check value for
science tests. Galaxies get a true cosmological redshift and distance, a
peculiar velocity, and observables generated forward through the corrections the
pipeline undoes.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa

from .io import write_parquet

C_KMS = 299792.458
SURVEY_PREFIX = "CRS"


@dataclass(frozen=True)
class DemoSettings:
    bands: dict = field(default_factory=lambda: {
        "V": {"filter": "bessell-V", "system": "Vega", "ab_minus_vega": 0.02},
        "I": {"filter": "bessell-I", "system": "Vega", "ab_minus_vega": 0.45},
        "Ks": {"filter": "twomass-Ks", "system": "Vega", "ab_minus_vega": 1.85},
    })
    disc_fraction: float = 0.65
    cz_range: tuple = (1500.0, 15000.0)
    sigma_vpec: float = 300.0
    bad_fraction: float = 0.02


def settings_from_config(path=None) -> DemoSettings:
    """Demo settings following a galdist config's bands (default config/config.yaml)."""
    from . import config as cfg

    path = Path(path) if path else Path(__file__).resolve().parents[2] / "config" / "config.yaml"
    if not path.exists():
        return DemoSettings()
    conf = cfg.validate(cfg.load(path))
    return DemoSettings(bands=conf["bands"])


def _positions(rng, n):
    ra = rng.uniform(160.0, 220.0, n)
    sin_dec = rng.uniform(np.sin(np.radians(-5.0)), np.sin(np.radians(35.0)), n)
    return ra, np.degrees(np.arcsin(sin_dec))


def _cosmological_redshift(rng, n, cz_range):
    """Uniform in volume between the cz limits (low-z approximation for the sampling only)."""
    lo, hi = cz_range
    r3 = rng.uniform(lo**3, hi**3, n)
    return np.cbrt(r3) / C_KMS


def make_catalog(n: int, seed: int, settings: DemoSettings | None = None) -> pa.Table:
    """A deterministic invented catalog of ``n`` galaxies in canonical columns."""
    settings = settings or DemoSettings()
    rng = np.random.default_rng(seed)
    ra, dec = _positions(rng, n)
    z_cos = _cosmological_redshift(rng, n, settings.cz_range)
    v_pec = rng.normal(0.0, settings.sigma_vpec, n)
    is_disc = rng.uniform(size=n) < settings.disc_fraction
    cols = _observe(rng, ra, dec, z_cos, v_pec, is_disc, settings.bands)
    cols["galaxy_id"] = np.array([f"{SURVEY_PREFIX}-{i:07d}" for i in range(1, n + 1)], dtype=object)
    cols["galaxy_class"] = np.where(is_disc, "disc", "early-type").astype(object)
    _sprinkle_bad_rows(rng, cols, settings)
    order = ["galaxy_id", "ra", "dec", "z_helio", "z_helio_err", "ebv", "ebv_err"]
    for b in settings.bands:
        order += [f"mag_{b}", f"mag_{b}_err"]
    order += ["w50", "w50_err", "axis_ratio", "axis_ratio_err", "hi_flux",
              "sbf_mag", "sbf_mag_err", "sbf_color", "sbf_color_err", "galaxy_class"]
    return pa.table({k: cols[k] for k in order if k in cols})


def _observe(rng, ra, dec, z_cos, v_pec, is_disc, bands):
    """Observables of each galaxy, generated forward from its true distance."""
    from astropy.cosmology import FlatLambdaCDM

    n = len(ra)
    cosmo = FlatLambdaCDM(H0=70.0, Om0=0.3)
    z_cmb = (1.0 + z_cos) * (1.0 + v_pec / C_KMS) - 1.0
    mu_true = 5.0 * np.log10(cosmo.luminosity_distance(z_cos).to_value("Mpc")) + 25.0
    ebv = 0.012 + rng.gamma(2.0, 0.012, n)
    dusty = rng.uniform(size=n) < 0.01
    ebv[dusty] = rng.uniform(0.5, 1.0, dusty.sum())
    r_band = {"V": 2.742, "I": 1.505, "Ks": 0.302}
    cols = {"ra": ra, "dec": dec, "z_helio": z_cmb, "z_helio_err": np.full(n, 3e-5),
            "ebv": ebv, "ebv_err": 0.1 * ebv}
    # discs: Tully-Fisher
    logw_i = np.clip(rng.normal(2.45, 0.18, n), 2.0, 2.9)
    abs_i = -21.39 - 8.81 * (logw_i - 2.5) + rng.normal(0.0, 0.35, n)
    cos_i = rng.uniform(np.cos(np.radians(85.0)), np.cos(np.radians(20.0)), n)
    q0 = 0.2
    axis_ratio = np.sqrt(cos_i**2 * (1 - q0**2) + q0**2)
    w_r = 10**logw_i * np.sqrt(1 - cos_i**2)
    w50 = (w_r + 9.0) * (1 + z_cmb)
    # early types: SBF
    color0 = rng.uniform(1.02, 1.28, n)
    abs_sbf = -1.74 + 4.5 * (color0 - 1.15) + rng.normal(0.0, 0.05, n)
    abs_broad_i = np.where(is_disc, abs_i, rng.normal(-21.5, 0.8, n))
    abs_mag = {"V": abs_broad_i + np.where(is_disc, 0.9, color0), "I": abs_broad_i,
               "Ks": abs_broad_i - np.where(is_disc, 2.0, 2.3)}
    for b in bands:
        m = abs_mag.get(b, abs_broad_i) + mu_true + r_band.get(b, 1.0) * ebv
        err = rng.uniform(0.02, 0.06, n)
        cols[f"mag_{b}"] = m + rng.normal(0.0, 1.0, n) * err
        cols[f"mag_{b}_err"] = err
    cols["w50"] = np.where(is_disc, w50 + rng.normal(0.0, 6.0, n), np.nan)
    cols["w50_err"] = np.where(is_disc, 6.0, np.nan)
    cols["axis_ratio"] = np.where(is_disc, np.clip(axis_ratio + rng.normal(0.0, 0.02, n), 0.05, 1.0), np.nan)
    cols["axis_ratio_err"] = np.where(is_disc, 0.02, np.nan)
    cols["hi_flux"] = np.where(is_disc, 10 ** rng.normal(0.5, 0.3, n), np.nan)
    err_sbf = rng.uniform(0.04, 0.1, n)
    sbf_mag = abs_sbf + mu_true + r_band["I"] * ebv + rng.normal(0.0, 1.0, n) * err_sbf
    cols["sbf_mag"] = np.where(is_disc, np.nan, sbf_mag)
    cols["sbf_mag_err"] = np.where(is_disc, np.nan, err_sbf)
    cols["sbf_color"] = np.where(is_disc, np.nan, color0 + (r_band["V"] - r_band["I"]) * ebv
                                 + rng.normal(0.0, 0.02, n))
    cols["sbf_color_err"] = np.where(is_disc, np.nan, 0.02)
    return cols


def _sprinkle_bad_rows(rng, cols, settings):
    """Corrupt a few rows with each kind of bad value the ingest flags."""
    n = len(cols["ra"])
    n_bad = max(1, int(settings.bad_fraction * n / 12))
    band = next(iter(settings.bands))
    kinds = [
        ("ra", np.nan), ("dec", 95.0), ("z_helio", -0.01), ("z_helio", 1.5), ("z_helio_err", -1e-4),
        (f"mag_{band}", np.inf), (f"mag_{band}_err", -0.1), ("w50", -50.0), ("w50", 0.0),
        ("axis_ratio", 1.3), ("axis_ratio_err", np.nan), ("sbf_mag", np.nan), ("sbf_color", 9.0),
        ("sbf_mag_err", -0.2), ("ebv", -0.05),
    ]
    idx = rng.permutation(n)
    k = 0
    for name, value in kinds:
        rows = idx[k:k + n_bad]
        k += n_bad
        cols[name][rows] = value


def write(table: pa.Table, path: str | Path) -> None:
    write_parquet(table, path, compression="zstd")
