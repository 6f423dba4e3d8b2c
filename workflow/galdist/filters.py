"""Filter curves and photon-counting synthetic photometry.

Curves come from speclite by name (e.g. ``bessell-V``, ``twomass-Ks``,
``sdss2010-r``) or from a user file (ECSV, CSV or FITS table) with a wavelength
column in Angstrom and a throughput column. Band averages are photon-counting:
<f> = int f_lambda R lambda dlambda / int R lambda dlambda.
Shared by the extinction and K-correction stages.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    import speclite.filters as sf

WAVE_COLUMNS = ("wavelength", "wave", "lambda", "wavelength_angstrom")
THROUGHPUT_COLUMNS = ("throughput", "response", "transmission", "trans")


class FilterError(ValueError):
    """A filter name or file cannot be used; the message says which and why."""


def _pick(names, wanted, what, path):
    lower = {n.lower(): n for n in names}
    for w in wanted:
        if w in lower:
            return lower[w]
    raise FilterError(f"filter file {path}: no {what} column (looked for {', '.join(wanted)}; "
                      f"found {', '.join(names)})")


def load_filter(spec: str, base_dir: str | Path | None = None) -> sf.FilterResponse:
    """A speclite ``FilterResponse`` from a speclite name or a local file path."""
    # imported here: only the once-per-configuration jobs load filter curves, and
    # speclite with astropy.table would add ~0.5 s to every per-shard job
    import speclite.filters as sf
    from astropy.table import Table

    path = Path(spec)
    if base_dir is not None and not path.is_absolute():
        path = Path(base_dir) / path
    if path.suffix and path.exists():
        table = Table.read(path, format="ascii.csv" if path.suffix == ".csv" else None)
        wcol = _pick(table.colnames, WAVE_COLUMNS, "wavelength", path)
        tcol = _pick(table.colnames, THROUGHPUT_COLUMNS, "throughput", path)
        wave = np.asarray(table[wcol], dtype=float)
        resp = np.clip(np.asarray(table[tcol], dtype=float), 0.0, None)
        order = np.argsort(wave)
        wave, resp = wave[order], resp[order]
        if wave.size < 3 or not np.all(np.diff(wave) > 0) or not np.any(resp > 0):
            raise FilterError(f"filter file {path}: needs >= 3 increasing wavelengths and a positive throughput")
        step = np.min(np.diff(wave))
        wave = np.concatenate([[wave[0] - step], wave, [wave[-1] + step]])
        resp = np.concatenate([[0.0], resp, [0.0]])
        band = re.sub(r"[^A-Za-z0-9]", "", path.stem) or "band"
        return sf.FilterResponse(wavelength=wave, response=resp,
                                 meta=dict(group_name="userfile", band_name=band))
    if path.suffix and not path.exists() and ("/" in spec or "\\" in spec or path.suffix in {".ecsv", ".csv", ".fits", ".dat", ".txt"}):
        raise FilterError(f"filter file {path} does not exist")
    try:
        return sf.load_filter(spec)
    except Exception as exc:  # speclite raises several kinds for unknown names
        raise FilterError(f"'{spec}' is neither a speclite filter name (like 'bessell-V', "
                          f"'twomass-Ks', 'sdss2010-r') nor an existing file") from exc


def band_average(filt: sf.FilterResponse, wave: np.ndarray, flux: np.ndarray) -> np.ndarray:
    """Photon-counting band average of f_lambda over the last axis.

    ``wave`` (Angstrom, increasing) must cover the filter. ``flux`` may be
    (..., n_wave) for many spectra at once.
    """
    wave = np.asarray(wave, dtype=float)
    flux = np.asarray(flux, dtype=float)
    lo, hi = filt.wavelength[0], filt.wavelength[-1]
    if wave[0] > lo or wave[-1] < hi:
        raise FilterError(f"spectrum ({wave[0]:.0f}-{wave[-1]:.0f} A) does not cover filter "
                          f"{filt.name} ({lo:.0f}-{hi:.0f} A)")
    sel = (wave >= lo) & (wave <= hi)
    # include the filter's own sample points so narrow or sharp curves are resolved
    grid = np.union1d(wave[sel], filt.wavelength)
    resp = np.interp(grid, filt.wavelength, filt.response, left=0.0, right=0.0)
    # linear interpolation of every spectrum at once (np.interp's formula, weights shared)
    j = np.clip(np.searchsorted(wave, grid, side="right") - 1, 0, wave.size - 2)
    t = (grid - wave[j]) / (wave[j + 1] - wave[j])
    f = flux[..., j] * (1.0 - t) + flux[..., j + 1] * t
    weight = resp * grid
    return np.trapezoid(f * weight, grid, axis=-1) / np.trapezoid(weight, grid)


def effective_wavelength(filt: sf.FilterResponse) -> float:
    """speclite's photon-weighted effective wavelength of the filter, in Angstrom."""
    return float(filt.effective_wavelength.to_value("Angstrom"))


def load_bands(bands: dict, base_dir: str | Path | None = None) -> dict[str, sf.FilterResponse]:
    """Filter curves of the configured bands: label -> FilterResponse."""
    return {label: load_filter(band["filter"], base_dir) for label, band in bands.items()}
