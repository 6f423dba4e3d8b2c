"""The demo survey's Fundamental-Plane galaxies: generated forward, recovered by galdist.fp.

A closure test, not a check against published numbers: the demo's observables,
inverted by the real FP chain (galdist.fp.fp_distance), must give back the true
distance modulus the demo put in. The plane and its 3-D Gaussian are the shipped
calibration files' (Magoulas et al. 2012, MNRAS 427, 245, J band; Bernardi et al.
2003, AJ 125, 1866, r band; both "from memory" in their files).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from galdist import demo, fp, stages
from galdist.calibration import load_calibration
from galdist.methods import FUNDAMENTAL_PLANE

N = 4000


def _config(**fp_section):
    conf = demo.settings_from_config().config
    if fp_section.get("band") == "r":
        conf = dict(conf, bands=dict(conf["bands"], r={"filter": "sdss2010-r", "system": "AB",
                                                       "ab_minus_vega": None}))
    return dict(conf, fp=dict(conf["fp"], **fp_section))


def _round_trip(conf, noise, seed=3):
    rng = np.random.default_rng(seed)
    z = rng.uniform(0.005, 0.05, N)
    mu = stages.mu_grid(conf["redshift"]).mu(z)
    a_gal, k_corr = rng.uniform(0.0, 0.1, N), rng.uniform(-0.05, 0.05, N)
    cols, truth = demo._fundamental_plane(rng, N, conf, z, mu, a_gal, k_corr, noise=noise)
    cal = load_calibration(conf["fp"]["calibration"])
    settings = dataclasses.replace(FUNDAMENTAL_PLANE.settings_for(conf, cal), mc_draws=0)
    # the redshift stage's view of a galaxy without peculiar velocity: z_cmb = z_helio = z
    out = fp.fp_distance(dict(cols, z_helio=z, z_cmb=z, mu_z=mu, a_gal=a_gal, k_corr=k_corr), cal, settings)
    return cols, truth, out, mu


@pytest.mark.parametrize("section", [{}, {"calibration": "fp_r_bernardi_2003", "band": "r"},
                                     {"apply_aperture_correction": False, "apply_dimming": False}])
def test_exact_observables_give_back_the_true_distance(section):
    """Without measurement errors the chain inverts exactly: galdist.fp finds the true
    s, i and (at the true distance) r, so fp_mu misses the true mu by exactly the galaxy's
    offset from the plane, -5 (r - r_pred); whether the plane has a 3-D Gaussian (J) or
    not (r, AB magnitudes onto the calibration's system), whatever steps are switched off."""
    cols, truth, out, mu = _round_trip(_config(**section), noise=False)
    ok = np.isfinite(out["fp_mu"])
    assert ok.mean() > 0.99  # the in-plane cut keeps nearly all inside the calibrated ranges
    for got, want in (("fp_log_sigma_0", "s"), ("fp_log_ie", "i"), ("fp_log_re_z", "r")):
        np.testing.assert_allclose(out[got], truth[want], rtol=0, atol=1e-9, err_msg=got)
    offset = truth["r"] - out["fp_log_re_pred"]
    np.testing.assert_allclose(out["fp_mu"][ok] - mu[ok], -5.0 * offset[ok], rtol=0, atol=1e-9)
    assert np.all(cols["fp_aperture_arcsec"] == demo.FP_APERTURE_ARCSEC)


def test_measured_observables_scatter_about_the_truth_by_the_quoted_errors():
    """With measurement errors: mean fp_mu - mu consistent with zero (3 sigma of the mean),
    and its spread as fp_mu_err says (within 5 per cent; the error includes the
    calibration's coefficient errors, which one plane does not redraw, so it may exceed)."""
    _, _, out, mu = _round_trip(_config(), noise=True, seed=4)
    ok = np.isfinite(out["fp_mu"])
    d = out["fp_mu"][ok] - mu[ok]
    assert abs(d.mean()) < 3 * d.std() / np.sqrt(ok.sum())
    rms_err = np.sqrt(np.mean(out["fp_mu_err"][ok] ** 2))
    assert 0.88 * rms_err < d.std() < 1.05 * rms_err


def test_galaxies_follow_the_calibrations_gaussian():
    """The true (r, s, i) of the J-band plane: offsets from the plane with the calibration's
    scatter in r (sigma_1 sqrt(1 + a^2 + b^2) = 0.107 dex, the file's derived value), centred
    on it, uncorrelated with the in-plane position; the in-plane cut keeps the ranges."""
    cal = load_calibration("fp_j_magoulas_2012")
    terms = fp.check_calibration(cal)
    r, s, i = demo._plane_sample(np.random.default_rng(5), 20000, cal, terms)
    offset = r - fp.plane_log_radius(cal, terms, s, i)
    assert offset.std() == pytest.approx(cal.scatter, rel=0.03)
    assert abs(offset.mean()) < 3 * cal.scatter / np.sqrt(offset.size)
    v1, v2, v3 = fp.plane_axes(*cal.coefficients[:2])
    x = np.stack([r, s, i], axis=-1)
    for axis in (v2, v3):
        assert abs(np.corrcoef(offset, x @ axis)[0, 1]) < 0.03
    lo, hi = cal.valid_range
    inside = (s >= lo) & (s <= hi) & (i >= terms.log_ie_range[0]) & (i <= terms.log_ie_range[1])
    assert inside.mean() > 0.99


def test_demo_catalog_has_fp_inputs_for_early_types_only():
    table = demo.make_catalog(300, seed=7)
    cls = np.array(table.column("galaxy_class").to_pylist())
    sigma = table.column("fp_sigma").to_numpy(zero_copy_only=False)
    assert set(demo.FP_COLUMNS) <= set(table.column_names)
    assert not np.any(sigma[cls == "disc"] > 0)  # NaN, or a bad value sprinkled on purpose
    early = sigma[cls == "early-type"]
    assert np.isfinite(early).mean() > 0.9  # all but the few rows made bad on purpose
