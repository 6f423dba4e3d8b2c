"""Redshift distances: heliocentric to CMB frame, then mu(z) in a chosen cosmology.

* Frame: (1 + z_cmb) = (1 + z_helio)(1 + (v_sun/c) cos theta), theta the angle
  between the galaxy and the solar apex, the multiplicative composition of
  redshifts (Davis & Scrimgeour 2014, MNRAS 442, 1117, their Eq. 1 form).
  Default dipole: v_sun = 369.82 km/s towards (l, b) = (264.021, 48.253) deg,
  Planck 2018 results I, A&A 641, A1, Table 2 (secondary copy).
* Cosmology: ``astropy.cosmology`` (a named realisation, or flat LCDM with H0,
  Om0; the default H0 = 70, Om0 = 0.3 is a convention, not a measurement).
* mu_z = 5 log10(d_L / 10 pc) of z_cmb through ``MuGrid``: astropy's distmod
  tabulated once on a log-spaced grid and interpolated (<= 1e-4 mag of the exact
  value, shown in tests/test_redshift.py); the same grid inverts d_L -> z.

All distances are luminosity distances in Mpc, so that mu = 5 log10(d) + 25
holds for redshift and method distances alike.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import flags as _flags
from .distance import mpc_from_mu
from .io import atomic_path, reading_grid
from .uncertainty import quadrature

# exact by the SI definition of the metre; a literal, so that the jobs that only read a
# mu(z) grid need not import astropy (tests/test_redshift.py checks it against astropy.constants)
C_KMS = 299_792.458

# CMB dipole, Planck 2018 results I (A&A 641, A1, Table 2), secondary copy.
V_SUN_KMS = 369.82
APEX_L_DEG = 264.021
APEX_B_DEG = 48.253

DEFAULT_H0 = 70.0
DEFAULT_OM0 = 0.3


# --------------------------------------------------------------------------- cosmology

def make_cosmology(name: str | None = None, H0: float = DEFAULT_H0, Om0: float = DEFAULT_OM0):
    """An astropy cosmology: the realisation ``name`` (e.g. 'Planck18') or, when
    ``name`` is None, ``FlatLambdaCDM(H0, Om0)`` (no radiation, Tcmb0 = 0).

    Raises ValueError naming the config key (redshift.cosmology.name / .H0 / .Om0)
    and what is allowed.
    """
    # imported here: astropy.cosmology takes ~1 s to import, and only the job that
    # builds the mu(z) grid needs it
    from astropy.cosmology import FlatLambdaCDM, realizations

    allowed = tuple(realizations.available)
    if name is not None:
        if name not in allowed:
            raise ValueError(f"redshift.cosmology.name: unknown cosmology {name!r}; "
                             f"allowed: {', '.join(allowed)} (or omit it and give H0, Om0)")
        return getattr(realizations, name)
    try:
        H0 = float(H0)
        Om0 = float(Om0)
    except (TypeError, ValueError):
        raise ValueError("redshift.cosmology.H0 and .Om0 must be numbers") from None
    if not (np.isfinite(H0) and 0.0 < H0 < 1000.0):
        raise ValueError(f"redshift.cosmology.H0 must be in (0, 1000) km/s/Mpc, got {H0}")
    if not (np.isfinite(Om0) and 0.0 <= Om0 <= 1.0):
        raise ValueError(f"redshift.cosmology.Om0 must be in [0, 1], got {Om0}")
    return FlatLambdaCDM(H0=H0, Om0=Om0)


def describe_cosmology(cosmology) -> dict:
    """JSON-ready description (class, name, H0, Om0, Ode0, Tcmb0) for provenance."""
    from astropy import units as _u

    return {
        "class": type(cosmology).__name__,
        "name": cosmology.name,
        "H0": float(cosmology.H0.to_value(_u.km / _u.s / _u.Mpc)),
        "Om0": float(cosmology.Om0),
        "Ode0": float(cosmology.Ode0),
        "Tcmb0": float(cosmology.Tcmb0.to_value(_u.K)),
    }


def deceleration_jerk(cosmology, step: float = 1e-3) -> tuple[float, float]:
    """Present deceleration q0 and jerk j0 of any astropy FLRW cosmology.

    With x = ln(1 + z) and E = H/H0: q = dlnE/dx - 1 and
    j = q (2q + 1) + dq/dx (Visser 2004, Class. Quantum Grav. 21, 2603, from
    memory; the definitions follow from q = -a a''/a'^2, j = a''' a^2/a'^3).
    Central differences of ``cosmology.efunc`` about z = 0. For flat LCDM
    without radiation q0 = 3 Om0/2 - 1 = Om0/2 - OL0 and j0 = 1.
    """
    x = np.array([-2.0, -1.0, 0.0, 1.0, 2.0]) * step
    lnE = np.log(np.asarray(cosmology.efunc(np.expm1(x)), dtype=float))
    d1 = (-lnE[4] + 8 * lnE[3] - 8 * lnE[1] + lnE[0]) / (12 * step)
    d2 = (-lnE[4] + 16 * lnE[3] - 30 * lnE[2] + 16 * lnE[1] - lnE[0]) / (12 * step**2)
    q0 = d1 - 1.0
    j0 = q0 * (2.0 * q0 + 1.0) + d2
    return float(q0), float(j0)


# --------------------------------------------------------------------------- mu(z) grid

@dataclass(frozen=True)
class MuGrid:
    """mu(z) of one cosmology, tabulated on a log-spaced redshift grid.

    ``mu`` interpolates delta(ln z) = mu - (5/ln 10) ln z linearly in ln z; delta
    is smooth and tends to 5 log10(c/H0) + 25 as z -> 0, so the error of linear
    interpolation is tiny (<< 1e-4 mag with the default 4000 nodes up to
    z = 1.2). Below the first node delta follows the second-order Hubble law
    d_L = (c z / H0)(1 + (1 - q0) z / 2); beyond ``z_max`` mu is NaN.

    ``z_from_mu`` inverts by interpolating ln z against mu on the same nodes
    (mu is monotonic in z), with the Hubble law below the grid.
    """

    z: np.ndarray
    mu_values: np.ndarray
    dmu_dlnz: np.ndarray
    h0: float
    q0: float
    j0: float
    cosmology: dict = field(default_factory=dict)

    # ---- construction and storage
    @classmethod
    def build(cls, cosmology, z_max: float = 1.2, n: int = 4000, z_min: float = 1e-5) -> "MuGrid":
        """Tabulate astropy's exact ``cosmology.distmod`` on n log-spaced nodes."""
        if not (np.isfinite(z_max) and z_max > z_min > 0):
            raise ValueError(f"redshift.grid_z_max must exceed {z_min}, got {z_max}")
        if int(n) < 100:
            raise ValueError(f"redshift.grid_n must be >= 100, got {n}")
        from astropy import units as _u

        z = np.geomspace(z_min, z_max, int(n))
        mu = np.asarray(cosmology.distmod(z).to_value(_u.mag), dtype=float)
        dmu_dlnz = np.gradient(mu, np.log(z), edge_order=2)
        q0, j0 = deceleration_jerk(cosmology)
        return cls(z=z, mu_values=mu, dmu_dlnz=dmu_dlnz,
                   h0=float(cosmology.H0.to_value(_u.km / _u.s / _u.Mpc)),
                   q0=q0, j0=j0, cosmology=describe_cosmology(cosmology))

    def save(self, path: str | Path) -> None:
        """Write the grid as a small .npz (no pickles)."""
        meta = dict(self.cosmology, h0=self.h0, q0=self.q0, j0=self.j0)
        with atomic_path(path) as tmp, open(tmp, "wb") as fh:
            np.savez(fh, z=self.z, mu=self.mu_values, dmu_dlnz=self.dmu_dlnz,
                     meta=np.array(json.dumps(meta, sort_keys=True)))

    @classmethod
    def load(cls, path: str | Path) -> "MuGrid":
        """Read a grid written by ``save``."""
        with reading_grid(path), np.load(path, allow_pickle=False) as data:
            meta = json.loads(str(data["meta"]))
            h0, q0, j0 = meta.pop("h0"), meta.pop("q0"), meta.pop("j0")
            return cls(z=data["z"].copy(), mu_values=data["mu"].copy(),
                       dmu_dlnz=data["dmu_dlnz"].copy(), h0=float(h0), q0=float(q0),
                       j0=float(j0), cosmology=meta)

    # ---- evaluation
    @property
    def z_max(self) -> float:
        return float(self.z[-1])

    def _lnz(self, z):
        z = np.asarray(z, dtype=float)
        ok = np.isfinite(z) & (z > 0) & (z <= self.z[-1])
        with np.errstate(divide="ignore", invalid="ignore"):
            lnz = np.where(ok, np.log(np.where(ok, z, 1.0)), np.nan)
        return lnz, ok

    def mu(self, z) -> np.ndarray:
        """Distance modulus of redshift z (NaN for z <= 0, z > z_max or NaN)."""
        lnz, ok = self._lnz(z)
        k = 5.0 / np.log(10.0)
        delta = self.mu_values - k * np.log(self.z)
        out = k * lnz + np.interp(np.where(ok, lnz, 0.0), np.log(self.z), delta)
        # below the first node: d_L = (c z / H0)(1 + (1 - q0) z / 2 + O(z^2))
        a = 0.5 * (1.0 - self.q0)
        zz = np.where(ok, np.asarray(z, dtype=float), self.z[0])
        below = zz < self.z[0]
        out = out + np.where(below, k * (np.log1p(a * zz) - np.log1p(a * self.z[0])), 0.0)
        return np.where(ok, out, np.nan)

    def dmu_dz(self, z) -> np.ndarray:
        """Derivative d mu / d z (mag per unit z), from the tabulated d mu / d ln z."""
        lnz, ok = self._lnz(z)
        lnz_grid = np.log(self.z)
        # below the grid the Hubble law holds: d mu / d ln z -> 5 / ln 10
        slope = np.interp(np.where(ok, lnz, 0.0), lnz_grid, self.dmu_dlnz,
                          left=5.0 / np.log(10.0))
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(ok, slope / np.asarray(z, dtype=float), np.nan)

    def d_l(self, z) -> np.ndarray:
        """Luminosity distance in Mpc."""
        return mpc_from_mu(self.mu(z))

    def z_from_mu(self, mu) -> np.ndarray:
        """Cosmological redshift whose distance modulus is ``mu`` (inverse of ``mu``).

        NaN beyond the grid's last node or for non-finite mu.
        """
        mu = np.asarray(mu, dtype=float)
        lnz_grid = np.log(self.z)
        inside = np.isfinite(mu) & (mu <= self.mu_values[-1])
        below = inside & (mu < self.mu_values[0])
        m = np.where(inside, mu, self.mu_values[0])
        lnz = np.interp(m, self.mu_values, lnz_grid)
        # Hubble law below the grid: ln z = ln z0 + (mu - mu0) ln10 / 5
        lnz = np.where(below, lnz_grid[0] + (m - self.mu_values[0]) * np.log(10.0) / 5.0, lnz)
        return np.where(inside, np.exp(lnz), np.nan)

    def z_from_d_l(self, d_mpc) -> np.ndarray:
        """Cosmological redshift of a luminosity distance in Mpc."""
        d = np.asarray(d_mpc, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            mu = np.where(d > 0, 5.0 * np.log10(np.where(d > 0, d, 1.0)) + 25.0, np.nan)
        return self.z_from_mu(mu)


# --------------------------------------------------------------------------- frames

def cos_angle_to_apex(l_deg, b_deg, apex_l: float = APEX_L_DEG, apex_b: float = APEX_B_DEG):
    """cos theta between (l, b) and the apex (spherical law of cosines)."""
    l = np.radians(np.asarray(l_deg, dtype=float))
    b = np.radians(np.asarray(b_deg, dtype=float))
    la, ba = np.radians(apex_l), np.radians(apex_b)
    return np.sin(b) * np.sin(ba) + np.cos(b) * np.cos(ba) * np.cos(l - la)


def cmb_redshift(z_helio, l_deg, b_deg, z_helio_err=None, v_sun: float = V_SUN_KMS,
                 apex_l: float = APEX_L_DEG, apex_b: float = APEX_B_DEG):
    """CMB-frame redshift and its error.

    (1 + z_cmb) = (1 + z_helio)(1 + (v_sun/c) cos theta) (composition of
    redshifts, Davis & Scrimgeour 2014, MNRAS 442, 1117); dipole defaults from
    Planck 2018 results I, A&A 641, A1, Table 2. The error is
    |1 + (v_sun/c) cos theta| sigma_z_helio; the dipole's own uncertainty
    (0.11 km/s, i.e. 4e-7 in z) is neglected. A NaN error gives a zero term.
    """
    z = np.asarray(z_helio, dtype=float)
    factor = 1.0 + (float(v_sun) / C_KMS) * cos_angle_to_apex(l_deg, b_deg, apex_l, apex_b)
    z_cmb = (1.0 + z) * factor - 1.0
    err = np.zeros_like(z_cmb) if z_helio_err is None else np.asarray(z_helio_err, dtype=float)
    z_cmb_err = np.abs(factor) * np.nan_to_num(err, nan=0.0)
    return z_cmb, np.where(np.isfinite(z_cmb), z_cmb_err, np.nan)


def mu_z_error(grid: MuGrid, z_cmb, z_cmb_err, sigma_v: float = 250.0) -> np.ndarray:
    """Error of mu_z: (d mu/d z) sqrt(sigma_z^2 + ((1 + z) sigma_v / c)^2).

    The velocity term treats a random peculiar velocity sigma_v (non-linear
    flow) as a redshift shift (1 + z) sigma_v / c, from (1 + z_obs) =
    (1 + z_cos)(1 + v/c) (Davis & Scrimgeour 2014, MNRAS 442, 1117); sigma_v =
    250 km/s is common practice.
    """
    z = np.asarray(z_cmb, dtype=float)
    sig_z = quadrature(z_cmb_err, (1.0 + z) * float(sigma_v) / C_KMS)
    return np.abs(grid.dmu_dz(z)) * sig_z


def redshift_distances(gal_l, gal_b, z_helio, z_helio_err, grid: MuGrid, *,
                       v_sun: float = V_SUN_KMS, apex_l: float = APEX_L_DEG,
                       apex_b: float = APEX_B_DEG, sigma_v: float = 250.0,
                       min_cz: float = 3000.0) -> dict[str, np.ndarray]:
    """The redshift stage's columns for one shard, from Galactic coordinates (ingest's
    gal_l, gal_b, deg) and heliocentric redshifts.

    Returns z_cmb, z_cmb_err, mu_z, mu_z_err, d_z_mpc (luminosity distance of
    z_cmb, Mpc) and z_flags (``flags.Redshift``): NO_REDSHIFT where z_helio or the
    position is invalid, or z_cmb lies beyond the grid's z_max; LOCAL_FLOW where
    c z_cmb < ``min_cz`` (km/s). Where z_cmb <= 0 (blueshifted nearby galaxies) mu_z
    is NaN and only LOCAL_FLOW is set.
    """
    z_helio = np.asarray(z_helio, dtype=float)
    n = z_helio.shape[0]
    l, b = np.asarray(gal_l, dtype=float), np.asarray(gal_b, dtype=float)
    z_cmb, z_cmb_err = cmb_redshift(z_helio, l, b, z_helio_err, v_sun, apex_l, apex_b)
    mu_z = grid.mu(z_cmb)
    mu_z_err = np.where(np.isfinite(mu_z), mu_z_error(grid, z_cmb, z_cmb_err, sigma_v), np.nan)
    zf = _flags.new(n)
    no_z = ~np.isfinite(z_cmb)
    _flags.set_where(zf, no_z | (~np.isfinite(mu_z) & (z_cmb > 0)), _flags.Redshift.NO_REDSHIFT)
    _flags.set_where(zf, ~no_z & (C_KMS * np.nan_to_num(z_cmb, nan=np.inf) < float(min_cz)),
                     _flags.Redshift.LOCAL_FLOW)
    return {
        "z_cmb": z_cmb, "z_cmb_err": z_cmb_err,
        "mu_z": mu_z, "mu_z_err": mu_z_err, "d_z_mpc": mpc_from_mu(mu_z), "z_flags": zf,
    }
