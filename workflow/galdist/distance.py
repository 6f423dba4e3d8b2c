"""Distance modulus, distance, luminosity and the homogeneous Malmquist correction.

mu = 5 log10(d / 10 pc); d in Mpc throughout galdist.
"""

from __future__ import annotations

import numpy as np

LN10_OVER_5 = np.log(10.0) / 5.0


def mu_from_mpc(d_mpc):
    """Distance modulus of a luminosity distance in Mpc: 5 log10(d / 10 pc)."""
    return 5.0 * np.log10(np.asarray(d_mpc, dtype=float)) + 25.0


def mpc_from_mu(mu):
    """Luminosity distance in Mpc of a distance modulus."""
    return 10.0 ** (0.2 * (np.asarray(mu, dtype=float) - 25.0))


def mpc_err_from_mu(d_mpc, mu_err):
    """First-order distance error: sigma_d = d ln(10)/5 sigma_mu."""
    return np.asarray(d_mpc, dtype=float) * LN10_OVER_5 * np.asarray(mu_err, dtype=float)


def malmquist_factor(mu_err, kind: str = "mean"):
    """Homogeneous Malmquist bias factor on distance.

    exp(3.5 Delta^2) for the mean, exp(3 Delta^2) for the median, with
    Delta = (ln 10 / 5) sigma_mu (Lynden-Bell et al. 1988, ApJ 326, 19; from
    memory). Multiply an inferred distance by it.
    """
    delta = LN10_OVER_5 * np.asarray(mu_err, dtype=float)
    coeff = {"mean": 3.5, "median": 3.0}[kind]
    return np.exp(coeff * delta**2)


def finish(prefix: str, mu, mu_err, mu_err_sys, mu_err_mc, method_flags, malmquist: bool = False,
           malmquist_kind: str = "mean") -> dict:
    """The columns every distance method ends with, ``<prefix>_``: mu, mu_err (random:
    measurement and intrinsic scatter), mu_err_sys (systematic: the calibration's
    coefficients with their covariance and its zero point, common to every galaxy),
    mu_err_mc (Monte Carlo of the random part), d_mpc and d_err_mpc (first order, random
    part), malmquist_applied, flags.

    With ``malmquist``, d and its error are multiplied by ``malmquist_factor`` of the
    random error where both mu and it are finite (the bias comes from the scatter of
    galaxies about the relation, not from a shift common to all); mu is never corrected.
    """
    mu, mu_err = np.asarray(mu, dtype=float), np.asarray(mu_err, dtype=float)
    d = mpc_from_mu(mu)
    d_err = mpc_err_from_mu(d, mu_err)
    applied = np.isfinite(d) & np.isfinite(mu_err) & bool(malmquist)
    if malmquist:
        factor = np.where(applied, malmquist_factor(mu_err, malmquist_kind), 1.0)
        d, d_err = d * factor, d_err * factor
    mu_err_sys = np.where(np.isfinite(mu), np.broadcast_to(np.asarray(mu_err_sys, dtype=float), mu.shape), np.nan)
    return {f"{prefix}_mu": mu, f"{prefix}_mu_err": mu_err, f"{prefix}_mu_err_sys": mu_err_sys,
            f"{prefix}_mu_err_mc": mu_err_mc, f"{prefix}_d_mpc": d, f"{prefix}_d_err_mpc": d_err,
            f"{prefix}_malmquist_applied": applied, f"{prefix}_flags": method_flags}


# IAU 2015 Resolution B2: zero point of the absolute bolometric magnitude scale.
IAU_L0_WATT = 3.0128e28
# IAU 2015 Resolution B3: nominal solar luminosity.
IAU_LSUN_WATT = 3.828e26
PARSEC_M = 3.0856775814913673e16


def absolute_magnitude_from_luminosity(luminosity, zero_point=IAU_L0_WATT):
    """M = -2.5 log10(L / L0); with the IAU 2015 B2 L0 this is M_bol for L in W."""
    return -2.5 * np.log10(np.asarray(luminosity, dtype=float) / zero_point)


def luminosity_from_absolute_magnitude(abs_mag, zero_point=IAU_L0_WATT):
    """Inverse of ``absolute_magnitude_from_luminosity``."""
    return zero_point * 10.0 ** (-0.4 * np.asarray(abs_mag, dtype=float))


def flux_from_luminosity(luminosity, d_mpc):
    """Inverse-square flux (W m^-2) of a luminosity (W) at a distance in Mpc."""
    d_m = np.asarray(d_mpc, dtype=float) * 1e6 * PARSEC_M
    return np.asarray(luminosity, dtype=float) / (4.0 * np.pi * d_m**2)


def solar_luminosities(abs_mag, abs_mag_sun):
    """L / L_sun in a band from absolute magnitudes: 10^(-0.4 (M - M_sun))."""
    return 10.0 ** (-0.4 * (np.asarray(abs_mag, dtype=float) - abs_mag_sun))
