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

Work is split in two: ``build_grids`` computes K[band][template, z] and the
model colour[template, z] on a fine uniform redshift grid once per
configuration; ``assign`` interpolates them for any number of galaxies with
array arithmetic only (no per-row Python).
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
    """Rest-frame template spectra, ordered from passive to star-forming.

    ``wave``: (n_w,) Angstrom, strictly increasing. ``flux_lambda``: (n_t, n_w)
    f_lambda in any common unit (only shapes matter for K and colours).
    ``names``: one per template. ``meta``: provenance.
    """

    wave: np.ndarray
    flux_lambda: np.ndarray
    names: tuple[str, ...]
    meta: dict = field(default_factory=dict)

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
        object.__setattr__(self, "wave", wave)
        object.__setattr__(self, "flux_lambda", flux)
        object.__setattr__(self, "names", names)

    def index(self, name: str) -> int:
        if name not in self.names:
            raise ValueError(f"kcorrect.default_template: '{name}' is not a template "
                             f"(allowed: {', '.join(self.names)})")
        return self.names.index(name)


def load_templates(path: str | Path | None = None) -> Templates:
    """Read a template table (ECSV, FITS, or CSV read by astropy).

    Layout: a wavelength column (``wavelength``; Angstrom, or any length unit
    the column declares) and one f_lambda column per template, in order from
    passive to star-forming; the column names are the template names. With no
    ``path`` the shipped BC03 library is read (see data/templates/README.md).
    """
    path = Path(path) if path is not None else DEFAULT_TEMPLATE_FILE
    if not path.exists():
        raise ValueError(f"kcorrect.templates: file {path} does not exist")
    from astropy.table import Table  # here: only the grid-building job reads templates

    try:
        table = Table.read(path, format="ascii.csv" if path.suffix == ".csv" else None)
    except Exception as exc:
        raise ValueError(f"kcorrect.templates: cannot read {path} as a table ({exc})") from exc
    lower = {c.lower(): c for c in table.colnames}
    wcol = next((lower[w] for w in WAVE_COLUMN_NAMES if w in lower), None)
    if wcol is None:
        raise ValueError(f"kcorrect.templates: {path} has no wavelength column "
                         f"(looked for {', '.join(WAVE_COLUMN_NAMES)})")
    col = table[wcol]
    wave = (col.quantity.to_value("Angstrom") if getattr(col, "unit", None) is not None
            else np.asarray(col, dtype=float))
    names = [c for c in table.colnames if c != wcol]
    if not names:
        raise ValueError(f"kcorrect.templates: {path} has no template columns")
    flux = np.array([np.asarray(table[c], dtype=float) for c in names])
    meta = dict(table.meta)
    meta.setdefault("file", str(path))
    meta["file_sha256"] = hashlib.sha256(path.read_bytes()).hexdigest()
    try:
        return Templates(wave=wave, flux_lambda=flux, names=tuple(names), meta=meta)
    except ValueError as exc:
        raise ValueError(f"kcorrect.templates: {path}: {exc}") from exc


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
    difference), None when no colour pair is configured; ``colour_sign`` is +1
    when colour increases with template index, -1 when it decreases.
    """

    z: np.ndarray
    k: dict
    names: tuple[str, ...]
    colour: np.ndarray | None = None
    colour_pair: tuple[str, str] | None = None
    meta: dict = field(default_factory=dict)

    def __post_init__(self):
        z = np.asarray(self.z, dtype=float)
        if z.ndim != 1 or z.size < 2:
            raise ValueError("kcorrect grid: z must have >= 2 points")
        step = np.diff(z)
        if not np.all(step > 0) or not np.allclose(step, step[0], rtol=1e-6, atol=0):
            raise ValueError("kcorrect grid: z must be uniform and increasing")
        object.__setattr__(self, "z", z)
        object.__setattr__(self, "names", tuple(str(n) for n in self.names))
        shape = (len(self.names), z.size)
        k = {str(b): np.asarray(v, dtype=float) for b, v in self.k.items()}
        for b, v in k.items():
            if v.shape != shape:
                raise ValueError(f"kcorrect grid: K for band {b} has shape {v.shape}, expected {shape}")
        object.__setattr__(self, "k", k)
        if self.colour is not None:
            c = np.asarray(self.colour, dtype=float)
            if c.shape != shape:
                raise ValueError(f"kcorrect grid: colour has shape {c.shape}, expected {shape}")
            object.__setattr__(self, "colour", c)
            object.__setattr__(self, "colour_pair", tuple(self.colour_pair))

    @property
    def dz(self) -> float:
        return float((self.z[-1] - self.z[0]) / (self.z.size - 1))

    @property
    def colour_sign(self) -> float:
        if self.colour is None or len(self.names) < 2:
            return 1.0
        return 1.0 if self.colour[-1, 0] > self.colour[0, 0] else -1.0

    def index(self, name: str) -> int:
        if name not in self.names:
            raise ValueError(f"kcorrect.default_template: '{name}' is not a template "
                             f"(allowed: {', '.join(self.names)})")
        return self.names.index(name)

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
            meta_json=np.array(json.dumps(self.meta, sort_keys=True, default=str)),
        )

    @classmethod
    def from_file(cls, path: str | Path) -> KGrid:
        with reading_grid(path), np.load(path, allow_pickle=False) as d:
            bands = [str(b) for b in d["bands"]]
            colour = d["colour"] if d["colour"].size else None
            pair = tuple(str(c) for c in d["colour_pair"]) or None
            return cls(z=d["z"], k={b: d["k"][i] for i, b in enumerate(bands)},
                       names=tuple(str(n) for n in d["names"]), colour=colour,
                       colour_pair=pair, meta=json.loads(str(d["meta_json"])))


def grid_redshifts(z_min: float, z_max: float, dz: float) -> np.ndarray:
    """The K(z) grid's redshifts; ValueError naming the config key if dz does not divide the span."""
    if not (np.isfinite(z_min) and np.isfinite(z_max) and z_min > -1 and z_max > z_min):
        raise ValueError(f"kcorrect.z_max: need -1 < z_min < z_max (got {z_min}, {z_max})")
    n = (z_max - z_min) / dz
    if not (dz > 0 and abs(n - round(n)) < 1e-6 and round(n) >= 1):
        raise ValueError(f"kcorrect.dz: must be > 0 and divide z_max - z_min (got dz = {dz}, "
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
    The colour must be strictly monotonic along the template sequence at every
    grid redshift (else ValueError: the pair cannot rank the templates).
    """
    z = grid_redshifts(z_min, z_max, dz)
    offsets = dict(ab_minus_vega or {})
    if colour_pair is not None:
        colour_pair = tuple(colour_pair)
        if len(colour_pair) != 2 or any(c not in filters for c in colour_pair) or colour_pair[0] == colour_pair[1]:
            raise ValueError(f"kcorrect.colour_pair: needs two different configured bands "
                             f"(allowed: {', '.join(filters)}; got {colour_pair})")
        if len(templates.names) < 2:
            raise ValueError("kcorrect.colour_pair: colour matching needs >= 2 templates")
    for label, filt in filters.items():
        lo, hi = filt.wavelength[0] / (1 + z_max), filt.wavelength[-1] / (1 + z_min)
        if templates.wave[0] > lo or templates.wave[-1] < hi:
            raise ValueError(f"kcorrect.templates: rest wavelengths {templates.wave[0]:.0f}-"
                             f"{templates.wave[-1]:.0f} A do not cover band '{label}' at "
                             f"{z_min} <= z <= {z_max} (needs {lo:.0f}-{hi:.0f} A)")
    k = {label: k_correction(filt, templates.wave, templates.flux_lambda, z)
         for label, filt in filters.items()}
    colour = None
    if colour_pair is not None:
        blue, red = colour_pair
        colour = (model_colour_ab(filters[blue], filters[red], templates.wave, templates.flux_lambda, z)
                  - (float(offsets.get(blue, 0.0)) - float(offsets.get(red, 0.0))))
        step = np.diff(colour, axis=0)
        if not (np.all(step > 0) or np.all(step < 0)):
            bad = z[~(np.all(step > 0, axis=0) | np.all(step < 0, axis=0))]
            raise ValueError(f"kcorrect.colour_pair: model colour {blue}-{red} is not monotonic "
                             f"along the templates ({', '.join(templates.names)}) at z = "
                             f"{bad.min():.3f}..{bad.max():.3f}; choose a pair that ranks them")
    meta = {
        "definition": "Hogg et al. 2002 (astro-ph/0210394) eq. 13, same band in and out",
        "filters": {b: getattr(f, "name", str(b)) for b, f in filters.items()},
        "colour_pair": list(colour_pair) if colour_pair else None,
        "ab_minus_vega": {b: float(offsets.get(b, 0.0)) for b in filters},
        "templates_file": templates.meta.get("file"),
        "templates_sha256": templates.meta.get("file_sha256"),
    }
    return KGrid(z=z, k=k, names=templates.names, colour=colour, colour_pair=colour_pair, meta=meta)


# ------------------------------------------------------------- per galaxy


def _z_index(grid: KGrid, z: np.ndarray):
    """Lower grid index, weight and validity of each redshift on the uniform grid."""
    nz = grid.z.size
    u = (z - grid.z[0]) / grid.dz
    tol = 1e-9
    valid = np.isfinite(u) & (u >= -tol) & (u <= nz - 1 + tol)
    u = np.where(valid, np.clip(u, 0.0, nz - 1), 0.0)
    i = np.minimum(np.floor(u).astype(np.intp), nz - 2)
    return i, u - i, valid


def _interp_z(table: np.ndarray, t: np.ndarray, i: np.ndarray, w: np.ndarray) -> np.ndarray:
    """table[t, z] at integer template rows t and fractional grid positions i + w."""
    flat = table.ravel()
    base = t * table.shape[1] + i
    return flat[base] * (1.0 - w) + flat[base + 1] * w


def evaluate(grid: KGrid, z, template) -> tuple[dict, np.ndarray | None]:
    """K per band and the model colour at redshifts ``z`` and fractional template indices.

    The forward direction of ``assign`` (same interpolation in z and between the two
    neighbouring templates): assign(grid, z, colour) on the returned colour gives
    back ``template``. NaN where z is outside the grid.
    """
    z = np.asarray(z, dtype=float).ravel()
    tpl = np.clip(np.asarray(template, dtype=float).ravel(), 0.0, len(grid.names) - 1)
    i, w, zvalid = _z_index(grid, z)
    nt = len(grid.names)
    t_lo = np.minimum(np.floor(tpl).astype(np.intp), max(nt - 2, 0))
    t_hi = np.minimum(t_lo + 1, nt - 1)
    a = tpl - t_lo

    def at(table):
        v = _interp_z(table, t_lo, i, w) * (1.0 - a) + _interp_z(table, t_hi, i, w) * a
        v[~zvalid] = np.nan
        return v

    k = {band: at(table) for band, table in grid.k.items()}
    return k, (at(grid.colour) if grid.colour is not None else None)


def assign(grid: KGrid, z, colour_obs, default_template: str, clip_tolerance: float = 0.0) -> dict:
    """Per-galaxy K-corrections by template colour matching.

    ``z``: heliocentric (observed) redshift. ``colour_obs``: observed colour
    m_blue - m_red of the grid's colour pair, Galactic-extinction corrected, in
    the catalog's systems; None to use ``default_template`` for every row
    without a flag (single-template mode). ``default_template``: the template
    name used where the colour is NaN (ValueError if unknown). Each galaxy gets the fractional template index where the
    model colour at its z equals its colour, and K linearly interpolated between
    the two neighbouring templates and in z.

    Returns ``K_<band>`` per band, ``kcorr_template`` (fractional index along
    the passive -> star-forming sequence) and ``kcorr_flags`` (KCorr bits):
    COLOR_CLIPPED (colour outside the template range by more than
    ``clip_tolerance`` mag, end template used; closer than that the end template
    is used without a flag, since photometric noise alone puts galaxies there),
    COLOR_MISSING (NaN colour, default template used), Z_BEYOND_GRID (z NaN or
    outside the grid: K and template NaN).
    """
    z = np.asarray(z, dtype=float).ravel()
    n = z.size
    nt = len(grid.names)
    default_index = grid.index(default_template)
    out_flags = fl.new(n)
    i, w, zvalid = _z_index(grid, z)

    if colour_obs is None or grid.colour is None:
        if colour_obs is not None:
            raise ValueError("kcorrect.colour_pair: a colour was given but the grid has no colour pair")
        tpl = np.full(n, float(default_index))
    else:
        c = np.asarray(colour_obs, dtype=float).ravel()
        if c.size != n:
            raise ValueError(f"kcorrect: colour_obs has {c.size} rows, z has {n}")
        s = grid.colour_sign  # orient so the model colour increases with index
        sc = s * c
        count = np.zeros(n, dtype=np.intp)
        for t in range(nt):  # loop over the few templates, not over galaxies
            ct = _interp_z(grid.colour, np.full(n, t, dtype=np.intp), i, w)
            count += (s * ct <= sc)
        lo = np.clip(count - 1, 0, nt - 2)
        c_lo = s * _interp_z(grid.colour, lo, i, w)
        c_hi = s * _interp_z(grid.colour, lo + 1, i, w)
        frac = (sc - c_lo) / (c_hi - c_lo)
        missing = ~np.isfinite(c)
        beyond = np.where(frac < 0.0, c_lo - sc, np.where(frac > 1.0, sc - c_hi, 0.0))
        clipped = ~missing & (beyond > clip_tolerance)
        tpl = lo + np.clip(frac, 0.0, 1.0)
        tpl[missing] = float(default_index)
        fl.set_where(out_flags, clipped, KCorr.COLOR_CLIPPED)
        fl.set_where(out_flags, missing, KCorr.COLOR_MISSING)

    fl.set_where(out_flags, ~zvalid, KCorr.Z_BEYOND_GRID)
    k, _ = evaluate(grid, z, tpl)
    out = {f"K_{band}": values for band, values in k.items()}
    tpl = tpl.astype(float)
    tpl[~zvalid] = np.nan
    out["kcorr_template"] = tpl
    out["kcorr_flags"] = out_flags
    return out
