"""E(B-V) look-ups in local reddening maps, and ICRS -> Galactic coordinates.

Two map layouts are read (no downloads; the files must be local):

* an all-sky HEALPix map in a FITS binary table following the HEALPix FITS
  convention (Gorski et al. 2005, ApJ 622, 759; header keywords ``ORDERING``
  RING/NESTED, ``NSIDE``, ``COORDSYS``, ``INDXSCHM`` IMPLICIT/EXPLICIT), looked
  up with astropy-healpix, nearest pixel or its bilinear scheme (linear in
  longitude along the two enclosing iso-latitude rings, then linear in latitude);
* a pair of polar zenithal-equal-area (ZEA) images of the north and south
  Galactic hemispheres with FITS WCS headers (Calabretta & Greisen 2002, A&A 395,
  1077), the layout of the reddening map of Schlegel, Finkbeiner & Davis 1998,
  ApJ 500, 525 (4096^2 pixels per cap, ``LAM_NSGP`` = +1 north / -1 south).
  Positions with b >= 0 use the north image, b < 0 the south image.

Every look-up returns ``(values, outside)`` with the length of its input:
``values`` is float64 E(B-V) on the map's own scale (NaN where none), and
``outside`` is True where the position falls off the map, on a blank pixel
(NaN, or the HEALPix ``UNSEEN`` value -1.6375e30 / the header's ``BAD_DATA``) or,
for bilinear look-ups, where neither the interpolated nor the nearest pixel is
valid. Non-finite positions give NaN with ``outside`` False (that is a missing
position, not a map problem). Bilinear look-ups next to a blank pixel fall back
to the nearest pixel when that one is valid.
"""

from __future__ import annotations

from pathlib import Path

import astropy.units as u
import numpy as np
from astropy.coordinates import ICRS, Galactic
from astropy.io import fits
from astropy.wcs import WCS
from astropy_healpix import HEALPix, npix_to_nside

__all__ = ["HEALPIX_UNSEEN", "INTERPOLATIONS", "galactic_coordinates", "icrs_coordinates",
           "HealpixMap", "ZeaPair"]

#: HEALPix convention for a blank pixel (Gorski et al. 2005; the HEALPix FITS convention).
HEALPIX_UNSEEN = -1.6375e30
INTERPOLATIONS = ("nearest", "bilinear")

# HEALPix COORDSYS values (HEALPix FITS convention) -> astropy frame
_COORDSYS = {"G": "galactic", "GALACTIC": "galactic",
             "C": "icrs", "Q": "icrs", "EQ": "icrs", "EQUATORIAL": "icrs", "CELESTIAL": "icrs"}


def _as_float(x) -> np.ndarray:
    return np.atleast_1d(np.asarray(x, dtype=float))


def galactic_coordinates(ra_deg, dec_deg) -> tuple[np.ndarray, np.ndarray]:
    """ICRS (ra, dec) in degrees -> Galactic (l, b) in degrees, vectorised (astropy).

    l is in [0, 360); non-finite inputs give NaN.
    """
    ra, dec = np.broadcast_arrays(_as_float(ra_deg), _as_float(dec_deg))
    good = np.isfinite(ra) & np.isfinite(dec) & (np.abs(dec) <= 90.0)
    l = np.full(ra.shape, np.nan)
    b = np.full(ra.shape, np.nan)
    if good.any():
        gal = ICRS(ra=ra[good] * u.deg, dec=dec[good] * u.deg).transform_to(Galactic())
        l[good] = gal.l.wrap_at(360 * u.deg).deg
        b[good] = gal.b.deg
    return l, b


def icrs_coordinates(l_deg, b_deg) -> tuple[np.ndarray, np.ndarray]:
    """Galactic (l, b) in degrees -> ICRS (ra, dec) in degrees, vectorised (astropy)."""
    l, b = np.broadcast_arrays(_as_float(l_deg), _as_float(b_deg))
    good = np.isfinite(l) & np.isfinite(b) & (np.abs(b) <= 90.0)
    ra = np.full(l.shape, np.nan)
    dec = np.full(l.shape, np.nan)
    if good.any():
        eq = Galactic(l=l[good] * u.deg, b=b[good] * u.deg).transform_to(ICRS())
        ra[good] = eq.ra.wrap_at(360 * u.deg).deg
        dec[good] = eq.dec.deg
    return ra, dec


def _check_interpolation(interpolation: str) -> None:
    if interpolation not in INTERPOLATIONS:
        raise ValueError(f"extinction.interpolation: '{interpolation}' is not allowed; "
                         f"use one of {', '.join(INTERPOLATIONS)}")


def _native_float(column) -> np.ndarray:
    arr = np.asarray(column)
    if arr.dtype.kind == "f":
        return arr.astype(arr.dtype.newbyteorder("="), copy=True)
    return arr.astype(np.float64)


class HealpixMap:
    """An all-sky (or partial) HEALPix map held in memory.

    ``values`` has 12 * nside**2 entries in ``order`` ('ring' or 'nested'); blank
    pixels are NaN. ``frame`` is 'galactic' or 'icrs' (the map's COORDSYS).
    """

    def __init__(self, values: np.ndarray, order: str = "ring", frame: str = "galactic",
                 name: str = "healpix map"):
        values = np.asarray(values)
        if values.ndim != 1:
            raise ValueError(f"{name}: HEALPix values must be one-dimensional")
        try:
            nside = int(npix_to_nside(values.size))
        except ValueError as exc:
            raise ValueError(f"{name}: {values.size} values is not 12*NSIDE**2 for any NSIDE") from exc
        order = order.lower()
        if order == "nest":
            order = "nested"
        if order not in ("ring", "nested"):
            raise ValueError(f"{name}: ORDERING '{order}' is not allowed; use RING or NESTED")
        if frame not in ("galactic", "icrs"):
            raise ValueError(f"{name}: frame '{frame}' is not allowed; use galactic or icrs")
        self.values = values
        self.nside = nside
        self.order = order
        self.frame = frame
        self.name = name
        self._hp = HEALPix(nside=nside, order=order)

    @classmethod
    def from_fits(cls, path: str | Path, column: str | None = None, hdu: int | str | None = None,
                  coordsys: str | None = None) -> "HealpixMap":
        """Read a HEALPix FITS binary table (ORDERING, NSIDE, COORDSYS from its header).

        ``column``: the map column (default: the first column that is not PIXEL).
        ``coordsys``: overrides or supplies COORDSYS ('G' Galactic, 'C'/'Q' equatorial,
        taken as ICRS). Partial-sky maps use INDXSCHM = 'EXPLICIT' with a PIXEL column,
        or blank pixels (UNSEEN, BAD_DATA or NaN).
        """
        path = Path(path)
        if not path.exists():
            raise ValueError(f"extinction.map_file: {path} does not exist")
        with fits.open(path, memmap=True) as hdul:
            if hdu is None:
                tables = [h for h in hdul if isinstance(h, fits.BinTableHDU)]
                if not tables:
                    raise ValueError(f"{path}: no binary table HDU (HEALPix maps are stored as BINTABLE)")
                table = tables[0]
            else:
                table = hdul[hdu]
                if not isinstance(table, fits.BinTableHDU):
                    raise ValueError(f"{path}: HDU {hdu} is not a binary table")
            header = table.header
            names = list(table.columns.names)
            if column is None:
                candidates = [n for n in names if n.upper() != "PIXEL"]
                if not candidates:
                    raise ValueError(f"{path}: no map column (found {names})")
                column = candidates[0]
            elif column not in names:
                raise ValueError(f"extinction.map_column: '{column}' not in {path} (columns: {', '.join(names)})")

            ordering = str(header.get("ORDERING", "")).strip().upper()
            if ordering not in ("RING", "NESTED", "NEST"):
                raise ValueError(f"{path}: header ORDERING must be RING or NESTED, found '{ordering or 'none'}'")
            csys = coordsys if coordsys is not None else header.get("COORDSYS")
            if csys is None:
                raise ValueError(f"{path}: no COORDSYS in the header; set extinction.map_coordsys "
                                 "to G (Galactic) or C (equatorial)")
            frame = _COORDSYS.get(str(csys).strip().upper())
            if frame is None:
                raise ValueError(f"{path}: COORDSYS '{csys}' is not supported; use G (Galactic) "
                                 "or C/Q (equatorial, read as ICRS)")
            data = _native_float(table.data[column]).ravel()
            scheme = str(header.get("INDXSCHM", "IMPLICIT")).strip().upper()
            nside_hdr = header.get("NSIDE")
            if scheme == "EXPLICIT":
                if "PIXEL" not in [n.upper() for n in names]:
                    raise ValueError(f"{path}: INDXSCHM = EXPLICIT needs a PIXEL column")
                if nside_hdr is None:
                    raise ValueError(f"{path}: INDXSCHM = EXPLICIT needs NSIDE in the header")
                pcol = names[[n.upper() for n in names].index("PIXEL")]
                pix = np.asarray(table.data[pcol]).astype(np.int64).ravel()
                full = np.full(12 * int(nside_hdr) ** 2, np.nan, dtype=data.dtype)
                if pix.size != data.size or pix.min(initial=0) < 0 or pix.max(initial=0) >= full.size:
                    raise ValueError(f"{path}: PIXEL column does not match NSIDE = {nside_hdr}")
                full[pix] = data
                data = full
            elif scheme != "IMPLICIT":
                raise ValueError(f"{path}: INDXSCHM '{scheme}' is not allowed; use IMPLICIT or EXPLICIT")
            if nside_hdr is not None and data.size != 12 * int(nside_hdr) ** 2:
                raise ValueError(f"{path}: column '{column}' has {data.size} values, "
                                 f"but NSIDE = {nside_hdr} needs {12 * int(nside_hdr) ** 2}")
            bad = ~np.isfinite(data) | np.isclose(data, HEALPIX_UNSEEN, rtol=1e-5, atol=0.0)
            bad_value = header.get("BAD_DATA")
            if bad_value is not None:
                bad |= np.isclose(data, float(bad_value), rtol=1e-6, atol=0.0)
            data[bad] = np.nan
        return cls(data, order="nested" if ordering.startswith("NEST") else "ring", frame=frame,
                   name=str(path))

    def lookup(self, l_deg, b_deg, interpolation: str = "nearest") -> tuple[np.ndarray, np.ndarray]:
        """E(B-V) at Galactic (l, b) in degrees -> (values, outside)."""
        _check_interpolation(interpolation)
        if self.frame == "galactic":
            lon, lat = np.broadcast_arrays(_as_float(l_deg), _as_float(b_deg))
        else:
            lon, lat = icrs_coordinates(l_deg, b_deg)
        return self._lookup_native(lon, lat, interpolation)

    def lookup_icrs(self, ra_deg, dec_deg, interpolation: str = "nearest") -> tuple[np.ndarray, np.ndarray]:
        """E(B-V) at ICRS (ra, dec) in degrees -> (values, outside); one transform at most."""
        _check_interpolation(interpolation)
        if self.frame == "icrs":
            lon, lat = np.broadcast_arrays(_as_float(ra_deg), _as_float(dec_deg))
        else:
            lon, lat = galactic_coordinates(ra_deg, dec_deg)
        return self._lookup_native(lon, lat, interpolation)

    def lookup_at(self, ra_deg, dec_deg, l_deg, b_deg, interpolation: str = "nearest"):
        """E(B-V) at a position given in both frames (as ingest gives it) -> (values,
        outside); the map's own frame is used, so no coordinates are transformed."""
        _check_interpolation(interpolation)
        lon, lat = (l_deg, b_deg) if self.frame == "galactic" else (ra_deg, dec_deg)
        return self._lookup_native(*np.broadcast_arrays(_as_float(lon), _as_float(lat)), interpolation)

    def _lookup_native(self, lon, lat, interpolation):
        lon = np.asarray(lon, dtype=float)
        lat = np.asarray(lat, dtype=float)
        values = np.full(lon.shape, np.nan)
        outside = np.zeros(lon.shape, dtype=bool)
        good = np.isfinite(lon) & np.isfinite(lat) & (np.abs(lat) <= 90.0)
        if not good.any():
            return values, outside
        glon = np.mod(lon[good], 360.0) * u.deg
        glat = lat[good] * u.deg
        nearest = self.values[self._hp.lonlat_to_healpix(glon, glat)].astype(np.float64)
        if interpolation == "nearest":
            v = nearest
        else:
            idx, w = self._hp.bilinear_interpolation_weights(glon, glat)
            v = np.sum(w * self.values[idx], axis=0, dtype=np.float64)
            fallback = ~np.isfinite(v)
            v[fallback] = nearest[fallback]
        values[good] = v
        outside[good] = ~np.isfinite(v)
        return values, outside


def _zea_wcs(header: fits.Header, path: Path, which: str) -> WCS:
    ctype1 = str(header.get("CTYPE1", "")).upper()
    ctype2 = str(header.get("CTYPE2", "")).upper()
    if not (ctype1.startswith("GLON") and ctype2.startswith("GLAT")):
        raise ValueError(f"{path}: CTYPE1/CTYPE2 must be Galactic (GLON-ZEA/GLAT-ZEA), "
                         f"found '{ctype1}'/'{ctype2}'")
    nsgp = header.get("LAM_NSGP")
    want = 1 if which == "north" else -1
    if nsgp is not None and int(nsgp) != want:
        raise ValueError(f"{path}: LAM_NSGP = {nsgp} marks the other hemisphere; "
                         f"the {which} image needs LAM_NSGP = {want}")
    return WCS(header, naxis=2)


class ZeaPair:
    """North and south Galactic-cap images with FITS WCS (the 1998-map layout)."""

    def __init__(self, north: np.ndarray, north_wcs: WCS, south: np.ndarray, south_wcs: WCS,
                 name: str = "zea pair"):
        self.images = {}
        for which, img, wcs in (("north", north, north_wcs), ("south", south, south_wcs)):
            img = _native_float(img)
            if img.ndim != 2 or min(img.shape) < 2:
                raise ValueError(f"{name}: the {which} image must be 2-D with at least 2x2 pixels")
            img[~np.isfinite(img)] = np.nan
            pole = 90.0 if which == "north" else -90.0
            x, y = wcs.wcs_world2pix(np.array([0.0]), np.array([pole]), 0)
            if not (-0.5 <= x[0] <= img.shape[1] - 0.5 and -0.5 <= y[0] <= img.shape[0] - 0.5):
                raise ValueError(f"{name}: the {which} image does not contain the {which} Galactic "
                                 "pole; are the north and south files swapped?")
            self.images[which] = (img, wcs)
        self.name = name
        self.frame = "galactic"

    @classmethod
    def from_fits(cls, north_path: str | Path, south_path: str | Path, hdu: int | str = 0) -> "ZeaPair":
        parts = {}
        for which, path in (("north", Path(north_path)), ("south", Path(south_path))):
            if not path.exists():
                raise ValueError(f"extinction.map_{which}: {path} does not exist")
            with fits.open(path, memmap=False) as hdul:
                header = hdul[hdu].header
                data = hdul[hdu].data
                if data is None:
                    raise ValueError(f"{path}: HDU {hdu} holds no image")
                parts[which] = (np.array(data), _zea_wcs(header, path, which))
        return cls(parts["north"][0], parts["north"][1], parts["south"][0], parts["south"][1],
                   name=f"{north_path} + {south_path}")

    def lookup(self, l_deg, b_deg, interpolation: str = "nearest") -> tuple[np.ndarray, np.ndarray]:
        """E(B-V) at Galactic (l, b) in degrees -> (values, outside)."""
        _check_interpolation(interpolation)
        l, b = np.broadcast_arrays(_as_float(l_deg), _as_float(b_deg))
        values = np.full(l.shape, np.nan)
        outside = np.zeros(l.shape, dtype=bool)
        good = np.isfinite(l) & np.isfinite(b) & (np.abs(b) <= 90.0)
        for which, sel in (("north", good & (b >= 0.0)), ("south", good & (b < 0.0))):
            if not sel.any():
                continue
            img, wcs = self.images[which]
            x, y = wcs.wcs_world2pix(np.mod(l[sel], 360.0), b[sel], 0)
            v = _sample(img, x, y, interpolation)
            values[sel] = v
            outside[sel] = ~np.isfinite(v)
        return values, outside

    def lookup_icrs(self, ra_deg, dec_deg, interpolation: str = "nearest") -> tuple[np.ndarray, np.ndarray]:
        """E(B-V) at ICRS (ra, dec) in degrees -> (values, outside)."""
        l, b = galactic_coordinates(ra_deg, dec_deg)
        return self.lookup(l, b, interpolation)

    def lookup_at(self, ra_deg, dec_deg, l_deg, b_deg, interpolation: str = "nearest"):
        """E(B-V) at a position given in both frames -> (values, outside); Galactic used."""
        return self.lookup(l_deg, b_deg, interpolation)


def _sample(img: np.ndarray, x: np.ndarray, y: np.ndarray, interpolation: str) -> np.ndarray:
    """Sample an image at 0-based pixel coordinates (pixel centres at integers).

    Positions off the image (beyond the outer pixel edges) give NaN. Bilinear uses
    the edge pixel's value in the outer half pixel and falls back to the nearest
    pixel where a neighbour is blank.
    """
    ny, nx = img.shape
    out = np.full(x.shape, np.nan)
    on = np.isfinite(x) & np.isfinite(y) & (x >= -0.5) & (x <= nx - 0.5) & (y >= -0.5) & (y <= ny - 0.5)
    if not on.any():
        return out
    xs, ys = x[on], y[on]
    ix = np.clip(np.floor(xs + 0.5).astype(np.int64), 0, nx - 1)
    iy = np.clip(np.floor(ys + 0.5).astype(np.int64), 0, ny - 1)
    nearest = img[iy, ix].astype(np.float64)
    if interpolation == "nearest":
        out[on] = nearest
        return out
    xc = np.clip(xs, 0.0, nx - 1.0)
    yc = np.clip(ys, 0.0, ny - 1.0)
    x0 = np.minimum(np.floor(xc).astype(np.int64), nx - 2)
    y0 = np.minimum(np.floor(yc).astype(np.int64), ny - 2)
    fx = xc - x0
    fy = yc - y0
    v = ((1.0 - fx) * (1.0 - fy) * img[y0, x0] + fx * (1.0 - fy) * img[y0, x0 + 1]
         + (1.0 - fx) * fy * img[y0 + 1, x0] + fx * fy * img[y0 + 1, x0 + 1])
    bad = ~np.isfinite(v)
    v[bad] = nearest[bad]
    out[on] = v
    return out
