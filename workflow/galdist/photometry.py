"""Photometric systems: magnitudes and colours moved between AB and Vega.

m_AB = m_Vega + (AB - Vega) in each band; the offsets are properties of the band
(e.g. Blanton & Roweis 2007, AJ 133, 734, Table 1: Cousins I 0.45, 2MASS Ks 1.85) and
come from the bands config (``ab_minus_vega``): galdist never assumes one. The same
helper serves every method that puts catalog photometry on a calibration's system.
"""

from __future__ import annotations

import math

import numpy as np

SYSTEMS = ("AB", "Vega")


def system_offset(from_system: str, to_system: str, ab_minus_vega: float | None) -> float:
    """Additive offset taking a magnitude in one band from ``from_system`` to ``to_system``.

    m_AB = m_Vega + (AB - Vega), so Vega -> AB adds ``ab_minus_vega`` and AB -> Vega
    subtracts it; the same system gives 0 (and needs no offset).
    """
    for key, value in (("from_system", from_system), ("to_system", to_system)):
        if value not in SYSTEMS:
            raise ValueError(f"{key} must be one of {', '.join(SYSTEMS)}, got {value!r}")
    if from_system == to_system:
        return 0.0
    if ab_minus_vega is None or not math.isfinite(float(ab_minus_vega)):
        raise ValueError("ab_minus_vega must be a finite number when the systems differ "
                         f"({from_system} -> {to_system}): give bands.<label>.ab_minus_vega")
    return float(ab_minus_vega) if to_system == "AB" else -float(ab_minus_vega)


def color_system_offset(blue_system: str, blue_ab_minus_vega: float | None,
                        red_system: str, red_ab_minus_vega: float | None, to_system: str) -> float:
    """Additive offset of a colour blue - red onto ``to_system``.

    (blue - red)_to = (blue - red)_from + offset(blue) - offset(red); for a Vega
    colour going to AB that is (AB - Vega)_blue - (AB - Vega)_red.
    """
    return (system_offset(blue_system, to_system, blue_ab_minus_vega)
            - system_offset(red_system, to_system, red_ab_minus_vega))


def convert(mag, from_system: str | None, to_system: str, ab_minus_vega: float | None) -> np.ndarray:
    """Magnitudes in ``to_system``; ``from_system`` None means "already in ``to_system``"."""
    mag = np.asarray(mag, dtype=float)
    if from_system is None or from_system == to_system:
        return mag
    return mag + system_offset(from_system, to_system, ab_minus_vega)
