"""Tests of galdist.redshift (and the distance helpers the redshift stage relies on)."""

from __future__ import annotations

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import SkyCoord
from astropy.cosmology import FlatLambdaCDM, Planck18, z_at_value

from galdist import distance
from galdist.flags import Redshift, has
from galdist.ebv_maps import galactic_coordinates
from galdist.redshift import (
    APEX_B_DEG, APEX_L_DEG, C_KMS, V_SUN_KMS, MuGrid, cmb_redshift, deceleration_jerk,
    make_cosmology, mu_z_error, redshift_distances,
)


@pytest.fixture(scope="module")
def grid():
    return MuGrid.build(make_cosmology())


# ---------------------------------------------------------------- distance helpers

def test_mu_of_10_mpc_is_30_exactly():
    # mu = 5 log10(d / 10 pc): 10 Mpc = 10^6 x 10 pc -> 30 mag (definition; common practice)
    assert distance.mu_from_mpc(10.0) == 30.0
    assert distance.mpc_from_mu(30.0) == pytest.approx(10.0, rel=1e-15)


def test_iau_2015_bolometric_zero_point_and_sun():
    # IAU 2015 Resolution B3: nominal solar luminosity 3.828e26 W; Resolution B2:
    # L0 = 3.0128e28 W for M_bol = 0, hence M_bol,sun = 4.74 (secondary copy)
    m_sun = distance.absolute_magnitude_from_luminosity(3.828e26, zero_point=3.0128e28)
    assert m_sun == pytest.approx(4.74, abs=5e-4)
    assert distance.luminosity_from_absolute_magnitude(m_sun) == pytest.approx(3.828e26, rel=1e-12)


def test_iau_2015_inverse_square_flux_at_10_pc():
    # IAU 2015 Resolution B2: m_bol = 0 <-> f0 = 2.518021002e-8 W m^-2, which is
    # L0 / (4 pi (10 pc)^2) with the IAU 2012 B2 au (from memory)
    f0 = 2.518021002e-8
    ten_pc_in_mpc = 1e-5
    assert distance.flux_from_luminosity(3.0128e28, ten_pc_in_mpc) == pytest.approx(f0, rel=1e-9)
    # so the nominal Sun (IAU 2015 B3) seen from 10 pc has m_bol = M_bol,sun = 4.74 (secondary copy)
    f_sun = distance.flux_from_luminosity(3.828e26, ten_pc_in_mpc)
    assert -2.5 * np.log10(f_sun / f0) == pytest.approx(4.74, abs=5e-4)


# ---------------------------------------------------------------- cosmology

def test_make_cosmology_default_named_and_errors():
    c = make_cosmology()
    assert isinstance(c, FlatLambdaCDM)
    assert c.H0.value == 70.0 and c.Om0 == 0.3  # the convention
    assert make_cosmology("Planck18") is Planck18
    with pytest.raises(ValueError, match="redshift.cosmology.name.*Planck18"):
        make_cosmology("Planck99")
    with pytest.raises(ValueError, match="H0"):
        make_cosmology(H0=-5)
    with pytest.raises(ValueError, match="Om0"):
        make_cosmology(Om0=1.5)


def test_deceleration_and_jerk():
    # flat LCDM: q0 = Om0/2 - OL0 = -0.55 and j0 = 1 for Om0 = 0.3 (reference-values.md,
    # Watkins & Feldman 2015 context, secondary copy; follows from the Friedmann equation)
    q0, j0 = deceleration_jerk(make_cosmology(H0=70, Om0=0.3))
    assert q0 == pytest.approx(-0.55, abs=1e-8)
    assert j0 == pytest.approx(1.0, abs=1e-6)
    # Einstein-de Sitter: q0 = 1/2, j0 = 1 (common practice)
    q0, j0 = deceleration_jerk(FlatLambdaCDM(H0=70, Om0=1.0))
    assert q0 == pytest.approx(0.5, abs=1e-8)
    assert j0 == pytest.approx(1.0, abs=1e-6)


# ---------------------------------------------------------------- mu grid

@pytest.mark.parametrize("cosmology", [make_cosmology(), Planck18], ids=["flat70_03", "Planck18"])
def test_grid_matches_astropy_distmod(cosmology):
    # the requirement: within 1e-4 mag of astropy's exact distmod
    g = MuGrid.build(cosmology, z_max=1.2)
    rng = np.random.default_rng(7)
    z = np.exp(rng.uniform(np.log(1e-4), np.log(g.z_max), 20000))
    exact = cosmology.distmod(z).to_value(u.mag)
    assert np.max(np.abs(g.mu(z) - exact)) <= 1e-4


def test_grid_inverse_matches_z_at_value(grid):
    cosmology = make_cosmology()
    d = np.array([3.0, 45.0, 150.0, 620.0, 3000.0])  # Mpc
    z_grid = grid.z_from_d_l(d)
    z_exact = np.array([z_at_value(cosmology.luminosity_distance, x * u.Mpc, zmax=1.5).value
                        for x in d])
    # 1e-6 in z is 0.3 km/s in c z, far below any peculiar-velocity error
    assert np.max(np.abs(z_grid - z_exact)) < 1e-6


def test_grid_derivative_matches_finite_difference(grid):
    cosmology = make_cosmology()
    z = np.array([0.002, 0.01, 0.05, 0.3, 1.0])
    h = 1e-6 * z
    fd = (cosmology.distmod(z + h).value - cosmology.distmod(z - h).value) / (2 * h)
    assert grid.dmu_dz(z) == pytest.approx(fd, rel=1e-4)


def test_grid_edges_and_roundtrip(grid, tmp_path):
    assert np.all(np.isnan(grid.mu(np.array([0.0, -0.01, np.nan, 1.3]))))
    assert np.all(np.isnan(grid.z_from_mu(np.array([np.nan, 60.0]))))
    # below the first node the Hubble law holds (d_L -> c z / H0)
    z = 1e-7
    assert grid.mu(z) == pytest.approx(distance.mu_from_mpc(C_KMS * z / 70.0), abs=1e-5)
    assert grid.z_from_mu(grid.mu(z)) == pytest.approx(z, rel=1e-6)
    path = tmp_path / "mu_grid.npz"
    grid.save(path)
    back = MuGrid.load(path)
    assert np.array_equal(back.mu_values, grid.mu_values)
    assert (back.h0, back.q0, back.j0) == (grid.h0, grid.q0, grid.j0)
    assert back.cosmology == grid.cosmology


# ---------------------------------------------------------------- frames

def test_galactic_coordinates_of_pole_and_centre():
    # North Galactic Pole ICRS (192.85948, +27.12825) and Galactic centre
    # (266.40499, -28.93617): Hipparcos catalogue, ESA 1997, Vol. 1, Sect. 1.5.3 (from memory)
    l, b = galactic_coordinates(np.array([192.85948, 266.40499, np.nan, 10.0]),
                                np.array([27.12825, -28.93617, 5.0, 95.0]))
    assert b[0] == pytest.approx(90.0, abs=1e-4)
    assert min(l[1], 360.0 - l[1]) < 1e-4 and abs(b[1]) < 1e-4
    assert np.isnan(l[2:]).all() and np.isnan(b[2:]).all()


def test_solar_apex_shift():
    # Planck 2018 results I (A&A 641, A1, Table 2; secondary copy): 369.82 km/s
    # towards (l, b) = (264.021, 48.253). A galaxy at the apex: z_cmb - z_helio = (1 + z_helio) v/c.
    assert (V_SUN_KMS, APEX_L_DEG, APEX_B_DEG) == (369.82, 264.021, 48.253)
    zh = np.array([0.0, 0.01, 0.1, 0.5])
    beta = 369.82 / 299792.458  # c exact by the SI definition
    z_cmb, _ = cmb_redshift(zh, np.full(4, 264.021), np.full(4, 48.253))
    assert z_cmb - zh == pytest.approx((1 + zh) * beta, rel=1e-12, abs=1e-15)
    # anti-apex: the opposite shift; 90 deg from the apex: none
    z_anti, _ = cmb_redshift(zh, np.full(4, 264.021 - 180.0), np.full(4, -48.253))
    assert z_anti - zh == pytest.approx(-(1 + zh) * beta, rel=1e-12, abs=1e-15)
    z_perp, _ = cmb_redshift(zh, np.full(4, 264.021), np.full(4, 48.253 - 90.0))
    assert z_perp - zh == pytest.approx(np.zeros(4), abs=1e-15)


def test_cmb_redshift_error_and_configurable_dipole():
    zh, err = np.array([0.02]), np.array([1e-4])
    _, e = cmb_redshift(zh, [264.021], [48.253], err)
    assert e[0] == pytest.approx(1e-4 * (1 + 369.82 / 299792.458), rel=1e-12)  # d z_cmb / d z_helio
    # Fixsen et al. 1996 (ApJ 473, 576) direction with a user velocity: apex gets exactly v/c
    z, _ = cmb_redshift(np.array([0.0]), [264.14], [48.26], v_sun=371.0, apex_l=264.14, apex_b=48.26)
    assert z[0] == pytest.approx(371.0 / 299792.458, rel=1e-12)


# ---------------------------------------------------------------- the stage

def test_redshift_distances_columns_and_flags(grid):
    apex = SkyCoord(l=264.021 * u.deg, b=48.253 * u.deg, frame="galactic").icrs
    ra = np.array([apex.ra.deg, 150.0, np.nan, 150.0, 150.0, 150.0, 150.0])
    dec = np.array([apex.dec.deg, 20.0, 20.0, 20.0, 20.0, 20.0, 20.0])
    zh = np.array([0.03, np.nan, 0.03, 0.005, -0.01, 1.0, 0.05])
    zerr = np.array([1e-4, 1e-4, 1e-4, 1e-4, 1e-4, 1e-4, np.nan])
    small = MuGrid.build(make_cosmology(), z_max=0.5, n=500)
    out = redshift_distances(*galactic_coordinates(ra, dec), zh, zerr, small, sigma_v=250.0, min_cz=3000.0)
    assert set(out) == {"z_cmb", "z_cmb_err", "mu_z", "mu_z_err", "d_z_mpc", "z_flags"}
    assert all(len(v) == len(zh) for v in out.values())
    assert out["z_flags"].dtype == np.uint32
    zf = out["z_flags"]
    no_z, local = has(zf, Redshift.NO_REDSHIFT), has(zf, Redshift.LOCAL_FLOW)
    assert list(no_z) == [False, True, True, False, False, True, False]     # NaN z, NaN ra, beyond grid
    assert list(local) == [False, False, False, True, True, False, False]   # cz < 3000, blueshift
    assert np.isnan(out["mu_z"][[1, 2, 4, 5]]).all()
    assert np.isfinite(out["mu_z"][[0, 3, 6]]).all()
    # the galaxy at the apex (Planck 2018 dipole, secondary copy)
    assert out["z_cmb"][0] - 0.03 == pytest.approx(1.03 * 369.82 / 299792.458, rel=1e-7)
    # d_z is astropy's luminosity distance of z_cmb
    exact = make_cosmology().luminosity_distance(out["z_cmb"][[0, 6]]).to_value(u.Mpc)
    assert out["d_z_mpc"][[0, 6]] == pytest.approx(exact, rel=1e-5)
    # a missing z error leaves the velocity term only (quality flag action text)
    z6 = out["z_cmb"][6]
    assert out["mu_z_err"][6] == pytest.approx(small.dmu_dz(z6) * (1 + z6) * 250.0 / C_KMS, rel=1e-12)


def test_mu_z_error_terms_against_astropy(grid):
    cosmology = make_cosmology()
    z = np.array([0.01, 0.03, 0.1])
    h = 1e-6
    slope = (cosmology.distmod(z + h).value - cosmology.distmod(z - h).value) / (2 * h)
    # measurement term only
    e1 = mu_z_error(grid, z, np.full(3, 2e-4), sigma_v=0.0)
    assert e1 == pytest.approx(slope * 2e-4, rel=1e-4)
    # velocity term only: (1 + z) sigma_v / c in redshift (Davis & Scrimgeour 2014, MNRAS 442, 1117)
    e2 = mu_z_error(grid, z, np.zeros(3), sigma_v=250.0)
    assert e2 == pytest.approx(slope * (1 + z) * 250.0 / 299792.458, rel=1e-4)
    # at c z = 3000 km/s, 250 km/s is ~0.18 mag, (5/ln10)(250/3000) to first order (common practice)
    assert mu_z_error(grid, np.array([0.01]), np.zeros(1), 250.0)[0] == pytest.approx(0.18, abs=0.01)


def test_empty_shard(grid):
    out = redshift_distances(np.zeros(0), np.zeros(0), np.zeros(0), np.zeros(0), grid)
    assert all(len(v) == 0 for v in out.values())


def test_speed_of_light_is_astropys():
    # C_KMS is a literal (no astropy import in the jobs that only read grids); it must be
    # CODATA's exact c = 299 792 458 m/s, as astropy.constants gives it
    from astropy import constants, units

    assert C_KMS == constants.c.to_value(units.km / units.s)
