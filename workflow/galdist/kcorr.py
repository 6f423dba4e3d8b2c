"""K-corrections for the same band in and out, from galaxy spectral templates.

Definition (Hogg, Baldry, Blanton & Eisenstein 2002, arXiv:astro-ph/0210394,
eq. 1; equation numbers from memory): m_R = M_Q + DM + K_QR. With the same band
R in the observed and the emitted frame, their wavelength form (eq. 13) reads

    K(z) = -2.5 log10 { 1/(1+z) * Int lam_o L_lam(lam_o/(1+z)) R(lam_o) dlam_o
                                  * Int lam_e g_lam(lam_e) R(lam_e) dlam_e
                        / [ Int lam_o g_lam(lam_o) R(lam_o) dlam_o
                            * Int lam_e L_lam(lam_e) R(lam_e) dlam_e ] }

where g_lam is the band's standard source (AB or Vega). With one band the two
g integrals are the same number and cancel, so K does not depend on whether the
band is calibrated AB or Vega:

    K(z) = -2.5 log10 [ <L_lam(lam/(1+z))>_R / ((1+z) <L_lam(lam)>_R) ],

with <f>_R = Int f R lam dlam / Int R lam dlam the photon-counting band average
of ``galdist.filters.band_average``. A flat f_nu spectrum (L_lam ~ lam^-2) gives
K = -2.5 log10(1+z) exactly.

The system does matter for colours: each galaxy's template is chosen by
matching its Galactic-extinction-corrected observed colour (m_blue - m_red, in
the catalog's systems) to the template's redshifted model colour, computed in
AB and converted with per-band offsets, m_Vega = m_AB - (AB - Vega).

Templates come in tracks (the shipped library: metallicity x dust), each the
same sequence of star-formation histories from passive to starburst. A galaxy's
colour is matched along every track (piecewise linear between neighbouring
templates, so a track whose colour is not monotonic gives several matches):
K is the mean of K over all matches, and K_<band>_err half the range of K over
every point of every track whose model colour lies within the galaxy's colour
error (``assign``). With one track and a monotonic colour this is the plain
one-dimensional colour match with a single solution.

Work is split in two: ``build_grids`` computes K[band][template, z] and the
model colour[template, z] on a fine uniform redshift grid once per
configuration; ``assign`` interpolates them for any number of galaxies with
array arithmetic only (no per-row Python), in chunks of rows so memory stays
bounded.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import flags as fl
from .io import atomic_path, reading_grid
from .filters import band_average
from .flags import KCorr

DEFAULT_TEMPLATE_FILE = Path(__file__).parent / "data" / "templates" / "bc03_templates.ecsv"
WAVE_COLUMN_NAMES = ("wavelength", "wave", "lambda", "wavelength_angstrom")


# ---------------------------------------------------------------- templates


@dataclass(frozen=True)
class Templates:
    """Rest-frame template spectra in tracks, each ordered from passive to star-forming.

    ``wave``: (n_w,) Angstrom, strictly increasing. ``flux_lambda``: (n_t, n_w)
    f_lambda in any common unit (only shapes matter for K and colours).
    ``names``: one per template. ``tracks``: tuples of names, each a sequence
    passive -> star-forming, all of the same length, together naming every
    template once; None = one track of all templates in order. The first track is
    the reference one (``kcorr_template`` is the fractional index along it).
    ``meta``: provenance.
    """

    wave: np.ndarray
    flux_lambda: np.ndarray
    names: tuple[str, ...]
    meta: dict = field(default_factory=dict)
    tracks: tuple | None = None

    def __post_init__(self):
        wave = np.asarray(self.wave, dtype=float)
        flux = np.atleast_2d(np.asarray(self.flux_lambda, dtype=float))
        names = tuple(str(n) for n in self.names)
        if wave.ndim != 1 or wave.size < 3 or not np.all(np.isfinite(wave)) or not np.all(np.diff(wave) > 0):
            raise ValueError("templates: wavelength must be >= 3 finite, strictly increasing values (Angstrom)")
        if flux.shape != (len(names), wave.size):
            raise ValueError(f"templates: flux shape {flux.shape} does not match "
                             f"{len(names)} names x {wave.size} wavelengths")
        if not np.all(np.isfinite(flux)) or np.any(flux < 0) or np.any(flux.max(axis=1) <= 0):
            raise ValueError("templates: fluxes must be finite, non-negative and not all zero")
        if len(set(names)) != len(names) or not names:
            raise ValueError(f"templates: names must be unique and non-empty (got {names})")
        tracks = (names,) if self.tracks is None else tuple(tuple(str(n) for n in t) for t in self.tracks)
        flat = [n for t in tracks for n in t]
        if sorted(flat) != sorted(names) or len({len(t) for t in tracks}) != 1:
            raise ValueError("templates: tracks must be sequences of equal length that together name "
                             f"every template once (got {len(tracks)} tracks for {len(names)} templates)")
        object.__setattr__(self, "wave", wave)
        object.__setattr__(self, "flux_lambda", flux)
        object.__setattr__(self, "names", names)
        object.__setattr__(self, "tracks", tracks)

    def index(self, name: str) -> int:
        if name not in self.names:
            raise ValueError(f"kcorr.default_template: '{name}' is not a template "
                             f"(allowed: {', '.join(self.names)})")
        return self.names.index(name)

    @property
    def track_indices(self) -> np.ndarray:
        """(n_tracks, n_steps) template indices."""
        pos = {n: i for i, n in enumerate(self.names)}
        return np.array([[pos[n] for n in t] for t in self.tracks], dtype=np.intp)


def add_emission_lines(wave, flux_lambda, line_wave, line_lum) -> np.ndarray:
    """Rest-frame spectra with unresolved emission lines added on their wavelength grid.

    ``wave`` (n_w,) Angstrom; ``flux_lambda`` (n_t, n_w) or (n_w,) f_lambda;
    ``line_wave`` (n_l,) Angstrom; ``line_lum`` (n_t, n_l) or (n_l,) line
    luminosities in the flux unit times Angstrom. Each line is shared between the two
    grid points around it (weights 1 - u and u, u its fractional position) as a
    peak of height L / h_k, h_k = (lam_{k+1} - lam_{k-1}) / 2, so the trapezoid
    integral of the piecewise-linear spectrum gains exactly L per line and its
    centroid stays at the line wavelength to within the grid step. Lines outside
    (wave[1], wave[-2]) are left out.
    """
    wave = np.asarray(wave, dtype=float)
    flux = np.array(flux_lambda, dtype=float, copy=True)
    one = flux.ndim == 1
    flux = np.atleast_2d(flux)
    lw = np.asarray(line_wave, dtype=float).ravel()
    lum = np.atleast_2d(np.asarray(line_lum, dtype=float))
    if lum.shape != (flux.shape[0], lw.size):
        raise ValueError(f"templates: line luminosities have shape {lum.shape}, expected "
                         f"{(flux.shape[0], lw.size)}")
    keep = (lw > wave[1]) & (lw < wave[-2])
    lw, lum = lw[keep], lum[:, keep]
    k = np.searchsorted(wave, lw) - 1  # wave[k] <= lw < wave[k + 1]
    u = (lw - wave[k]) / (wave[k + 1] - wave[k])
    half = 0.5 * (wave[2:] - wave[:-2])  # h for grid points 1 .. n_w - 2
    h = np.concatenate([[wave[1] - wave[0]], half, [wave[-1] - wave[-2]]])
    for j, w in ((k, 1.0 - u), (k + 1, u)):
        np.add.at(flux.T, j, (lum * (w / h[j])).T)
    return flux[0] if one else flux


def load_templates(path: str | Path | None = None, emission_lines: bool = True) -> Templates:
    """Read a template table (ECSV, FITS, or CSV read by astropy).

    Layout: a wavelength column (``wavelength``; Angstrom, or any length unit
    the column declares) and one f_lambda column per template, in order from
    passive to star-forming; the column names are the template names. Optional
    metadata (ECSV): ``tracks``, a list of {templates: [names]} (see
    ``Templates``), and ``emission_lines`` {wavelength: [A], luminosity: {name:
    [flux unit x A]}}, lines added to the continuum columns with
    ``add_emission_lines`` (``emission_lines=False`` leaves them out). With no
    ``path`` the shipped library is read (see data/templates/README.md).
    """
    path = Path(path) if path is not None else DEFAULT_TEMPLATE_FILE
    if not path.exists():
        raise ValueError(f"kcorr.templates: file {path} does not exist")
    from astropy.table import Table  # here: only the grid-building job reads templates

    try:
        table = Table.read(path, format="ascii.csv" if path.suffix == ".csv" else None)
    except Exception as exc:
        raise ValueError(f"kcorr.templates: cannot read {path} as a table ({exc})") from exc
    lower = {c.lower(): c for c in table.colnames}
    wcol = next((lower[w] for w in WAVE_COLUMN_NAMES if w in lower), None)
    if wcol is None:
        raise ValueError(f"kcorr.templates: {path} has no wavelength column "
                         f"(looked for {', '.join(WAVE_COLUMN_NAMES)})")
    col = table[wcol]
    wave = (col.quantity.to_value("Angstrom") if getattr(col, "unit", None) is not None
            else np.asarray(col, dtype=float))
    names = [c for c in table.colnames if c != wcol]
    if not names:
        raise ValueError(f"kcorr.templates: {path} has no template columns")
    flux = np.array([np.asarray(table[c], dtype=float) for c in names])
    meta = dict(table.meta)
    meta.setdefault("file", str(path))
    meta["file_sha256"] = hashlib.sha256(path.read_bytes()).hexdigest()
    meta["emission_lines_added"] = False
    try:
        tracks = meta.get("tracks")
        if tracks is not None:
            tracks = tuple(tuple(t["templates"]) for t in tracks)
        lines = meta.get("emission_lines")
        if lines and emission_lines:
            lum = np.array([lines["luminosity"].get(n, np.zeros(len(lines["wavelength"]))) for n in names],
                           dtype=float)
            flux = add_emission_lines(wave, flux, np.asarray(lines["wavelength"], dtype=float), lum)
            meta["emission_lines_added"] = True
        return Templates(wave=wave, flux_lambda=flux, names=tuple(names), meta=meta, tracks=tracks)
    except (ValueError, KeyError, TypeError) as exc:
        raise ValueError(f"kcorr.templates: {path}: {exc}") from exc


# ------------------------------------------------- direct synthetic photometry


def _redshifted_band_average(filt, wave, flux_lambda, z) -> np.ndarray:
    """<L_lam(lam/(1+z))>_R for each template (leading axes) and each z (trailing)."""
    wave = np.asarray(wave, dtype=float)
    flux = np.asarray(flux_lambda, dtype=float)
    z = np.asarray(z, dtype=float)
    zu, inverse = np.unique(z.ravel(), return_inverse=True)
    out = np.empty(flux.shape[:-1] + zu.shape)
    for j, zj in enumerate(zu):  # loop over grid redshifts, not galaxies
        out[..., j] = band_average(filt, wave * (1.0 + zj), flux) if np.isfinite(zj) else np.nan
    return out[..., inverse].reshape(flux.shape[:-1] + z.shape)


def k_correction(filt, wave, flux_lambda, z) -> np.ndarray:
    """Same-band K-correction by direct synthetic photometry.

    ``filt``: a speclite FilterResponse (``galdist.filters.load_filter``);
    ``wave`` (n_w,) rest-frame Angstrom; ``flux_lambda`` (..., n_w) rest-frame
    f_lambda; ``z`` scalar or array. Returns shape flux.shape[:-1] + z.shape.
    K(z) = -2.5 log10[<L(lam/(1+z))>_R / ((1+z) <L(lam)>_R)] (Hogg et al.
    2002, eq. 13 with Q = R; the standard-source terms cancel, so AB and Vega
    give the same K). The spectrum must cover the filter at every z, else
    ``FilterError`` (a ValueError); a non-finite z gives NaN.
    """
    z = np.asarray(z, dtype=float)
    rest = _redshifted_band_average(filt, wave, flux_lambda, 0.0)
    obs = _redshifted_band_average(filt, wave, flux_lambda, z)
    rest = rest.reshape(rest.shape + (1,) * z.ndim)
    return -2.5 * np.log10(obs / ((1.0 + z) * rest))


def _ab_reference(filt) -> float:
    """Band average of f_lambda ~ lam^-2 (the AB spectrum up to a constant)."""
    lo, hi = filt.wavelength[0], filt.wavelength[-1]
    grid = np.linspace(lo, hi, max(2001, int((hi - lo) / 0.5) + 1))
    return float(band_average(filt, grid, grid**-2.0))


def model_colour_ab(filt_blue, filt_red, wave, flux_lambda, z) -> np.ndarray:
    """Observed-frame AB colour m_blue - m_red of rest-frame spectra redshifted to z.

    m_AB = -2.5 log10(<f_lam>_R / <f_lam,AB>_R) + const, with f_lam,AB ~ lam^-2
    (AB definition: Oke & Gunn 1983, ApJ 266, 713). Distance and the 1/(1+z)
    flux factor are common to both bands and cancel. Shape as ``k_correction``.
    """
    b = _redshifted_band_average(filt_blue, wave, flux_lambda, z) / _ab_reference(filt_blue)
    r = _redshifted_band_average(filt_red, wave, flux_lambda, z) / _ab_reference(filt_red)
    return -2.5 * np.log10(b / r)


# ------------------------------------------------------------------ grids


@dataclass(frozen=True)
class KGrid:
    """K[band][template, z] and model colour[template, z] on a uniform z grid.

    ``colour`` is in the catalog's systems (AB colour minus the AB-Vega offset
    difference), None when no colour pair is configured. ``tracks``: (n_tracks,
    n_steps) template indices, each row a sequence passive -> star-forming (the
    first row is the reference track of ``kcorr_template``); None = one track of
    all templates in order. ``colour_sign`` is +1 when colour increases along the
    reference track (first to last template at the first redshift), -1 when it
    decreases.
    """

    z: np.ndarray
    k: dict
    names: tuple[str, ...]
    colour: np.ndarray | None = None
    colour_pair: tuple[str, str] | None = None
    meta: dict = field(default_factory=dict)
    tracks: np.ndarray | None = None

    def __post_init__(self):
        z = np.asarray(self.z, dtype=float)
        if z.ndim != 1 or z.size < 2:
            raise ValueError("kcorr grid: z must have >= 2 points")
        step = np.diff(z)
        if not np.all(step > 0) or not np.allclose(step, step[0], rtol=1e-6, atol=0):
            raise ValueError("kcorr grid: z must be uniform and increasing")
        object.__setattr__(self, "z", z)
        object.__setattr__(self, "names", tuple(str(n) for n in self.names))
        nt = len(self.names)
        shape = (nt, z.size)
        k = {str(b): np.asarray(v, dtype=float) for b, v in self.k.items()}
        for b, v in k.items():
            if v.shape != shape:
                raise ValueError(f"kcorr grid: K for band {b} has shape {v.shape}, expected {shape}")
        object.__setattr__(self, "k", k)
        if self.colour is not None:
            c = np.asarray(self.colour, dtype=float)
            if c.shape != shape:
                raise ValueError(f"kcorr grid: colour has shape {c.shape}, expected {shape}")
            object.__setattr__(self, "colour", c)
            object.__setattr__(self, "colour_pair", tuple(self.colour_pair))
        tracks = (np.arange(nt, dtype=np.intp)[None, :] if self.tracks is None
                  else np.atleast_2d(np.asarray(self.tracks, dtype=np.intp)))
        if tracks.size != nt or sorted(tracks.ravel().tolist()) != list(range(nt)):
            raise ValueError(f"kcorr grid: tracks {tracks.shape} must hold every template index once")
        object.__setattr__(self, "tracks", tracks)

    @property
    def dz(self) -> float:
        return float((self.z[-1] - self.z[0]) / (self.z.size - 1))

    @property
    def n_steps(self) -> int:
        """Templates per track (the range of ``kcorr_template`` is 0 .. n_steps - 1)."""
        return int(self.tracks.shape[1])

    @property
    def colour_sign(self) -> float:
        if self.colour is None or self.n_steps < 2:
            return 1.0
        ref = self.tracks[0]
        return 1.0 if self.colour[ref[-1], 0] > self.colour[ref[0], 0] else -1.0

    def index(self, name: str) -> int:
        if name not in self.names:
            raise ValueError(f"kcorr.default_template: '{name}' is not a template "
                             f"(allowed: {', '.join(self.names)})")
        return self.names.index(name)

    def step_of(self, name: str) -> int:
        """Position of a template along its track."""
        return int(np.argwhere(self.tracks == self.index(name))[0, 1])

    def to_file(self, path: str | Path) -> None:
        """Write a compressed .npz (no pickles) holding everything ``from_file`` needs."""
        bands = list(self.k)
        with atomic_path(path) as tmp:
            self._write(tmp, bands)

    def _write(self, path, bands) -> None:
        np.savez_compressed(
            path,
            z=self.z,
            names=np.array(self.names, dtype=str),
            bands=np.array(bands, dtype=str),
            k=np.array([self.k[b] for b in bands]) if bands else np.zeros((0, len(self.names), self.z.size)),
            colour=self.colour if self.colour is not None else np.zeros((0, 0)),
            colour_pair=np.array(self.colour_pair if self.colour_pair else [], dtype=str),
            tracks=self.tracks,
            meta_json=np.array(json.dumps(self.meta, sort_keys=True, default=str)),
        )

    @classmethod
    def from_file(cls, path: str | Path) -> KGrid:
        with reading_grid(path), np.load(path, allow_pickle=False) as d:
            bands = [str(b) for b in d["bands"]]
            colour = d["colour"] if d["colour"].size else None
            pair = tuple(str(c) for c in d["colour_pair"]) or None
            tracks = d["tracks"] if "tracks" in d.files else None
            return cls(z=d["z"], k={b: d["k"][i] for i, b in enumerate(bands)},
                       names=tuple(str(n) for n in d["names"]), colour=colour,
                       colour_pair=pair, meta=json.loads(str(d["meta_json"])), tracks=tracks)


def grid_redshifts(z_min: float, z_max: float, dz: float) -> np.ndarray:
    """The K(z) grid's redshifts; ValueError naming the config key if dz does not divide the span."""
    if not (np.isfinite(z_min) and np.isfinite(z_max) and z_min > -1 and z_max > z_min):
        raise ValueError(f"kcorr.z_max: need -1 < z_min < z_max (got {z_min}, {z_max})")
    n = (z_max - z_min) / dz
    if not (dz > 0 and abs(n - round(n)) < 1e-6 and round(n) >= 1):
        raise ValueError(f"kcorr.dz: must be > 0 and divide z_max - z_min (got dz = {dz}, "
                         f"z_max - z_min = {z_max - z_min})")
    return np.linspace(z_min, z_max, int(round(n)) + 1)


def build_grids(templates: Templates, filters: dict, colour_pair: tuple[str, str] | None = None,
                ab_minus_vega: dict | None = None, z_min: float = 0.0, z_max: float = 0.5,
                dz: float = 0.001) -> KGrid:
    """K(z) for every band x template, and the model colour, once per configuration.

    ``filters``: band label -> speclite FilterResponse. ``colour_pair``:
    (blue, red) labels among ``filters`` used to pick templates, or None for a
    single default template. ``ab_minus_vega``: label -> AB - Vega offset
    (0 or absent for AB bands), so model colours are in the catalog's systems.
    A colour that is not monotonic along a track is allowed (``assign`` then
    finds several matches and their spread enters K_err); the redshifts where
    that happens are recorded in ``meta['colour_not_monotonic_z']``.
    """
    z = grid_redshifts(z_min, z_max, dz)
    offsets = dict(ab_minus_vega or {})
    tracks = templates.track_indices
    if colour_pair is not None:
        colour_pair = tuple(colour_pair)
        if len(colour_pair) != 2 or any(c not in filters for c in colour_pair) or colour_pair[0] == colour_pair[1]:
            raise ValueError(f"kcorr.colour_pair: needs two different configured bands "
                             f"(allowed: {', '.join(filters)}; got {colour_pair})")
        if tracks.shape[1] < 2:
            raise ValueError("kcorr.colour_pair: colour matching needs >= 2 templates per track")
    for label, filt in filters.items():
        lo, hi = filt.wavelength[0] / (1 + z_max), filt.wavelength[-1] / (1 + z_min)
        if templates.wave[0] > lo or templates.wave[-1] < hi:
            raise ValueError(f"kcorr.templates: rest wavelengths {templates.wave[0]:.0f}-"
                             f"{templates.wave[-1]:.0f} A do not cover band '{label}' at "
                             f"{z_min} <= z <= {z_max} (needs {lo:.0f}-{hi:.0f} A)")
    k = {label: k_correction(filt, templates.wave, templates.flux_lambda, z)
         for label, filt in filters.items()}
    colour = None
    not_monotonic = None
    if colour_pair is not None:
        blue, red = colour_pair
        colour = (model_colour_ab(filters[blue], filters[red], templates.wave, templates.flux_lambda, z)
                  - (float(offsets.get(blue, 0.0)) - float(offsets.get(red, 0.0))))
        step = np.diff(colour[tracks], axis=1)  # (n_tracks, n_steps - 1, n_z)
        ok = np.all(step > 0, axis=1) | np.all(step < 0, axis=1)  # (n_tracks, n_z)
        if not ok.all():
            bad = z[~ok.all(axis=0)]
            not_monotonic = [float(bad.min()), float(bad.max())]
    meta = {
        "definition": "Hogg et al. 2002 (astro-ph/0210394) eq. 13, same band in and out",
        "filters": {b: getattr(f, "name", str(b)) for b, f in filters.items()},
        "colour_pair": list(colour_pair) if colour_pair else None,
        "ab_minus_vega": {b: float(offsets.get(b, 0.0)) for b in filters},
        "templates_file": templates.meta.get("file"),
        "templates_sha256": templates.meta.get("file_sha256"),
        "tracks": [list(t) for t in templates.tracks],
        "colour_not_monotonic_z": not_monotonic,
    }
    return KGrid(z=z, k=k, names=templates.names, colour=colour, colour_pair=colour_pair, meta=meta,
                 tracks=tracks)


# ------------------------------------------------------------- per galaxy

CHUNK_VALUES = 1 << 22  # values per per-template work array set; bounds memory per chunk of rows


def _z_index(grid: KGrid, z: np.ndarray):
    """Lower grid index, weight and validity of each redshift on the uniform grid."""
    nz = grid.z.size
    u = (z - grid.z[0]) / grid.dz
    tol = 1e-9
    valid = np.isfinite(u) & (u >= -tol) & (u <= nz - 1 + tol)
    u = np.where(valid, np.clip(u, 0.0, nz - 1), 0.0)
    i = np.minimum(np.floor(u).astype(np.intp), nz - 2)
    return i, u - i, valid


def _interp_z(table: np.ndarray, t, i: np.ndarray, w: np.ndarray) -> np.ndarray:
    """table[t, z] at template rows t (int or array) and fractional grid positions i + w."""
    flat = table.ravel()
    base = t * table.shape[1] + i
    return flat[base] * (1.0 - w) + flat[base + 1] * w


def _chunks(grid: KGrid, n: int):
    nt, nb = len(grid.names), len(grid.k) + 1
    size = int(max(1024, min(1 << 17, CHUNK_VALUES // (nt * nb))))
    for start in range(0, n, size):
        yield slice(start, min(n, start + size))


def _match(grid: KGrid, i, w, c, sigma):
    """Colour match on every track for one chunk of rows (all arrays of the chunk's length).

    Returns (k_best, k_lo, k_hi, tpl, dmin): per band the mean K over all points of all
    tracks whose model colour equals ``c`` (the nearest template where there is none),
    the least and greatest K over the points within max(sigma, dmin) of ``c``; the
    fractional index of the first match on the reference track (its nearest template
    where there is none); the colour distance to the nearest point of any track.
    """
    nt, n = len(grid.names), c.size
    tracks = grid.tracks
    col = np.empty((nt, n))
    for t in range(nt):  # loops over templates and segments, never over galaxies
        col[t] = _interp_z(grid.colour, t, i, w)
    kt = {b: np.empty((nt, n)) for b in grid.k}
    for b, table in grid.k.items():
        for t in range(nt):
            kt[b][t] = _interp_z(table, t, i, w)
    ksum = {b: np.zeros(n) for b in grid.k}
    count = np.zeros(n)
    tpl = np.full(n, np.nan)
    rows = np.arange(n)
    dist = np.abs(col - c)  # (n_t, n) colour distance to every template
    nearest = np.argmin(dist, axis=0)
    near_d = dist[nearest, rows]
    k_near = {b: kt[b][nearest, rows] for b in grid.k}
    ref_step = np.argmin(dist[tracks[0]], axis=0).astype(float)
    del dist
    for r, track in enumerate(tracks):
        for s in range(track.size - 1):
            a, e = track[s], track[s + 1]
            ca, ce = col[a], col[e]
            hit = (np.minimum(ca, ce) <= c) & (c <= np.maximum(ca, ce))
            if s > 0:
                hit &= c != ca  # a match exactly on a template counts once
            if not hit.any():
                continue
            dc = ce - ca
            flat = dc == 0
            u = np.clip(np.where(flat, 0.5, (c - ca) / np.where(flat, 1.0, dc)), 0.0, 1.0)
            count += hit
            for b in grid.k:
                ksum[b] += np.where(hit, kt[b][a] + u * (kt[b][e] - kt[b][a]), 0.0)
            if r == 0:
                tpl = np.where(np.isnan(tpl) & hit, s + u, tpl)
    none = count == 0  # then the nearest point of any track is a template (a segment end)
    k_best = {b: np.where(none, k_near[b], ksum[b] / np.where(none, 1.0, count)) for b in grid.k}
    tpl = np.where(np.isnan(tpl), ref_step, tpl)
    dmin = np.where(none, near_d, 0.0)
    # spread: every point of every track within max(sigma, dmin) of the colour
    se = np.maximum(np.where(np.isfinite(sigma), sigma, 0.0), dmin)
    cl, ch = c - se, c + se
    tiny = 1e-9
    k_lo = {b: np.full(n, np.inf) for b in grid.k}
    k_hi = {b: np.full(n, -np.inf) for b in grid.k}
    for track in tracks:
        for s in range(track.size - 1):
            a, e = track[s], track[s + 1]
            ca, ce = col[a], col[e]
            ol, oh = np.maximum(cl, np.minimum(ca, ce)), np.minimum(ch, np.maximum(ca, ce))
            hit = ol <= oh + tiny
            if not hit.any():
                continue
            dc = ce - ca
            flat = dc == 0
            safe = np.where(flat, 1.0, dc)
            u1 = np.clip(np.where(flat, 0.0, (ol - ca) / safe), 0.0, 1.0)
            u2 = np.clip(np.where(flat, 1.0, (oh - ca) / safe), 0.0, 1.0)
            for b in grid.k:
                ka, dk = kt[b][a], kt[b][e] - kt[b][a]
                k1, k2 = ka + u1 * dk, ka + u2 * dk
                k_lo[b] = np.where(hit, np.minimum(k_lo[b], np.minimum(k1, k2)), k_lo[b])
                k_hi[b] = np.where(hit, np.maximum(k_hi[b], np.maximum(k1, k2)), k_hi[b])
    return k_best, k_lo, k_hi, tpl, dmin


def _all_templates(grid: KGrid, i, w, t_default: int):
    """K of one template, and the least and greatest K over all templates, for a chunk."""
    k_def, k_lo, k_hi = {}, {}, {}
    for b, table in grid.k.items():
        k_def[b] = _interp_z(table, t_default, i, w)
        lo, hi = np.full(i.size, np.inf), np.full(i.size, -np.inf)
        for t in range(len(grid.names)):
            v = _interp_z(table, t, i, w)
            lo, hi = np.minimum(lo, v), np.maximum(hi, v)
        k_lo[b], k_hi[b] = lo, hi
    return k_def, k_lo, k_hi


def _reference_colour(grid: KGrid, i, w, x):
    """Model colour on the reference track at fractional positions x (linear between templates)."""
    ref = grid.tracks[0]
    t_lo = np.minimum(np.floor(x).astype(np.intp), max(ref.size - 2, 0))
    t_hi = np.minimum(t_lo + 1, ref.size - 1)
    a = x - t_lo
    return _interp_z(grid.colour, ref[t_lo], i, w) * (1.0 - a) + _interp_z(grid.colour, ref[t_hi], i, w) * a


def evaluate(grid: KGrid, z, template) -> tuple[dict, np.ndarray | None]:
    """K per band and the model colour at redshifts ``z`` and reference-track positions.

    The forward direction of ``assign``: ``template`` is a fractional index along the
    reference track (the first); the colour is that track's model colour there
    (linear between neighbouring templates), and K is what ``assign`` gives for that
    colour (the mean over every track's match), so assign(grid, z, colour) gives
    back these K. Without a colour pair, K of the reference track at ``template``.
    NaN where z is outside the grid.
    """
    z = np.asarray(z, dtype=float).ravel()
    x = np.clip(np.asarray(template, dtype=float).ravel(), 0.0, grid.n_steps - 1)
    i, w, zvalid = _z_index(grid, z)
    ref = grid.tracks[0]
    k = {b: np.empty(z.size) for b in grid.k}
    colour = None if grid.colour is None else np.empty(z.size)
    for sl in _chunks(grid, z.size):
        ii, ww, xx = i[sl], w[sl], x[sl]
        if grid.colour is None:
            t_lo = np.minimum(np.floor(xx).astype(np.intp), max(ref.size - 2, 0))
            t_hi = np.minimum(t_lo + 1, ref.size - 1)
            a = xx - t_lo
            for b, table in grid.k.items():
                k[b][sl] = _interp_z(table, ref[t_lo], ii, ww) * (1 - a) + _interp_z(table, ref[t_hi], ii, ww) * a
            continue
        c = _reference_colour(grid, ii, ww, xx)
        colour[sl] = c
        k_best, *_ = _match(grid, ii, ww, c, np.zeros(c.size))
        for b in grid.k:
            k[b][sl] = k_best[b]
    for b in k:
        k[b][~zvalid] = np.nan
    if colour is not None:
        colour[~zvalid] = np.nan
    return k, colour


def assign(grid: KGrid, z, colour_obs, default_template: str, clip_tolerance: float = 0.0,
           colour_err=None) -> dict:
    """Per-galaxy K-corrections and their template errors by colour matching on every track.

    ``z``: heliocentric (observed) redshift. ``colour_obs``: observed colour
    m_blue - m_red of the grid's colour pair, Galactic-extinction corrected, in
    the catalog's systems; None to use ``default_template`` for every row
    without a flag (single-template mode). ``colour_err``: its 1-sigma error
    (mag; None or NaN = 0). ``default_template``: the template used where the
    colour is NaN (ValueError if unknown).

    Matching: along each track the model colour at the galaxy's z is linear
    between neighbouring templates; every point where it equals the observed
    colour is a match (a track whose colour is not monotonic can give several).
    ``K_<band>`` is the mean K over all matches of all tracks; where there is
    none (the colour is outside every track's range), K of the template whose
    colour is nearest. ``K_<band>_err`` is half the range of K over every point
    of every track whose model colour lies within max(colour_err, d) of the
    observed colour, d the distance to the nearest track (0 when matched): the
    spread of K over the templates the colour cannot tell apart. Where the colour
    is missing, and in single-template mode, K is the default template's and
    K_<band>_err half the range of K over all templates at that z.

    Returns ``K_<band>``, ``K_<band>_err`` per band, ``kcorr_template`` (fractional
    index along the reference track of the first match there, or of its template
    nearest in colour; for the default template its position along its own
    track) and ``kcorr_flags`` (KCorr bits): COLOR_CLIPPED (colour outside every
    track's range by more than ``clip_tolerance`` mag; closer than that the
    nearest template is used without a flag, since photometric noise alone puts
    galaxies there), COLOR_MISSING (NaN colour, default template used),
    Z_BEYOND_GRID (z NaN or outside the grid: K, its error and template NaN).
    """
    z = np.asarray(z, dtype=float).ravel()
    n = z.size
    t_default = grid.index(default_template)
    step_default = float(grid.step_of(default_template))
    out_flags = fl.new(n)
    i, w, zvalid = _z_index(grid, z)
    k = {b: np.empty(n) for b in grid.k}
    k_err = {b: np.empty(n) for b in grid.k}
    tpl = np.full(n, step_default)

    if colour_obs is None or grid.colour is None:
        if colour_obs is not None:
            raise ValueError("kcorr.colour_pair: a colour was given but the grid has no colour pair")
        for sl in _chunks(grid, n):
            k_def, lo, hi = _all_templates(grid, i[sl], w[sl], t_default)
            for b in grid.k:
                k[b][sl], k_err[b][sl] = k_def[b], 0.5 * (hi[b] - lo[b])
    else:
        c = np.asarray(colour_obs, dtype=float).ravel()
        if c.size != n:
            raise ValueError(f"kcorr: colour_obs has {c.size} rows, z has {n}")
        sig = np.zeros(n) if colour_err is None else np.abs(np.asarray(colour_err, dtype=float).ravel())
        if sig.size != n:
            raise ValueError(f"kcorr: colour_err has {sig.size} rows, z has {n}")
        missing = ~np.isfinite(c)
        clipped = np.zeros(n, dtype=bool)
        for sl in _chunks(grid, n):
            ii, ww, cc, miss = i[sl], w[sl], c[sl], missing[sl]
            k_best, lo, hi, x, dmin = _match(grid, ii, ww, np.where(miss, 0.0, cc), sig[sl])
            k_def, lo_all, hi_all = _all_templates(grid, ii, ww, t_default)
            for b in grid.k:
                k[b][sl] = np.where(miss, k_def[b], k_best[b])
                k_err[b][sl] = 0.5 * np.where(miss, hi_all[b] - lo_all[b], hi[b] - lo[b])
            tpl[sl] = np.where(miss, step_default, x)
            clipped[sl] = ~miss & (dmin > clip_tolerance)
        fl.set_where(out_flags, clipped, KCorr.COLOR_CLIPPED)
        fl.set_where(out_flags, missing, KCorr.COLOR_MISSING)

    fl.set_where(out_flags, ~zvalid, KCorr.Z_BEYOND_GRID)
    out = {}
    for b in grid.k:
        k[b][~zvalid] = np.nan
        k_err[b][~zvalid] = np.nan
        out[f"K_{b}"] = k[b]
    for b in grid.k:
        out[f"K_{b}_err"] = k_err[b]
    tpl[~zvalid] = np.nan
    out["kcorr_template"] = tpl
    out["kcorr_flags"] = out_flags
    return out


# ------------------------------------------------------------------ inclined discs

#: gamma of A_int = gamma log10(a/b) in Cousins I: 0.92 + 1.63 (log W^i - 2.5)
#: (Tully et al. 1998, AJ 115, 2264; from memory; as galdist.tully_fisher)
GAMMA_I = (0.92, 1.63)


def reddening_per_a_i(filters: dict, colour_pair, cousins_i_filter) -> float:
    """(A_blue - A_red) / A_I for dust with the Milky Way's law (Fitzpatrick 1999, R_V =
    3.1, through the bands' filter curves): what turns a disc's internal extinction in I
    into the internal reddening of the colour the template is matched on (internal dust
    assumed to redden like the Galaxy's, common practice)."""
    from .extinction import law_coefficients

    blue, red = colour_pair
    r = law_coefficients({"blue": filters[blue], "red": filters[red], "I": cousins_i_filter}, law="F99", r_v=3.1)
    return float((r["blue"] - r["red"]) / r["I"])


def disc_colour_excess(w50, axis_ratio, z_helio, per_a_i: float, q0: float = 0.2):
    """Internal colour excess E_int(blue - red) of an inclined disc: A_int,I (per_a_i),
    A_int,I = gamma_I log10(a/b) with gamma_I from log W^i (``GAMMA_I``; W^i = W50 / (1 +
    z) / sin i without the turbulence term, which moves gamma by < 0.05 there). 0 where
    the disc has no width or axis ratio (not a disc the TF chain could correct)."""
    from .tully_fisher import inclination, internal_extinction

    w = np.asarray(w50, dtype=float) / (1.0 + np.asarray(z_helio, dtype=float))
    incl = inclination(axis_ratio, q0)
    with np.errstate(divide="ignore", invalid="ignore"):
        logw_i = np.log10(w / np.sin(np.radians(incl)))
        a_int = internal_extinction(axis_ratio, logw_i, *GAMMA_I)
    return np.where(np.isfinite(a_int), a_int * per_a_i, 0.0)

