"""Tests of galdist.ebv_maps: ICRS -> Galactic, HEALPix and ZEA-pair look-ups.

Maps are synthetic: an analytic sky function written to temporary FITS files with
proper headers (HEALPix FITS convention, Gorski et al. 2005, ApJ 622, 759; FITS WCS,
Calabretta & Greisen 2002, A&A 395, 1077). Interpolated look-ups are checked
against the function's curvature bound for linear interpolation,
|f - I f| <= h^2/8 max|f''| per interpolated direction (common practice: the
standard error bound of linear interpolation).
"""

from __future__ import annotations

import astropy.units as u
import numpy as np
import pytest
from astropy.coordinates import ICRS, Galactic
from astropy.io import fits
from astropy.wcs import WCS
from astropy_healpix import HEALPix

from galdist.ebv_maps import (HEALPIX_UNSEEN, HealpixMap, ZeaPair, galactic_coordinates,
                              icrs_coordinates)

# ---------------------------------------------------------------- analytic sky
# f = A0 + C . n + D cos^3 b cos 3l, n the unit vector; smooth on the whole sphere
# (the last term is Re((x + i y)^3)), so poles and the l = 0/360 seam are regular.
A0 = 0.30
C = np.array([0.05, -0.04, 0.08])
D = 0.03
# chart second-derivative bounds (derived from the formula above):
#   |f_ll| <= |C_xy| cos b + 9 |D| cos^3 b,   |f_bb| <= |C| + 9 |D|
C_XY = float(np.hypot(C[0], C[1]))
M_BB = float(np.linalg.norm(C) + 9 * abs(D))


def sky(l_deg, b_deg):
    l, b = np.broadcast_arrays(np.radians(l_deg), np.radians(b_deg))
    n = np.stack([np.cos(b) * np.cos(l), np.cos(b) * np.sin(l), np.sin(b)])
    return A0 + np.tensordot(C, n, axes=1) + D * np.cos(b) ** 3 * np.cos(3 * l)


def m_ll(cosb):
    return C_XY * cosb + 9 * abs(D) * cosb ** 3


def random_sky(n, seed):
    rng = np.random.default_rng(seed)
    return rng.uniform(0, 360, n), np.degrees(np.arcsin(rng.uniform(-1, 1, n)))


# ------------------------------------------------------------ coordinate frames
def test_galactic_pole_and_centre():
    # ICRS position of the north Galactic pole, alpha = 192.85948 deg, delta = +27.12825 deg,
    # and of the Galactic centre, alpha = 266.40499 deg, delta = -28.93617 deg
    # (Hipparcos catalogue 1997, ESA SP-1200, Vol. 1, Sect. 1.5.3; from memory)
    l, b = galactic_coordinates([192.85948, 266.40499], [27.12825, -28.93617])
    assert b[0] == pytest.approx(90.0, abs=1e-4)
    assert b[1] == pytest.approx(0.0, abs=1e-4)
    assert min(l[1], 360 - l[1]) == pytest.approx(0.0, abs=1e-4)


def test_galactic_coordinates_vectorised_nan_and_roundtrip():
    ra, dec = random_sky(1000, 1)
    ra[3], dec[7] = np.nan, np.inf
    l, b = galactic_coordinates(ra, dec)
    assert l.shape == ra.shape
    assert np.isnan(l[3]) and np.isnan(b[3]) and np.isnan(l[7])
    ok = np.isfinite(l)
    assert np.all((l[ok] >= 0) & (l[ok] < 360)) and np.all(np.abs(b[ok]) <= 90)
    ra2, dec2 = icrs_coordinates(l, b)
    d_ra = (ra2[ok] - ra[ok] + 180) % 360 - 180
    assert np.max(np.abs(d_ra * np.cos(np.radians(dec[ok])))) < 1e-8
    assert np.max(np.abs(dec2[ok] - dec[ok])) < 1e-8


# --------------------------------------------------------------------- HEALPix
NSIDE = 32


def write_healpix(path, values, order="RING", coordsys="G", extra=None, explicit_pixels=None):
    cols = []
    if explicit_pixels is not None:
        cols.append(fits.Column(name="PIXEL", format="K", array=explicit_pixels))
    cols.append(fits.Column(name="EBV", format="D", array=values))
    cols.append(fits.Column(name="OTHER", format="D", array=np.full(values.size, 7.0)))
    hdu = fits.BinTableHDU.from_columns(cols)
    hdu.header["PIXTYPE"] = "HEALPIX"
    if order is not None:
        hdu.header["ORDERING"] = order
    hdu.header["NSIDE"] = NSIDE
    if coordsys is not None:
        hdu.header["COORDSYS"] = coordsys
    hdu.header["INDXSCHM"] = "EXPLICIT" if explicit_pixels is not None else "IMPLICIT"
    for k, v in (extra or {}).items():
        hdu.header[k] = v
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path)
    return path


def healpix_sky(order="ring"):
    hp = HEALPix(nside=NSIDE, order=order)
    lon, lat = hp.healpix_to_lonlat(np.arange(hp.npix))
    return lon.deg, lat.deg, sky(lon.deg, lat.deg)


@pytest.fixture(scope="module")
def hp_ring(tmp_path_factory):
    l, b, v = healpix_sky("ring")
    path = write_healpix(tmp_path_factory.mktemp("hp") / "ring.fits", v)
    return HealpixMap.from_fits(path), l, b, v


def ring_geometry(nside):
    """Latitude (deg) and pixel count of HEALPix rings 1..4nside-1 (Gorski et al. 2005,
    ApJ 622, 759, Sect. 4: polar caps z = 1 - i^2/(3 nside^2), 4i pixels; equatorial
    belt z = 4/3 - 2i/(3 nside), 4 nside pixels)."""
    i = np.arange(1, 4 * nside)
    j = np.minimum(i, 4 * nside - i)
    z = np.where(j < nside, 1 - j ** 2 / (3.0 * nside ** 2), 4.0 / 3 - 2.0 * j / (3.0 * nside))
    z = np.where(i > 2 * nside, -z, z)
    npix = np.where(j < nside, 4 * j, 4 * nside)
    return np.degrees(np.arcsin(z)), npix


def healpix_bilinear_bound(b_deg):
    """Curvature bound of the HEALPix ring-bilinear scheme at latitude b: linear in l along
    each enclosing ring (spacing 360/npix), then linear in b between the rings; above the
    outermost ring the pole value is the mean of the 4 polar pixels (deviation from
    f(pole) at most |C_z| (1 - z_1); the D term and C_xy cancel by symmetry)."""
    lat, npix = ring_geometry(NSIDE)
    b = np.asarray(b_deg)
    k = np.searchsorted(-lat, -b)  # rings k-1 (above) and k (below)
    bound = np.empty(b.shape)
    for n_, kk in enumerate(k):
        if kk == 0 or kk == lat.size:  # polar cap beyond the outermost ring
            r = 0 if kk == 0 else lat.size - 1
            dl = np.radians(360.0 / npix[r])
            db = np.radians(90.0 - abs(lat[r]))
            z1 = np.sin(np.radians(abs(lat[r])))
            ring_err = max(dl ** 2 / 8 * m_ll(np.cos(np.radians(lat[r]))), abs(C[2]) * (1 - z1))
        else:
            rings = [kk - 1, kk]
            dl = np.radians(360.0 / npix[rings].min())
            db = np.radians(lat[kk - 1] - lat[kk])
            cosb = np.cos(np.radians(np.min(np.abs(lat[rings])))) if lat[kk - 1] * lat[kk] > 0 else 1.0
            ring_err = dl ** 2 / 8 * m_ll(cosb)
        bound[n_] = ring_err + db ** 2 / 8 * M_BB
    return bound


@pytest.mark.parametrize("order", ["RING", "NESTED"])
def test_healpix_pixel_centres_exact(tmp_path, order):
    l, b, v = healpix_sky(order.lower())
    m = HealpixMap.from_fits(write_healpix(tmp_path / "m.fits", v, order=order))
    assert m.nside == NSIDE and m.order == order.lower() and m.frame == "galactic"
    got, outside = m.lookup(l, b, "nearest")
    assert np.array_equal(got, v) and not outside.any()
    got, outside = m.lookup(l, b, "bilinear")
    assert np.max(np.abs(got - v)) < 1e-12 and not outside.any()


def test_healpix_bilinear_within_curvature_bound(hp_ring):
    m = hp_ring[0]
    l, b = random_sky(4000, 2)
    # add the polar caps above the outermost rings and the seam explicitly
    l = np.concatenate([l, np.linspace(0, 360, 50, endpoint=False), np.full(50, 0.0), np.full(50, 359.99)])
    b = np.concatenate([b, np.full(50, 89.5), np.linspace(-89, 89, 50), np.linspace(-89, 89, 50)])
    got, outside = m.lookup(l, b, "bilinear")
    err = np.abs(got - sky(l, b))
    bound = healpix_bilinear_bound(b)
    assert not outside.any()
    assert np.all(err <= bound), np.max(err / bound)
    # the bound is tight enough to tell interpolation from nearest-pixel look-up
    near, _ = m.lookup(l, b, "nearest")
    assert np.mean(np.abs(near - sky(l, b)) > bound) > 0.5


def test_healpix_poles_and_seam(hp_ring):
    m, lc, bc, v = hp_ring
    for pole in (90.0, -90.0):
        lon = np.linspace(0, 360, 13)
        near, _ = m.lookup(lon, np.full(lon.size, pole), "nearest")
        polar = v[np.abs(bc - pole) == np.min(np.abs(bc - pole))]  # the 4 pixels round the pole
        assert polar.size == 4 and np.all(np.isin(near, polar))
        bil, _ = m.lookup(lon, np.full(lon.size, pole), "bilinear")
        assert np.ptp(bil) < 1e-12  # one value at the pole, whatever l
        assert abs(bil[0] - sky(0.0, pole)) <= healpix_bilinear_bound(np.array([pole]))[0]
    b = np.linspace(-80, 80, 17)
    for interp in ("nearest", "bilinear"):
        at0, _ = m.lookup(np.zeros_like(b), b, interp)
        at360, _ = m.lookup(np.full_like(b, 360.0), b, interp)
        assert np.array_equal(at0, at360)
    lo, _ = m.lookup(np.full_like(b, 359.999999), b, "bilinear")
    hi, _ = m.lookup(np.full_like(b, 1e-6), b, "bilinear")
    assert np.max(np.abs(lo - hi)) < 1e-6


def test_healpix_equatorial_map(tmp_path):
    # a COORDSYS = 'C' map holds the same sky sampled at ICRS pixel centres
    hp = HEALPix(nside=NSIDE, order="ring")
    ra, dec = (a.deg for a in hp.healpix_to_lonlat(np.arange(hp.npix)))
    gal = ICRS(ra=ra * u.deg, dec=dec * u.deg).transform_to(Galactic())
    v = sky(gal.l.deg, gal.b.deg)
    m = HealpixMap.from_fits(write_healpix(tmp_path / "c.fits", v, coordsys="C"))
    assert m.frame == "icrs"
    got, _ = m.lookup(gal.l.deg, gal.b.deg, "nearest")  # Galactic input, converted inside
    assert np.array_equal(got, v)
    got, _ = m.lookup_icrs(ra, dec, "nearest")
    assert np.array_equal(got, v)
    # a Galactic map looked up by ICRS position converts the other way
    lg, bg, vg = healpix_sky()
    mg = HealpixMap.from_fits(write_healpix(tmp_path / "g.fits", vg))
    ra_g, dec_g = icrs_coordinates(lg, bg)
    assert np.array_equal(mg.lookup_icrs(ra_g, dec_g)[0], vg)


def test_healpix_partial_sky_and_blank(tmp_path):
    l, b, v = healpix_sky()
    v = v.copy()
    v[b < -30] = HEALPIX_UNSEEN
    v[(b > 40) & (b < 50)] = np.nan
    m = HealpixMap.from_fits(write_healpix(tmp_path / "p.fits", v))
    lq = np.array([10.0, 10.0, 10.0, 200.0, np.nan])
    bq = np.array([-60.0, 45.0, 0.0, -29.0, 0.0])
    for interp in ("nearest", "bilinear"):
        got, outside = m.lookup(lq, bq, interp)
        assert outside.tolist() == [True, True, False, False, False]
        assert np.isnan(got[[0, 1, 4]]).all() and np.isfinite(got[[2, 3]]).all()
    # next to the blank region bilinear falls back to the nearest valid pixel
    edge = (b > -30) & (b < -28)
    got, outside = m.lookup(l[edge], b[edge] - 0.3, "bilinear")
    assert not outside.any() and np.isfinite(got).all()


def test_healpix_explicit_scheme_and_column(tmp_path):
    l, b, v = healpix_sky()
    keep = np.flatnonzero(b > 0)
    m = HealpixMap.from_fits(write_healpix(tmp_path / "e.fits", v[keep], explicit_pixels=keep),
                             column="EBV")
    got, outside = m.lookup(l, b, "nearest")
    assert np.array_equal(got[keep], v[keep]) and outside.sum() == v.size - keep.size
    other = HealpixMap.from_fits(write_healpix(tmp_path / "o.fits", v), column="OTHER")
    assert np.all(other.lookup([10.0], [20.0])[0] == 7.0)


def test_healpix_header_problems(tmp_path):
    v = healpix_sky()[2]
    with pytest.raises(ValueError, match="ORDERING"):
        HealpixMap.from_fits(write_healpix(tmp_path / "a.fits", v, order=None))
    with pytest.raises(ValueError, match="COORDSYS"):
        HealpixMap.from_fits(write_healpix(tmp_path / "b.fits", v, coordsys="E"))
    with pytest.raises(ValueError, match="COORDSYS"):
        HealpixMap.from_fits(write_healpix(tmp_path / "c.fits", v, coordsys=None))
    with pytest.raises(ValueError, match="map_column"):
        HealpixMap.from_fits(write_healpix(tmp_path / "d.fits", v), column="NOPE")
    with pytest.raises(ValueError, match="interpolation"):
        HealpixMap.from_fits(write_healpix(tmp_path / "e.fits", v)).lookup([0.0], [0.0], "cubic")


# ------------------------------------------------------------------- ZEA pair
N_ZEA = 256
# half-width of a ZEA hemisphere image: R(b=0) = (180/pi) 2 sin 45 deg (Calabretta & Greisen
# 2002, eq. 69), as in the 4096^2 images of Schlegel, Finkbeiner & Davis 1998 (common practice)
SCALE = np.degrees(2 * np.sin(np.radians(45.0))) / (N_ZEA / 2)


def zea_wcs(which):
    w = WCS(naxis=2)
    w.wcs.ctype = ["GLON-ZEA", "GLAT-ZEA"]
    w.wcs.crpix = [N_ZEA / 2 + 0.5, N_ZEA / 2 + 0.5]
    if which == "north":
        w.wcs.crval, w.wcs.cdelt = [0.0, 90.0], [-SCALE, SCALE]
    else:
        w.wcs.crval, w.wcs.cdelt = [0.0, -90.0], [SCALE, -SCALE]
    return w


def zea_image(which, func=sky):
    w = zea_wcs(which)
    y, x = np.mgrid[0:N_ZEA, 0:N_ZEA]
    l, b = w.wcs_pix2world(x.astype(float), y.astype(float), 0)
    return func(l, b), l, b


def write_zea(path, img, which, nsgp=True):
    header = zea_wcs(which).to_header()
    if nsgp:
        header["LAM_NSGP"] = 1 if which == "north" else -1
    fits.PrimaryHDU(data=img, header=header).writeto(path)
    return path


@pytest.fixture(scope="module")
def zea(tmp_path_factory):
    d = tmp_path_factory.mktemp("zea")
    parts = {w: zea_image(w) for w in ("north", "south")}
    pair = ZeaPair.from_fits(write_zea(d / "n.fits", parts["north"][0], "north"),
                             write_zea(d / "s.fits", parts["south"][0], "south"))
    return pair, parts


def zea_bound(which, l, b):
    """Local curvature bound of bilinear interpolation at (l, b) in one hemisphere image:
    h^2/8 (max|f_xx| + max|f_yy|), the maxima taken from second differences of the
    analytic image (each equals h^2 f'' at an intermediate point) over the 4x4 pixels
    round the cell; 1.25 covers the variation of f'' inside a cell."""
    img = zea_image(which)[0]
    dxx = np.pad(np.abs(img[:, 2:] - 2 * img[:, 1:-1] + img[:, :-2]), ((0, 0), (1, 1)), mode="edge")
    dyy = np.pad(np.abs(img[2:, :] - 2 * img[1:-1, :] + img[:-2, :]), ((1, 1), (0, 0)), mode="edge")
    x, y = zea_wcs(which).wcs_world2pix(np.asarray(l, float), np.asarray(b, float), 0)
    x0, y0 = np.floor(x).astype(int), np.floor(y).astype(int)
    mxx = np.zeros(x.shape)
    myy = np.zeros(x.shape)
    for dy in (-1, 0, 1, 2):
        for dx in (-1, 0, 1, 2):
            iy = np.clip(y0 + dy, 0, N_ZEA - 1)
            ix = np.clip(x0 + dx, 0, N_ZEA - 1)
            mxx = np.maximum(mxx, dxx[iy, ix])
            myy = np.maximum(myy, dyy[iy, ix])
    return 1.25 * (mxx + myy) / 8


def zea_bounds(l, b):
    l, b = np.asarray(l, float), np.asarray(b, float)
    out = np.empty(l.shape)
    north = b >= 0
    out[north] = zea_bound("north", l[north], b[north])
    out[~north] = zea_bound("south", l[~north], b[~north])
    return out


def test_zea_pixel_centres_exact(zea):
    pair, parts = zea
    for which, sign in (("north", 1), ("south", -1)):
        img, l, b = parts[which]
        sel = np.isfinite(b) & (sign * b > 0)
        if which == "north":
            sel |= np.isfinite(b) & (b == 0)
        got, outside = pair.lookup(l[sel], b[sel], "nearest")
        assert np.array_equal(got, img[sel]) and not outside.any()
        got, _ = pair.lookup(l[sel], b[sel], "bilinear")
        assert np.max(np.abs(got - img[sel])) < 1e-9


def test_zea_bilinear_within_curvature_bound(zea):
    pair, parts = zea
    l, b = random_sky(20000, 3)
    # away from the outer half pixel where the equator touches the image edge
    keep = np.abs(b) > 2
    l, b = l[keep], b[keep]
    got, outside = pair.lookup(l, b, "bilinear")
    err = np.abs(got - sky(l, b))
    bound = zea_bounds(l, b)
    assert not outside.any()
    assert np.all(err <= bound), np.max(err / bound)
    near, _ = pair.lookup(l, b, "nearest")
    assert np.mean(np.abs(near - sky(l, b)) > bound) > 0.5


def test_zea_poles_seam_and_equator(zea):
    pair, parts = zea
    lon = np.linspace(0, 360, 13)
    for pole in (90.0, -90.0):
        for interp in ("nearest", "bilinear"):
            got, outside = pair.lookup(lon, np.full(lon.size, pole), interp)
            assert not outside.any() and np.ptp(got) < 1e-9  # one value at the pole
        assert abs(got[0] - sky(0.0, pole)) <= zea_bounds([0.0], [pole])[0]
    b = np.linspace(-85, 85, 18)
    for interp in ("nearest", "bilinear"):
        at0, _ = pair.lookup(np.zeros_like(b), b, interp)
        at360, _ = pair.lookup(np.full_like(b, 360.0), b, interp)
        assert np.array_equal(at0, at360)
    lo, _ = pair.lookup(np.full_like(b, 359.999999), b, "bilinear")
    hi, _ = pair.lookup(np.full_like(b, 1e-6), b, "bilinear")
    assert np.max(np.abs(lo - hi)) < 1e-6
    # equator: b = 0 reads the north image, b < 0 the south; both stay close to f, to
    # within one pixel times the gradient bound |C| + 3|D| (the edge pixels are clamped)
    le = np.linspace(0, 360, 73)
    north, o1 = pair.lookup(le, np.zeros_like(le), "bilinear")
    south, o2 = pair.lookup(le, np.full_like(le, -1e-9), "bilinear")
    grad_bound = (np.linalg.norm(C) + 3 * abs(D)) * np.radians(SCALE)
    assert not (o1.any() or o2.any())
    assert np.max(np.abs(north - sky(le, 0.0))) <= grad_bound
    assert np.max(np.abs(south - sky(le, 0.0))) <= grad_bound


def test_zea_hemisphere_choice_and_outside(tmp_path):
    n = write_zea(tmp_path / "n.fits", np.ones((N_ZEA, N_ZEA)), "north")
    s = write_zea(tmp_path / "s.fits", np.full((N_ZEA, N_ZEA), 2.0), "south")
    pair = ZeaPair.from_fits(n, s)
    got, _ = pair.lookup([5.0, 5.0, 5.0], [0.0, -1e-12, 30.0])
    assert got.tolist() == [1.0, 2.0, 1.0]
    # swapped files are refused (LAM_NSGP, or the pole test when the keyword is absent)
    with pytest.raises(ValueError, match="LAM_NSGP"):
        ZeaPair.from_fits(s, n)
    n2 = write_zea(tmp_path / "n2.fits", np.ones((N_ZEA, N_ZEA)), "north", nsgp=False)
    s2 = write_zea(tmp_path / "s2.fits", np.ones((N_ZEA, N_ZEA)), "south", nsgp=False)
    with pytest.raises(ValueError, match="pole"):
        ZeaPair.from_fits(s2, n2)
    # blank pixels and positions off a cropped image are outside; a NaN position is not
    img = np.ones((N_ZEA, N_ZEA))
    img[:, N_ZEA // 2:] = np.nan  # the half holding l = 90 deg
    pair = ZeaPair.from_fits(write_zea(tmp_path / "n3.fits", img, "north"), s)
    got, outside = pair.lookup([90.0, 270.0, np.nan], [30.0, 30.0, 10.0], "bilinear")
    assert outside.tolist() == [True, False, False] and np.isnan(got[[0, 2]]).all() and got[1] == 1.0
    w = zea_wcs("north")
    w.wcs.crpix = [32.5, 32.5]
    small = fits.PrimaryHDU(data=np.ones((64, 64)), header=w.to_header())
    small.writeto(tmp_path / "n4.fits")
    pair = ZeaPair.from_fits(tmp_path / "n4.fits", s)
    got, outside = pair.lookup([0.0, 0.0], [80.0, 10.0])
    assert outside.tolist() == [False, True] and got[0] == 1.0
