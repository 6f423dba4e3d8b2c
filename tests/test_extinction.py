"""Tests of galdist.extinction: band coefficients (law and fixed-table paths), the
E(B-V) scale bookkeeping, per-row extinction columns and flags."""

from __future__ import annotations

from pathlib import Path

import astropy.units as u
import numpy as np
import pytest
import yaml

from galdist import flags
from galdist.extinction import (LAWS, ExtinctionCoefficients, apply_extinction,
                                blackbody_flambda, colour_excess, extinction_law,
                                law_coefficients, table_coefficients)
from galdist.filters import load_filter

TABLE = Path(__file__).resolve().parents[1] / "workflow" / "galdist" / "data" / "extinction" / "sf11_table6.yaml"

# Schlafly & Finkbeiner 2011, ApJ 737, 103, Table 6, R_V = 3.1: A_X / E(B-V)_SFD
# (secondary copy). They already include the 0.86 recalibration of the 1998 map.
SF11_SDSS = {"u": 4.239, "g": 3.303, "r": 2.285, "i": 1.698, "z": 1.263}
SF11_LANDOLT = {"U": 4.334, "B": 3.626, "V": 2.742, "R": 2.169, "I": 1.505}
SF11_UKIRT = {"J": 0.709, "H": 0.449, "K": 0.302}
# SF11 recalibration E(B-V)_true = 0.86 E(B-V)_SFD (Schlafly & Finkbeiner 2011, ApJ 737, 103;
# secondary copy)
SF11_SCALE = 0.86

SPECLITE = {**{b: f"sdss2010-{b}" for b in SF11_SDSS},
            **{b: f"bessell-{b}" for b in SF11_LANDOLT},
            "J": "twomass-J", "H": "twomass-H", "K": "twomass-Ks"}


@pytest.fixture(scope="module")
def law_default():
    """Defaults: F99, R_V = 3.1, 7000 K blackbody, bandpass B-V normalisation."""
    return law_coefficients({b: load_filter(n) for b, n in SPECLITE.items()})


def a_per_raw_map_value(coeffs, band):
    """A_band for a raw 1998-map E(B-V) of 1 with the default ebv_scale (0.86)."""
    return apply_extinction(np.array([1.0]), None, coeffs, ebv_scale=SF11_SCALE)[f"A_{band}"][0]


# ----------------------------------------------------------- SF11 Table 6 checks
@pytest.mark.parametrize("band", list(SF11_SDSS))
def test_sdss_against_sf11_table6(law_default, band):
    # SF11 Table 6 (R_V = 3.1) SDSS column, secondary copy; speclite sdss2010 curves
    # (Doi et al. 2010, AJ 139, 1628) -- close to the curves SF11 used: 2 %
    assert a_per_raw_map_value(law_default, band) == pytest.approx(SF11_SDSS[band], rel=0.02)


@pytest.mark.parametrize("band", list(SF11_LANDOLT))
def test_landolt_against_sf11_table6(law_default, band):
    # SF11 Table 6 Landolt column, secondary copy. Computed through speclite's Bessell
    # (1990, PASP 102, 1181) curves, a different realisation of the Landolt/Johnson-
    # Cousins system than SF11 used: 5 %
    assert a_per_raw_map_value(law_default, band) == pytest.approx(SF11_LANDOLT[band], rel=0.05)


@pytest.mark.parametrize("band", list(SF11_UKIRT))
def test_ukirt_against_sf11_table6_with_2mass_curves(law_default, band):
    # SF11 Table 6 UKIRT column, secondary copy (the table has no 2MASS rows). Computed
    # through speclite's 2MASS J, H, Ks curves: a different filter realisation (2MASS Ks
    # vs UKIRT K), hence 5 %
    assert a_per_raw_map_value(law_default, band) == pytest.approx(SF11_UKIRT[band], rel=0.05)


def test_bandpass_normalisation_defines_the_colour_excess(law_default):
    # by construction R_B - R_V = 1 through the normalising filters (Landolt B, V as
    # Bessell curves): the bandpass E(B-V) of the source is what the map measures
    # (definition of a colour excess, common practice)
    assert law_default["B"] - law_default["V"] == pytest.approx(1.0, abs=1e-12)
    ebv_used = np.array([0.05, 0.2])
    np.testing.assert_allclose(colour_excess(law_default, "B", "V", ebv_used), ebv_used, rtol=1e-12)


def test_monochromatic_normalisation_misses_sf11(law_default):
    # normalising by the law's own (monochromatic) E(B-V) instead puts SDSS r about 3 %
    # below SF11 Table 6 (2.285, secondary copy): the normalisation matters
    mono = law_coefficients({"r": load_filter("sdss2010-r")}, normalisation="law")
    r_mono = a_per_raw_map_value(mono, "r")
    assert abs(r_mono / 2.285 - 1) > 0.02
    assert abs(a_per_raw_map_value(law_default, "r") / 2.285 - 1) < abs(r_mono / 2.285 - 1)


# --------------------------------------------------- table path vs law path, 0.86
def test_table_file_carries_sf11_table6():
    coeffs = table_coefficients(TABLE, {"u": "sdss-u", "V": "landolt-V", "K": "ukirt-K",
                                        "F814W": "acs-F814W", "F160W": "wfc3ir-F160W"})
    assert coeffs.method == "table"
    assert coeffs.ebv_scale_included == SF11_SCALE
    # SF11 Table 6 (secondary copy): SDSS u 4.239, Landolt V 2.742, UKIRT K 0.302,
    # ACS F814W 1.526, WFC3 F160W 0.512
    assert dict(coeffs) == {"u": 4.239, "V": 2.742, "K": 0.302, "F814W": 1.526, "F160W": 0.512}


def test_table_and_law_agree_for_sdss_r_and_086_is_applied_once(law_default):
    table = table_coefficients(TABLE, {"r": "sdss-r"})
    ebv_in = np.array([0.0, 0.02, 0.1, 0.45])  # raw 1998-map values
    a_table = apply_extinction(ebv_in, None, table)["A_r"]  # default ebv_scale 0.86
    a_law = apply_extinction(ebv_in, None, law_default)["A_r"]
    # SF11 derived Table 6 from the same F99, R_V = 3.1 law: agree within 2 %
    np.testing.assert_allclose(a_law, a_table, rtol=0.02)
    # with the defaults the table multiplies the raw map value: the 0.86 cancels,
    # A_r = 2.285 x E(B-V)_SFD (SF11 Table 6, secondary copy) -- not 0.86 x that
    np.testing.assert_allclose(a_table, 2.285 * ebv_in, rtol=1e-12)
    # input already on the true scale (ebv_scale = 1): the table is divided by 0.86
    np.testing.assert_allclose(apply_extinction(ebv_in, None, table, ebv_scale=1.0)["A_r"],
                               2.285 / SF11_SCALE * ebv_in, rtol=1e-12)
    # ebv_used is the true E(B-V) in both paths
    np.testing.assert_allclose(apply_extinction(ebv_in, None, table)["ebv_used"], SF11_SCALE * ebv_in)


def test_scale_cannot_be_applied_twice():
    table = table_coefficients(TABLE, {"r": "sdss-r"})
    with pytest.raises(ValueError, match="conflicts"):
        apply_extinction(np.ones(2), None, table, ebv_scale_included=1.0)
    with pytest.raises(ValueError, match="ebv_scale_included"):
        apply_extinction(np.ones(2), None, {"r": 2.285})  # a bare dict must say its scale
    a = apply_extinction(np.ones(1), None, {"r": 2.285}, ebv_scale_included=SF11_SCALE)["A_r"]
    assert a[0] == pytest.approx(2.285)  # SF11 Table 6 SDSS r (secondary copy)


def test_table_validation(tmp_path):
    bad = tmp_path / "t.yaml"
    bad.write_text(yaml.safe_dump({"coefficients": {"sdss-r": 2.285}}))
    with pytest.raises(ValueError, match="ebv_scale_included"):
        table_coefficients(bad, {"r": "sdss-r"})
    with pytest.raises(ValueError, match="landolt-X"):
        table_coefficients(TABLE, {"X": "landolt-X"})
    bad.write_text(yaml.safe_dump({"ebv_scale_included": 0.86, "coefficients": {"sdss-r": -1}}))
    with pytest.raises(ValueError, match="positive"):
        table_coefficients(bad, {"r": "sdss-r"})


def test_coefficients_record_their_path_and_round_trip(law_default):
    d = law_default.to_dict()
    assert d["method"] == "law" and d["details"]["law"] == "F99" and d["ebv_scale_included"] == 1.0
    assert d["details"]["source"] == "blackbody 7000 K"
    back = ExtinctionCoefficients.from_dict(yaml.safe_load(yaml.safe_dump(d)))
    assert dict(back) == dict(law_default) and back.method == "law"


# ------------------------------------------------------------- the law itself
def narrow_filter(tmp_path, centre, half_width=0.5):
    path = tmp_path / f"delta{int(centre)}.csv"
    w = centre + np.array([-half_width, 0.0, half_width])
    path.write_text("wavelength,throughput\n" + "".join(f"{a},{t}\n" for a, t in zip(w, [0.0, 1.0, 0.0])))
    return load_filter(str(path))


@pytest.mark.parametrize("law", list(LAWS))
@pytest.mark.parametrize("centre", [3000.0, 4400.0, 6500.0, 12000.0, 22000.0])
def test_delta_filter_reproduces_the_law(tmp_path, law, centre):
    # through a (nearly) delta-function filter the band extinction is the law's
    # monochromatic A(lambda)/A(V) (definition of the law, dust_extinction)
    model = extinction_law(law, 3.1)
    expect = float(model(centre * u.AA))
    filt = narrow_filter(tmp_path, centre)
    ref = narrow_filter(tmp_path, 9000.0)
    per_law = law_coefficients({"x": filt}, law=law, r_v=3.1, normalisation="law")
    assert per_law["x"] == pytest.approx(3.1 * expect, rel=1e-5)
    bp = law_coefficients({"x": filt, "ref": ref}, law=law, r_v=3.1)
    assert bp["x"] / bp["ref"] == pytest.approx(expect / float(model(9000.0 * u.AA)), rel=1e-5)
    # a finite reference E(B-V) changes nothing for a monochromatic band
    finite = law_coefficients({"x": filt}, law=law, r_v=3.1, normalisation="law", reference_ebv=1.0)
    assert finite["x"] == pytest.approx(per_law["x"], rel=1e-5)


def test_r_v_changes_the_law_shape(tmp_path):
    # a larger R_V means a greyer law: A(3000 A)/A(V) drops (Cardelli et al. 1989, ApJ 345, 245)
    filt = {"x": narrow_filter(tmp_path, 3000.0)}
    lo = law_coefficients(filt, r_v=2.5, normalisation="law")["x"] / 2.5
    hi = law_coefficients(filt, r_v=5.0, normalisation="law")["x"] / 5.0
    assert hi < lo


def test_source_spectrum_can_be_passed_as_arrays():
    wave = np.linspace(1000.0, 30000.0, 20000)
    filt = {"g": load_filter("sdss2010-g")}
    a = law_coefficients(filt, source=(wave, blackbody_flambda(wave, 7000.0)))
    b = law_coefficients(filt)
    assert a["g"] == pytest.approx(b["g"], rel=1e-4)
    assert a.details["source"] == "user spectrum"
    # a broad band sees the source: a hotter star weights the bluer, more extincted side
    # of g more than the cooler star does (photon counting, common practice)
    hot = law_coefficients(filt, source_temperature=20000.0, normalisation="law")["g"]
    cool = law_coefficients(filt, source_temperature=4000.0, normalisation="law")["g"]
    assert hot > cool


def test_band_beyond_the_law_range_raises():
    # F99 is defined for 0.3-10 um^-1 (dust_extinction); WISE W2 (4.6 um) is beyond it
    with pytest.raises(ValueError, match=r"band 'W2'.*F99"):
        law_coefficients({"W2": load_filter("wise2010-W2")}, law="F99")
    # G23 reaches 32 um (Gordon et al. 2023, ApJ 950, 86), so it covers W2
    assert law_coefficients({"W2": load_filter("wise2010-W2")}, law="G23")["W2"] > 0


def test_bad_law_configuration_raises():
    with pytest.raises(ValueError, match="F99, CCM89"):
        extinction_law("XYZ")
    with pytest.raises(ValueError, match=r"\[2.3, 5.6\]"):
        extinction_law("G23", r_v=2.0)
    with pytest.raises(ValueError, match="normalisation"):
        law_coefficients({"r": load_filter("sdss2010-r")}, normalisation="weird")


# ------------------------------------------------------- per-row columns, flags
def test_apply_extinction_columns_and_flags(law_default):
    ebv_in = np.array([0.02, np.nan, 0.7, 0.3, np.nan, 0.1])
    err_in = np.array([0.002, 0.01, np.nan, -1.0, np.nan, 0.01])
    outside = np.array([False, False, False, False, True, False])
    out = apply_extinction(ebv_in, err_in, law_default, ebv_scale=SF11_SCALE, high_limit=0.5,
                           outside=outside)
    assert set(out) == {"ebv_used", "ebv_used_err", "ext_flags", *(f"A_{b}" for b in SPECLITE),
                        *(f"A_{b}_err" for b in SPECLITE)}
    assert all(len(v) == ebv_in.size for v in out.values())
    assert out["ext_flags"].dtype == flags.FLAG_DTYPE
    np.testing.assert_allclose(out["ebv_used"], SF11_SCALE * ebv_in)
    np.testing.assert_allclose(out["ebv_used_err"], [0.00172, np.nan, np.nan, np.nan, np.nan, 0.0086])
    np.testing.assert_allclose(out["A_r"], law_default["r"] * SF11_SCALE * ebv_in)
    # every band's error is E(B-V)'s, scaled by the band's coefficient (one source)
    np.testing.assert_allclose(out["A_r_err"], law_default["r"] * np.array([0.00172, np.nan, np.nan, np.nan,
                                                                            np.nan, 0.0086]))
    f = out["ext_flags"]
    assert flags.has(f, flags.Ext.NO_EBV).tolist() == [False, True, False, False, True, False]
    # 0.7 x 0.86 = 0.60 > 0.5 on the true scale; 0.3 x 0.86 is not
    assert flags.has(f, flags.Ext.HIGH_EXTINCTION).tolist() == [False, False, True, False, False, False]
    assert flags.has(f, flags.Ext.OUTSIDE_MAP).tolist() == outside.tolist()
    # a map without errors: a fractional error fills where no error was given
    frac = apply_extinction(ebv_in, None, law_default, ebv_fractional_error=0.16)["ebv_used_err"]
    np.testing.assert_allclose(frac, 0.16 * SF11_SCALE * ebv_in)


def test_apply_extinction_bad_config(law_default):
    with pytest.raises(ValueError, match="ebv_scale"):
        apply_extinction(np.ones(2), None, law_default, ebv_scale=0.0)
    with pytest.raises(ValueError, match="high_ebv_limit"):
        apply_extinction(np.ones(2), None, law_default, high_limit=-1)


def test_colour_excess_table_path():
    table = table_coefficients(TABLE, {"g": "sdss-g", "r": "sdss-r"})
    ebv_used = np.array([0.1, 0.2])
    # E(g - r) = (R_g - R_r) E(B-V); SF11 Table 6 (secondary copy) per raw map value,
    # so per true E(B-V) divided by 0.86
    np.testing.assert_allclose(colour_excess(table, "g", "r", ebv_used),
                               (3.303 - 2.285) / SF11_SCALE * ebv_used, rtol=1e-12)
    with pytest.raises(ValueError, match="'i'"):
        colour_excess(table, "g", "i", ebv_used)
