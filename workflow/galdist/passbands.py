"""Which physical passband a configured band is, and whether a calibration fits the data.

A calibration file names its band, photometric system and colour bands as physical
passbands ("Cousins I", "2MASS Ks", "ACS/WFC F850LP"). A configured band names a
filter curve (a speclite name or a file) and a system. Applying a calibration to
magnitudes in another passband biases every distance by the colour term between
the two (tenths of a magnitude between SDSS i and Cousins I), so a mismatch stops
the run before any job unless config accepts it explicitly
(``<method>.accept_passband_mismatch``), which the product then flags.
"""

from __future__ import annotations

import re

#: speclite filter group -> passband family of calibration files (common practice
#: names). Bessell's curves realise the Johnson-Cousins UBVRI system.
SPECLITE_FAMILIES = {
    "bessell": "Johnson-Cousins", "twomass": "2MASS", "sdss2010": "SDSS", "sdss2010noatm": "SDSS",
    "decam2014": "DECam", "decamDR1": "DECam", "decamDR1noatm": "DECam", "hsc2017": "HSC",
    "lsst2016": "LSST", "lsst2023": "LSST", "panstarrs": "Pan-STARRS", "wise2010": "WISE",
    "galex": "GALEX", "gaiadr2": "Gaia", "gaiadr3": "Gaia", "cfht_megacam": "MegaCam",
    "Euclid": "Euclid", "BASS": "BASS", "MzLS": "MzLS",
}
#: Names that mean the same passband: V (and U, B) of the Johnson-Cousins system is
#: Johnson's; R and I are Cousins'. Keys and values are normalised (``_key``).
_ALIASES = {f"{sys} {b}": f"johnson-cousins {b}" for sys in ("johnson", "cousins", "bessell")
            for b in "ubvri"}


def _key(name: str) -> str:
    return re.sub(r"\s+", " ", name.strip().lower())


def canonical(name: str) -> str:
    """A passband name normalised for comparison ('Cousins I' == 'bessell I')."""
    k = _key(name)
    return _ALIASES.get(k, k)


def of_band(band: dict) -> str | None:
    """The physical passband of a configured band: its ``passband`` key, else the
    speclite name's family and band; None for a filter file without ``passband``."""
    if band.get("passband"):
        return band["passband"]
    group, _, name = str(band["filter"]).partition("-")
    family = SPECLITE_FAMILIES.get(group)
    if family is None or not name or "/" in band["filter"] or "." in name:
        return None
    return f"{family} {name}"


def mismatches(method: str, cal, section: dict, bands: dict) -> list[str]:
    """Every way the calibration ``cal`` does not fit the configured bands, as messages.

    Checks the band of the magnitude (not for the baryonic form, which converts the
    magnitude to a mass with the configured mass-to-light ratio), and for SBF the
    colour's two bands in order. The photometric system is checked by
    ``system_problems``.
    """
    found = []
    pairs = []
    if cal.form != "baryonic":
        pairs.append((f"{method}.band", section["band"], cal.band))
    if cal.color_bands:
        labels = list(section.get("color_bands") or [])
        for key, label, want in zip(("blue", "red"), labels, cal.color_bands):
            pairs.append((f"{method}.color_bands ({key})", label, want))
        got = [of_band(bands[lb]) for lb in labels if lb in bands]
        if (len(got) == 2 and None not in got
                and [canonical(g) for g in got] == [canonical(w) for w in reversed(cal.color_bands)]):
            return [f"config key '{method}.color_bands' is reversed: calibration {cal.name} uses "
                    f"{cal.color_bands[0]} - {cal.color_bands[1]} (blue first); set "
                    f"{method}.color_bands: [{labels[1]}, {labels[0]}]"]
    for key, label, want in pairs:
        if label not in bands:
            continue  # reported by config.check_stages
        have = of_band(bands[label])
        if have is None:
            found.append(f"config key 'bands.{label}.passband': band {label} is a filter file, so galdist "
                         f"cannot tell which passband it is; calibration {cal.name} is in {want!r}. Add "
                         f"passband: \"{want}\" to bands.{label} if that is what the file is")
        elif canonical(have) != canonical(want):
            found.append(f"config key '{key}': band {label} is {have} ({bands[label]['filter']}) but calibration "
                         f"{cal.name} is in {want}; use a band in {want}, another calibration, or set "
                         f"{method}.accept_passband_mismatch: true to run anyway (flagged PASSBAND_OVERRIDE)")
    return found


def system_problems(method: str, cal, section: dict, bands: dict) -> list[str]:
    """Bands whose photometric system differs from the calibration's without an
    explicit ``ab_minus_vega`` to convert them."""
    labels = [section["band"]] + list(section.get("color_bands") or [])
    found = []
    for label in dict.fromkeys(labels):
        band = bands.get(label)
        if band is None or band["system"] == cal.system:
            continue
        if band.get("ab_minus_vega") is None:
            found.append(f"config key 'bands.{label}.ab_minus_vega': band {label} is {band['system']} but "
                         f"calibration {cal.name} ({method}) is {cal.system}; give m_AB - m_Vega for this "
                         "band (e.g. Blanton & Roweis 2007, AJ 133, 734, Table 1) so galdist can convert")
    return found


def flag_override(method_flags, method: str, cal, section: dict, bands: dict) -> None:
    """Set PASSBAND_OVERRIDE on every row (in place) when the run goes on despite a mismatch."""
    from . import flags as F

    if section.get("accept_passband_mismatch") and mismatches(method, cal, section, bands):
        method_flags |= F.FLAG_DTYPE(int(F.Method.PASSBAND_OVERRIDE))
