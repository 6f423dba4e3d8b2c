"""Distance modulus, distance and the homogeneous Malmquist correction.

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
