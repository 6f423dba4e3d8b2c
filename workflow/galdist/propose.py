"""A proposed run configuration for a catalog (``galdist init``).

Reads the file's header and a sample of its rows, maps its columns onto galdist's
canonical names from common spellings, guesses units from the sample values and
picks bands, methods and shipped calibrations the catalog can feed. Every guess goes
into the written file with a comment saying what was guessed and why: nothing is
guessed at run time.
"""

from __future__ import annotations

import datetime as _dt
import json
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa

from . import shipped
from .catalog import describe, detect_format, iter_batches

SAMPLE_ROWS = 10_000
C_KMS = 299792.458

# --- names ------------------------------------------------------------------------------

#: canonical name -> usual spellings, best first (lower case, runs of other characters as "_")
ALIASES = {
    "galaxy_id": ["galaxy_id", "obj_name", "name", "galaxy", "galaxy_name", "object", "objid",
                  "obj_id", "id", "pgc", "pgc_id", "pgcid", "pgc_no", "designation", "source_id"],
    "ra": ["ra", "raj2000", "ra_j2000", "ra2000", "ra_deg", "radeg", "ra_icrs", "alpha", "alpha_j2000"],
    "dec": ["dec", "dej2000", "de_j2000", "decj2000", "dec_j2000", "dec2000", "decl", "delta", "dec_deg",
            "decdeg", "de_deg", "dedeg", "de", "dec_icrs", "delta_j2000"],
    "z_helio": ["z_helio", "zhelio", "z_hel", "zhel", "z", "redshift", "z_spec", "zspec", "cz", "cz_helio",
                "czhel", "cz_hel", "vhel", "v_hel", "v_helio", "vhelio", "velocity", "vh", "vel", "vsys", "v_sys"],
    "ebv": ["ebv", "e_b_v", "ebmv", "e_bv", "eb_v", "ebv_sfd", "sfd_ebv", "ebv_sfd98", "ebv_sf11", "ebv_mw",
            "mw_ebv", "ebv_gal"],
    "w50": ["w50", "w50_hi", "w50hi", "whi", "w_hi", "hi_w50", "w_50", "w50_obs", "w50obs", "width"],
    "w20": ["w20", "w20_hi", "w20hi", "w_20", "hi_w20"],
    "axis_ratio": ["axis_ratio", "axisratio", "ba", "b_a", "q", "b2a", "bovera", "b_over_a", "a_b", "ab"],
    "sbf_mag": ["sbf_mag", "sbfmag", "sbf", "mbar", "m_bar", "m_sbf", "msbf", "sbf_m", "fluct_mag"],
    "sbf_color": ["sbf_color", "sbf_colour", "sbfcolor", "color", "colour"],
    "hi_flux": ["hi_flux", "hiflux", "fhi", "f_hi", "flux_hi", "fluxhi", "sint", "s_int", "hi_sint", "shi", "s_hi"],
    "w50_resolution": ["w50_resolution", "resolution", "vres", "v_res", "velocity_resolution", "dv_res"],
    "galaxy_class": ["galaxy_class", "class", "morph", "morphology", "type", "mtype", "morph_type",
                     "hubble_type", "gal_type", "galtype"],
    # Fundamental Plane: dispersion, effective radius, mean surface brightness within it, aperture
    "fp_sigma": ["fp_sigma", "sigma", "sigma0", "sigma_0", "sigma_ap", "vdisp", "veldisp", "vel_disp",
                 "velocity_dispersion", "vel_dispersion", "disp"],
    "fp_re_arcsec": ["fp_re_arcsec", "re", "r_e", "reff", "r_eff", "re_arcsec", "r_e_arcsec", "half_light_radius",
                     "r_half", "rhalf"],
    "fp_mu_e": ["fp_mu_e", "mu_e", "mue", "mean_mu_e", "mu_e_mean", "sb_e", "sbe", "mean_sb_e"],
    "fp_mag": ["fp_mag"],
    "fp_aperture_arcsec": ["fp_aperture_arcsec", "aperture", "aperture_arcsec", "r_ap", "rap", "r_aperture",
                           "aperture_radius", "fibre_radius", "fiber_radius"],
    **{c: [c] for c in ("fp_re_mu_corr", "fp_re_mag_corr", "fp_sigma_re_corr", "fp_sigma_mu_corr")},
}
#: canonical columns that have an error column, and its name
ERROR_OF = {"z_helio": "z_helio_err", "ebv": "ebv_err", "w50": "w50_err", "w20": "w20_err",
            "axis_ratio": "axis_ratio_err", "sbf_mag": "sbf_mag_err", "sbf_color": "sbf_color_err",
            "fp_sigma": "fp_sigma_err", "fp_re_arcsec": "fp_re_err", "fp_mu_e": "fp_mu_e_err", "fp_mag": "fp_mag_err"}
TEXT_ROLES = ("galaxy_id", "galaxy_class")

#: a band letter as written in a column name -> band label (case matters: i is SDSS, I Cousins)
BAND_TOKENS = {"u": "u", "g": "g", "r": "r", "i": "i", "z": "z", "G": "g", "Z": "z",
               "U": "U", "B": "B", "V": "V", "R": "R", "I": "I", "b": "B", "v": "V",
               "J": "J", "H": "H", "K": "Ks", "Ks": "Ks", "KS": "Ks", "ks": "Ks", "k": "Ks", "j": "J", "h": "H"}
#: bands from blue to red
BAND_ORDER = ["u", "U", "B", "g", "V", "r", "R", "i", "I", "z", "J", "H", "Ks"]
_AB_MINUS_VEGA = "Blanton & Roweis 2007, AJ 133, 734, Table 1 (secondary copy)"
#: band label -> (speclite filter, system, m_AB - m_Vega, what that is)
BANDS = {
    **{b: (f"sdss2010-{b}", "AB", None, "SDSS") for b in "ugriz"},
    "U": ("bessell-U", "Vega", 0.79, "Johnson-Cousins"), "B": ("bessell-B", "Vega", None, "Johnson-Cousins"),
    "V": ("bessell-V", "Vega", 0.02, "Johnson-Cousins"), "R": ("bessell-R", "Vega", 0.21, "Johnson-Cousins"),
    "I": ("bessell-I", "Vega", 0.45, "Johnson-Cousins"),
    "J": ("twomass-J", "Vega", 0.91, "2MASS"), "H": ("twomass-H", "Vega", 1.39, "2MASS"),
    "Ks": ("twomass-Ks", "Vega", 1.85, "2MASS"),
}
#: Tully-Fisher band -> shipped calibration
TF_CALIBRATIONS = {"I": "tf_i_tully_courtois_2012", "Ks": "tf_ks_masters_2008"}
#: SBF (band, blue, red) -> shipped calibration
SBF_CALIBRATIONS = {("I", "V", "I"): "sbf_tonry1997_cousins_i"}
#: Fundamental-Plane band -> shipped calibration
FP_CALIBRATIONS = {"J": "fp_j_magoulas_2012", "r": "fp_r_bernardi_2003"}
KCORR_PAIRS = [("V", "I"), ("g", "r"), ("g", "i"), ("r", "i"), ("V", "R"), ("g", "z"), ("R", "I"), ("J", "Ks")]

_BAND = r"(?P<b>Ks|KS|ks|[ugrizGZUBVRIbvJHKjhk])"
_MAG_PATTERNS = [re.compile(rf"^(?i:mag)[_\-. ]?{_BAND}$"), re.compile(rf"^{_BAND}[_\-. ]?(?i:mag)$"),
                 re.compile(rf"^(?i:m)_{_BAND}$"), re.compile(r"^(?P<b>J|H|K|Ks|KS)$")]
_COLOUR = re.compile(r"^(?:(?i:sbf|col|color|colour)[_\-. ]?)?(?P<a>[UBVRIugrizbvJHK])\s*[_\-−]\s*"
                     r"(?P<c>[UBVRIugrizJHK]|Ks)$")
_SBF_BAND = re.compile(r"^(?i:m_?bar|sbf(?:_?mag)?)[_\-. ]?(?P<b>[UBVRIugrizJHK]|Ks)$")
_FP_SB_BAND = re.compile(r"^(?i:mu_?e|sb_?e|mean_?mu_?e)[_\-. ]?(?P<b>[UBVRIugrizJHK]|Ks)$")
_ERR_PREFIX = re.compile(r"^(?:(?i:e|err|error|sigma|sig|unc)[_\-. ]+|e(?=[A-Z]))")
_ERR_SUFFIX = re.compile(r"(?:[_\-. ]?(?i:err|error)|[_\-. ](?i:e|sigma|sig|unc))$")
_LOG = re.compile(r"^(?:log|lg)", re.I)


def norm(name: str) -> str:
    """Lower case, every run of other characters as one "_", none at the ends."""
    return re.sub(r"[^0-9a-z]+", "_", name.strip().lower()).strip("_")


@dataclass(frozen=True)
class Match:
    role: str  # canonical name (w20 for a W20 width; mag_<band>, sbf_color)
    rank: int  # lower is a more usual spelling
    why: str
    colour: tuple[str, str] | None = None
    sbf_band: str | None = None  # also the band of a mean surface brightness (fp_mu_e)


def _band(token: str) -> str | None:
    return BAND_TOKENS.get(token)


def match_name(name: str) -> Match | None:
    """What a column is, from its name alone (None if it looks like nothing we know)."""
    n = norm(name)
    if _LOG.match(n):
        return None  # a log width or log axis ratio is not w50 or b/a
    for role, spellings in ALIASES.items():
        if n in spellings:
            return Match(role, spellings.index(n), f"'{name}' is a usual spelling of {role}")
    if re.fullmatch(r"pgc_?\d*|pgc_?(?:num|nr)", n):
        return Match("galaxy_id", 20, f"'{name}' looks like a PGC number")
    for i, pattern in enumerate(_MAG_PATTERNS):
        m = pattern.match(name.strip())
        if m and _band(m["b"]):
            return Match(f"mag_{_band(m['b'])}", i, f"'{name}' reads as a magnitude in {_band(m['b'])}")
    m = _SBF_BAND.match(name.strip())
    if m and _band(m["b"]):
        return Match("sbf_mag", 5, f"'{name}' reads as a fluctuation magnitude in {_band(m['b'])}",
                     sbf_band=_band(m["b"]))
    m = _FP_SB_BAND.match(name.strip())
    if m and _band(m["b"]):
        return Match("fp_mu_e", 5, f"'{name}' reads as the mean surface brightness within R_e in {_band(m['b'])}",
                     sbf_band=_band(m["b"]))
    m = _COLOUR.match(name.strip())
    if m and _band(m["a"]) and _band(m["c"]) and (m["a"], m["c"]) != ("b", "a"):
        a, c = m["a"], m["c"]
        if a in "vVbB" or c in "vVbB":  # a Johnson letter: the other one is Cousins too (v_i is V-I)
            a, c = a.upper(), c.upper()
        return Match("sbf_color", 3, f"'{name}' reads as the colour {_band(a)} - {_band(c)}",
                     colour=(_band(a), _band(c)))
    return None


def match_error(name: str) -> tuple[Match, str] | None:
    """(match of the base, the error's canonical name) for a column named like an error."""
    name = name.strip()
    for base in (_ERR_PREFIX.sub("", name, count=1), _ERR_SUFFIX.sub("", name)):
        if not base or base == name:
            continue
        m = match_name(base)
        if m is None:
            continue
        if m.role.startswith("mag_"):
            return m, f"{m.role}_err"
        if m.role in ERROR_OF:
            return m, ERROR_OF[m.role]
    return None


# --- sample values ----------------------------------------------------------------------

def numbers(values) -> tuple[np.ndarray, float]:
    """(float values with NaN where missing or not a number, fraction of present values that are numbers)."""
    if isinstance(values, (pa.Array, pa.ChunkedArray)):
        t = values.type
        if pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t):
            v = np.asarray(values.cast(pa.float64()).to_numpy(zero_copy_only=False), dtype=float)
            return v, 1.0
        values = np.asarray(values.to_pylist(), dtype=object)
    arr = np.asarray(values)
    if arr.dtype.kind in "iufb":
        return arr.astype(float), 1.0
    s = pd.Series(arr, dtype=object)
    if len(s) and isinstance(s.iloc[0], bytes):
        s = s.str.decode("utf-8", "replace")
    text = s.where(s.notna(), "").astype(str).str.strip()
    num = pd.to_numeric(text.where(text != "", None), errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    present = int((text != "").sum())
    return num, (float(np.isfinite(num).sum()) / present if present else 1.0)


def _texts(values) -> list:
    if isinstance(values, (pa.Array, pa.ChunkedArray)):
        return values.to_pylist()
    return [v.decode("utf-8", "replace") if isinstance(v, bytes) else v for v in np.asarray(values).tolist()]


def _fmt(x: float) -> str:
    return f"{x:.4g}"


# --- the proposal -----------------------------------------------------------------------

@dataclass
class Entry:
    """One proposed value and the comment that goes beside it."""

    value: object
    why: str


@dataclass
class Proposal:
    catalog: str
    fmt: str
    fmt_why: str
    run: str
    output_dir: str = "galdist-results"
    columns: dict[str, Entry] = field(default_factory=dict)
    units: dict[str, Entry] = field(default_factory=dict)
    bands: dict[str, dict] = field(default_factory=dict)
    methods: list[str] = field(default_factory=list)
    methods_why: str = ""
    sections: dict[str, list[tuple[str, object, str]]] = field(default_factory=dict)
    unused: list[str] = field(default_factory=list)
    todo: list[str] = field(default_factory=list)
    n_sample: int = 0


def run_name(path: str) -> str:
    """A run name from the catalog's file name (letters, digits, _ . -)."""
    stem = Path(path.rstrip("/")).name.split(".")[0]
    name = re.sub(r"[^A-Za-z0-9_.-]+", "_", stem).strip("_.-")
    return name[:100] if name else "mine"


def propose(catalog: str, run: str | None = None, output_dir: str = "galdist-results") -> Proposal:
    """Read ``catalog``'s header and first rows; return the proposed configuration."""
    fmt = detect_format(catalog)
    fmt_why = ("a directory: a Parquet dataset" if Path(catalog).is_dir()
               else f"detected from the file name ({Path(catalog).name})")
    declared = describe(catalog, fmt)
    names = list(declared)
    sample = next(iter(iter_batches(catalog, fmt, names, SAMPLE_ROWS)), None) or {}
    p = Proposal(catalog=catalog, fmt=fmt, fmt_why=fmt_why, run=run or run_name(catalog), output_dir=output_dir)
    p.n_sample = len(next(iter(sample.values()))) if sample else 0

    # 1. names: every column that looks like a canonical one, best spelling wins
    found: dict[str, list[tuple[int, str, Match]]] = {}
    ignored = []
    for name in names:
        m = match_name(name)
        role = m.role if m else None
        if m is None:
            e = match_error(name)
            if e is not None:
                m, role = e[0], e[1]
                m = Match(role, m.rank, f"'{name}' reads as the error of {m.role}", m.colour, m.sbf_band)
        if m is None:
            if _LOG.match(norm(name)):
                p.unused.append(f"{name}: a logarithm (log width? log a/b?): not mapped, galdist reads linear "
                                "w50 (km/s) and b/a")
            else:
                ignored.append(name)
            continue
        found.setdefault(role, []).append((m.rank, name, m))
    values = {name: numbers(sample[name]) for name in names if name in sample}

    chosen: dict[str, tuple[str, Match]] = {}
    for role, cands in found.items():
        cands.sort(key=lambda c: c[0])
        usable = []
        for _, name, m in cands:
            if role not in TEXT_ROLES and name in values and values[name][1] < 0.5:
                p.unused.append(f"{name}: named like {role} but holds text")
                continue
            usable.append((name, m))
        if role == "galaxy_id" and usable:
            usable.sort(key=lambda nm: not _unique(sample.get(nm[0])))
        if usable:
            chosen[role] = usable[0]
            p.unused += [f"{name}: also looks like {role}; '{usable[0][0]}' was preferred" for name, _ in usable[1:]]
    if "galaxy_id" not in chosen:
        for name in names:
            if declared[name].kind in ("text", "unknown") and values.get(name, (None, 1.0))[1] < 0.5 \
                    and _unique(sample.get(name)):
                chosen["galaxy_id"] = (name, Match("galaxy_id", 99, f"'{name}' is the first text column with "
                                                                     "unique values in the sample"))
                break
    if "w50" not in chosen and "w20" in chosen:  # only a W20: it is the width, and config says so
        chosen["w50"] = chosen.pop("w20")
        if "w20_err" in chosen:
            chosen["w50_err"] = chosen.pop("w20_err")
        p.sections.setdefault("tully_fisher", []).append(
            ("width_definition", "w20", f"the width column '{chosen['w50'][0]}' is named as a W20"))
    for role in ("w20", "w20_err"):
        if role in chosen:
            p.unused.append(f"{chosen.pop(role)[0]}: a W20 width; the W50 column is used")
    p.unused += [f"{name}: not recognised, not read" for name in ignored]

    # 2. values: units and sanity of what the names suggest
    def vals(role):
        return values[chosen[role][0]][0] if role in chosen and chosen[role][0] in values else np.array([])

    def finite(role):
        v = vals(role)
        return v[np.isfinite(v)]

    def declared_unit(role):
        return declared[chosen[role][0]].unit if role in chosen else None

    def set_unit(role, unit, why):
        if role in chosen:
            p.units[role] = Entry(unit, why)

    for role in ("z_helio", "ra", "dec", "w50", "axis_ratio", "w50_resolution"):
        if role in chosen and declared_unit(role):
            p.units.setdefault(role, Entry(None, f"the file declares '{declared_unit(role)}' for "
                                                 f"'{chosen[role][0]}'; galdist converts from it"))
    n = p.n_sample
    z = finite("z_helio")
    if z.size and "z_helio" not in p.units:
        med = float(np.median(z))
        if med > C_KMS:
            unit = "m/s"
        elif med > 1:
            unit = "km/s"
        else:
            unit = None
        if unit:
            why = (f"median of '{chosen['z_helio'][0]}' in the first {n} rows is {_fmt(med)} > 1: a velocity "
                   f"in {unit} (converted with z = v/c)")
            set_unit("z_helio", unit, why)
            set_unit("z_helio_err", unit, f"as z_helio ('{chosen['z_helio'][0]}' is a velocity)")
    ra, dec = finite("ra"), finite("dec")
    if ra.size and "ra" not in p.units:
        dmax = float(np.abs(dec).max()) if dec.size else 0.0
        if ra.max() <= 2 * np.pi and dmax <= np.pi / 2:
            set_unit("ra", "rad", f"'{chosen['ra'][0]}' is within 2 pi and dec within pi/2 in the first {n} rows: "
                                  "radians")
            set_unit("dec", "rad", "radians, as ra")
        elif ra.max() <= 24 and (dmax > 24 or ra.max() > 2 * np.pi):
            set_unit("ra", "hourangle", f"'{chosen['ra'][0]}' stays within 0-24 (max {_fmt(ra.max())}) while |dec| "
                                        f"reaches {_fmt(dmax)}: hours")
    w = finite("w50")
    if w.size:
        med = float(np.median(w))
        if med < 4:
            p.unused.append(f"{chosen['w50'][0]}: named like a width but its median is {_fmt(med)}: "
                            "a log width? not mapped (w50 is the linear width)")
            chosen.pop("w50")
            chosen.pop("w50_err", None)
        elif med > 2000 and "w50" not in p.units:
            set_unit("w50", "m/s", f"median of '{chosen['w50'][0]}' is {_fmt(med)} > 2000: m/s, not km/s")
            set_unit("w50_err", "m/s", "as w50")
    res = finite("w50_resolution")
    if res.size and np.median(res) > 200 and "w50_resolution" not in p.units:
        set_unit("w50_resolution", "m/s", f"median {_fmt(np.median(res))} > 200: m/s, not km/s")
    q = finite("axis_ratio")
    if q.size and "axis_ratio" not in p.units:
        med = float(np.median(q))
        if med > 10 and q.max() <= 100:
            set_unit("axis_ratio", "percent", f"median of '{chosen['axis_ratio'][0]}' is {_fmt(med)}, max "
                                              f"{_fmt(q.max())}: b/a in per cent")
            set_unit("axis_ratio_err", "percent", "as axis_ratio")
        elif med > 1:
            p.todo.append(f"column '{chosen['axis_ratio'][0]}' (axis_ratio) has median {_fmt(med)} > 1: it holds a/b, "
                          "but galdist needs b/a in (0, 1] and has no a/b unit. Add a column b/a = 1/(a/b) "
                          "(and its error) to the file and map it; `galdist check` refuses a/b")

    # 3. bands: every magnitude found, plus the SBF calibration's filter-only bands
    mags = {role[4:] for role in chosen if role.startswith("mag_") and not role.endswith("_err")}
    for label in sorted(mags, key=BAND_ORDER.index):
        _add_band(p, label, f"magnitudes in '{chosen['mag_' + label][0]}'")
        if f"mag_{label}_err" not in chosen:
            p.todo.append(f"no error column found for '{chosen['mag_' + label][0]}' (mag_{label}); map one in "
                          f"columns: mag_{label}_err, or errors of this band are missing")

    # 4. methods
    has_tf = all(r in chosen for r in ("w50", "axis_ratio")) and bool(mags)
    has_sbf = all(r in chosen for r in ("sbf_mag", "sbf_color"))
    has_fp = all(r in chosen for r in ("fp_sigma", "fp_re_arcsec")) and ("fp_mu_e" in chosen or "fp_mag" in chosen)
    p.methods = [m for m, ok in (("tully_fisher", has_tf), ("sbf", has_sbf), ("fp", has_fp)) if ok]
    why = []
    why.append("tully_fisher: width, axis ratio and a magnitude found" if has_tf
               else "no tully_fisher: needs a width, an axis ratio and a magnitude")
    why.append("sbf: fluctuation magnitude and colour found" if has_sbf
               else "no sbf: needs a fluctuation magnitude and its colour")
    why.append("fp: velocity dispersion, effective radius and surface brightness found" if has_fp
               else "no fp: needs a velocity dispersion, an effective radius and <mu_e> (or a total magnitude)")
    p.methods_why = "; ".join(why)
    if has_tf:
        _tully_fisher(p, mags, chosen)
    if has_sbf:
        _sbf(p, chosen)
    if has_fp:
        _fundamental_plane(p, chosen)
    if not p.methods:
        p.todo.append("the catalog feeds no distance method (Tully-Fisher needs w50, axis_ratio and a magnitude; "
                      "SBF needs sbf_mag and sbf_color; the Fundamental Plane needs fp_sigma, fp_re_arcsec and "
                      "fp_mu_e): map the columns in 'columns' and list the methods")

    # 5. K-correction colour and extinction
    with_errors = [b for b in mags if f"mag_{b}_err" in chosen
                   and (p.bands[b]["system"] == "AB" or p.bands[b]["ab_minus_vega"] is not None)]
    pair = next((pr for pr in KCORR_PAIRS if set(pr) <= set(with_errors)), None)
    if pair is None and len(with_errors) >= 2:
        ordered = sorted(with_errors, key=BAND_ORDER.index)
        pair = (ordered[0], ordered[-1])
    if pair:
        p.sections["kcorr"] = [("colour_pair", list(pair),
                                   f"the {pair[0]} - {pair[1]} colour picks each galaxy's template (two bands with "
                                   "magnitudes and errors)")]
    else:
        p.sections["kcorr"] = [("colour_pair", None, "no two bands with magnitudes, errors and a known AB offset: "
                                   "every galaxy gets the default template (flagged COLOR_MISSING)")]
    if "ebv" in chosen:
        p.sections["extinction"] = [
            ("source", "catalog", f"E(B-V) from the column '{chosen['ebv'][0]}'"),
            ("ebv_scale", 0.86, "true E(B-V) = 0.86 x yours, right for values read from the 1998 (SFD) map; "
                                "set 1.0 if your values are already on the Schlafly & Finkbeiner 2011 scale")]
        if "ebv_err" not in chosen:
            p.unused.append(f"no error column for '{chosen['ebv'][0]}' (ebv): extinction errors omit it")
    else:
        p.sections["extinction"] = [
            ("source", "healpix", "no E(B-V) column found: a dust map is needed"),
            ("map_file", None, "TODO: path to a local HEALPix FITS map of E(B-V) (galdist never downloads one); "
                               "or source: zea with map_north and map_south")]
        p.todo.append("no E(B-V) column: set extinction.map_file to a local HEALPix E(B-V) map")

    # 5b. errors the run needs
    needed = ["galaxy_id", "ra", "dec", "z_helio", "z_helio_err"]
    if has_tf:
        needed += ["w50_err", "axis_ratio_err"]
    if has_sbf:
        needed += ["sbf_mag_err", "sbf_color_err"]
    if has_fp:
        needed += ["fp_sigma_err", "fp_re_err", "fp_mu_e_err" if "fp_mu_e" in chosen else "fp_mag_err"]
    for role in needed:
        if role not in chosen:
            p.todo.append(f"no column found for {role}: map yours in 'columns' (galdist needs it)")

    # 6. the column mapping to write: what the configured bands and methods read
    from .columns import BASE, OPTIONAL, band_columns, method_columns
    wanted = [c.name for c in BASE + OPTIONAL]
    for label in p.bands:
        wanted += [c.name for c in band_columns(label)]
    for m in p.methods:
        wanted += [c.name for c in method_columns(m)]
    for role in wanted:
        if role in chosen:
            name, m = chosen[role]
            p.columns[role] = Entry(name, m.why)
    for role, (name, _) in chosen.items():
        if role not in p.columns:
            p.unused.append(f"{name}: looks like {role}, which no configured method reads")
    p.units = {k: v for k, v in p.units.items() if k in p.columns}
    return p


def _unique(values) -> bool:
    if values is None:
        return False
    texts = [t for t in _texts(values) if t is not None and str(t).strip() != ""]
    return bool(texts) and len(set(map(str, texts))) == len(texts)


def _add_band(p: Proposal, label: str, why: str) -> None:
    if label in p.bands:
        return
    filt, system, offset, family = BANDS[label]
    note = f"{why}: {family} {label}, filter curve {filt}, {system} magnitudes"
    if label in "UBVRI":
        note += " (upper-case letter: Johnson-Cousins)"
    elif label in "ugriz":
        note += " (lower-case letter: SDSS)"
    if offset is not None:
        off_why = f"m_AB - m_Vega from {_AB_MINUS_VEGA}"
    elif system == "Vega":
        off_why = ("TODO: check m_AB - m_Vega for B (about 0.09 in size, sign uncertain here) and set it; "
                   "needed if B is used with AB templates or calibrations")
    else:
        off_why = "AB band: no conversion needed"
    p.bands[label] = {"filter": filt, "system": system, "ab_minus_vega": offset, "why": note, "offset_why": off_why}


def _tully_fisher(p: Proposal, mags: set, chosen: dict) -> None:
    band = next((b for b in ("I", "Ks") if b in mags), None)
    items = p.sections.setdefault("tully_fisher", [])
    if band:
        cal = TF_CALIBRATIONS[band]
        assert cal in shipped.names("calibrations"), cal
        items[:0] = [("calibration", cal, f"shipped calibration in {BANDS[band][3]} {band}, a band the catalog has"),
                     ("band", band, f"magnitudes of '{chosen['mag_' + band][0]}'")]
        return
    band = sorted(mags, key=BAND_ORDER.index)[-1]
    items[:0] = [("calibration", "my_tully_fisher_calibration.yaml",
                  f"TODO: no shipped Tully-Fisher calibration is in band {band} (shipped: Cousins I, 2MASS Ks): "
                  "write your own (copy one in galdist/data/calibrations) and give its path"),
                 ("band", band, f"the reddest band with magnitudes ('{chosen['mag_' + band][0]}')")]
    p.todo.append(f"tully_fisher.calibration: no shipped calibration fits band {band}; supply your own")


def _sbf(p: Proposal, chosen: dict) -> None:
    name, m = chosen["sbf_color"]
    blue, red = m.colour or ("V", "I")
    colour_why = (f"bands of the colour '{name}'" if m.colour
                  else f"'{name}' does not name its bands: V - I assumed (check it)")
    band = chosen["sbf_mag"][1].sbf_band or "I"
    band_why = (f"band in the name '{chosen['sbf_mag'][0]}'" if chosen["sbf_mag"][1].sbf_band
                else f"'{chosen['sbf_mag'][0]}' does not name its band: I assumed (check it)")
    for label in dict.fromkeys([band, blue, red]):
        _add_band(p, label, "filter curve for SBF (no magnitude column needed)")
    cal = SBF_CALIBRATIONS.get((band, blue, red))
    if cal:
        cal_why = f"shipped calibration for {band}-band fluctuations with a {blue} - {red} colour"
    else:
        cal = "my_sbf_calibration.yaml"
        cal_why = (f"TODO: no shipped SBF calibration uses band {band} with colour {blue} - {red} (shipped: "
                   "Cousins I with V - I; ACS and WFC3 bands): write your own and give its path")
        p.todo.append(f"sbf.calibration: no shipped calibration fits band {band}, colour {blue} - {red}")
    p.sections["sbf"] = [("calibration", cal, cal_why), ("band", band, band_why),
                         ("color_bands", [blue, red], colour_why)]


def _fundamental_plane(p: Proposal, chosen: dict) -> None:
    sb = chosen.get("fp_mu_e")
    band = sb[1].sbf_band if sb and sb[1].sbf_band else None
    band_why = (f"band in the name '{sb[0]}'" if band
                else "the surface-brightness column does not name its band: J assumed (check it)")
    band = band or "J"
    _add_band(p, band, "filter curve for the Fundamental Plane (no magnitude column needed)")
    cal = FP_CALIBRATIONS.get(band)
    if cal:
        assert cal in shipped.names("calibrations"), cal
        cal_why = f"shipped Fundamental-Plane calibration in {BANDS[band][3]} {band}"
    else:
        cal = "my_fp_calibration.yaml"
        cal_why = (f"TODO: no shipped Fundamental-Plane calibration is in band {band} (shipped: 2MASS J, SDSS r): "
                   "write your own and give its path")
        p.todo.append(f"fp.calibration: no shipped calibration fits band {band}; supply your own")
    p.sections["fp"] = [("calibration", cal, cal_why), ("band", band, band_why)]
    if "fp_aperture_arcsec" not in chosen:
        p.todo.append("no spectroscopic aperture column found (fp_aperture_arcsec, the radius in arcsec, e.g. half "
                      "a fibre's diameter): map it, or set fp.apply_aperture_correction: false if your "
                      "dispersions are already corrected to R_e/8")


# --- writing ----------------------------------------------------------------------------

_PLAIN = re.compile(r"^[A-Za-z_][A-Za-z0-9_.\-/]*$")
_YAML_WORDS = {"y", "n", "yes", "no", "on", "off", "true", "false", "null", "~"}


def scalar(value) -> str:
    """``value`` as a YAML flow scalar or list."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(scalar(v) for v in value) + "]"
    s = str(value)
    if _PLAIN.match(s) and s.lower() not in _YAML_WORDS:
        return s
    return json.dumps(s)


def _line(indent: int, key: str, value, why: str, width: int = 34) -> str:
    text = " " * indent + f"{scalar(key)}: {scalar(value)}"
    return f"{text:<{width}} # {why}" if why else text


def render(p: Proposal) -> str:
    """The proposal as commented YAML."""
    out = [
        f"# galdist run configuration proposed by `galdist init` from {p.catalog}",
        f"# on {_dt.date.today().isoformat()}, from its header and its first {p.n_sample} rows.",
        "# Every guessed value says so in its comment: read them, fix what is wrong, then",
        "#   galdist check <this file>     (every check that can run before a job)",
        "#   galdist run <this file>",
        "# Every key and its default: workflow/schemas/config.schema.yaml in the galdist checkout.",
        "",
        _line(0, "run", p.run, "products go to <output_dir>/<run>/ (from the catalog's file name)"),
        _line(0, "output_dir", p.output_dir, "relative to the folder you run `galdist run` in"),
        "",
        "catalog:",
        _line(2, "paths", [p.catalog], "relative to the folder you run galdist in, or absolute"),
        _line(2, "format", p.fmt, p.fmt_why),
        "",
        "# canonical name: your column (guessed from the names; galdist reads only these)",
    ]
    if p.columns:
        out.append("columns:")
        out += [_line(2, k, e.value, e.why) for k, e in p.columns.items()]
    else:
        out.append("columns: {}")
    for note in p.unused:
        out.append(f"#   note: {note}")
    out += ["", "# unit of YOUR column where it is not the canonical one (deg, km/s, b/a, mag);",
            "# guessed from the sample values"]
    units = {k: e for k, e in p.units.items() if e.value is not None}
    if units:
        out.append("units:")
        out += [_line(2, k, e.value, e.why) for k, e in units.items()]
    else:
        out.append("units: {}")
    out += [f"#   {k}: {e.why}" for k, e in p.units.items() if e.value is None]
    out += ["", "# columns of your catalog to pass through to distances.parquet as user_<name>, as read",
            "keep_columns: []"]
    out += ["", "# band label -> filter curve and photometric system; columns: mag_<label>, mag_<label>_err"]
    if p.bands:
        out.append("bands:")
        for label, b in p.bands.items():
            out += [f"  {scalar(label)}:{' ' * max(1, 31 - len(label))}# {b['why']}",
                    _line(4, "filter", b["filter"], ""),
                    _line(4, "system", b["system"], ""),
                    _line(4, "ab_minus_vega", b["ab_minus_vega"], b["offset_why"])]
    else:
        out += ["bands: {}  # TODO: no magnitude column recognised; add at least one band"]
    out += ["", _line(0, "methods", p.methods, p.methods_why)]
    for section in ("tully_fisher", "sbf", "fp", "kcorr", "extinction"):
        items = p.sections.get(section)
        if not items or (section in ("tully_fisher", "sbf", "fp") and section not in p.methods):
            continue
        out += ["", f"{section}:"]
        out += [_line(2, k, v, why) for k, v, why in items]
    out += ["", "# rows per shard (default 10^6): smaller shards make more, shorter jobs",
            "# shard_rows: 1000000"]
    if p.todo:
        out += ["", "# TODO before running:"] + [f"#   - {t}" for t in p.todo]
    return "\n".join(out) + "\n"
