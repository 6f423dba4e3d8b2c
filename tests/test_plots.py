"""Tests of galdist.plots: every plot is written, non-empty, for data, NaNs and nothing."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from galdist import flags, plots
from galdist.calibration import load_calibration
from galdist.flags import Method
from galdist.redshift import MuGrid, make_cosmology

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"

# A synthetic TF calibration for drawing only: NOT a published calibration.
TF_YAML = """\
name: synthetic_tf
method: tully_fisher
form: luminosity
band: Cousins I
system: Vega
predictor: log_w_i
width_definition: w50
pivot: 2.5
coefficients: [-21.0, -8.0]
coefficient_errors: [0.05, 0.3]
quadratic: {break: 2.6, coefficient: -5.0}
scatter: 0.4
valid_range: [2.0, 2.9]
reference: {authors: "synthetic", year: 2024, journal: "test fixture"}
provenance: "synthetic test values, not a published calibration"
conventions: {extinction: sf11, zero_point_h0: null}
"""

# Tonry et al. 1997, ApJ 475, 399: M_I = -1.74 + 4.5 [(V-I)_0 - 1.15], 1.0 < (V-I)_0 < 1.3
# (secondary copy, reference-values.md). Used here only to draw a line.
SBF_YAML = """\
name: tonry1997_i
method: sbf
form: colour_polynomial
band: Cousins I
system: Vega
predictor: V-I
color_bands: [V, I]
pivot: 1.15
coefficients: [-1.74, 4.5]
coefficient_errors: [0.07, 0.25]
scatter: 0.08
valid_range: [1.0, 1.3]
reference: {authors: "Tonry, Blakeslee, Ajhar & Dressler", year: 1997, journal: "ApJ 475, 399"}
provenance: "secondary copy"
conventions: {extinction: sfd98, zero_point_h0: null}
"""

COLUMNS = ["z_cmb", "mu_z", "mu_z_err", "gal_l", "gal_b",
           "tf_mu", "tf_mu_err", "tf_flags", "tf_logw_i", "tf_mag_corr", "tf_dmu", "tf_vpec",
           "sbf_mu", "sbf_mu_err", "sbf_flags", "sbf_color_0", "sbf_mag_0", "sbf_dmu", "sbf_vpec",
           "fp_mu", "fp_mu_err", "fp_flags", "fp_log_re_pred", "fp_log_re_z", "fp_dmu", "fp_vpec"]
ALL = ["tf", "sbf", "fp"]


@pytest.fixture(scope="module")
def grid():
    return MuGrid.build(make_cosmology(), z_max=0.5, n=500)


@pytest.fixture()
def calibrations(tmp_path):
    (tmp_path / "tf.yaml").write_text(TF_YAML)
    (tmp_path / "sbf.yaml").write_text(SBF_YAML)
    # the shipped FP plane, for drawing its scatter band only
    return (load_calibration(tmp_path / "tf.yaml"), load_calibration(tmp_path / "sbf.yaml"),
            load_calibration("fp_j_magoulas_2012"))


def _frame(grid, n=150, seed=1):
    rng = np.random.default_rng(seed)
    z = rng.uniform(0.003, 0.08, n)
    mu_z = grid.mu(z)
    tf_flags, sbf_flags = flags.new(n), flags.new(n)
    flags.set_where(tf_flags, rng.random(n) < 0.1, Method.OUTLIER)
    flags.set_where(sbf_flags, rng.random(n) < 0.1, Method.OUT_OF_RANGE)
    tf_mu = mu_z + rng.normal(0, 0.4, n)
    sbf_mu = np.where(rng.random(n) < 0.3, mu_z + rng.normal(0, 0.1, n), np.nan)
    logw = rng.uniform(2.1, 2.8, n)
    col = rng.uniform(1.0, 1.3, n)
    fp_flags = flags.new(n)
    flags.set_where(fp_flags, rng.random(n) < 0.1, Method.OUT_OF_RANGE)
    fp_eta = rng.normal(0, 0.1, n)
    fp_mu = np.where(rng.random(n) < 0.4, mu_z - 5 * fp_eta, np.nan)
    r_pred = rng.normal(0.2, 0.25, n)
    return pd.DataFrame({
        "z_cmb": z, "mu_z": mu_z, "mu_z_err": np.full(n, 0.1),
        "gal_l": rng.uniform(0, 360, n), "gal_b": np.degrees(np.arcsin(rng.uniform(-1, 1, n))),
        "tf_mu": tf_mu, "tf_mu_err": np.full(n, 0.4), "tf_mu_err_sys": np.full(n, 0.07), "tf_flags": tf_flags,
        "tf_logw_i": logw, "tf_mag_corr": mu_z - 21.0 - 8.0 * (logw - 2.5) + rng.normal(0, 0.4, n),
        "tf_dmu": tf_mu - mu_z, "tf_vpec": rng.normal(0, 400, n),
        "sbf_mu": sbf_mu, "sbf_mu_err": np.full(n, 0.1), "sbf_mu_err_sys": np.full(n, 0.07), "sbf_flags": sbf_flags,
        "sbf_color_0": col, "sbf_mag_0": mu_z - 1.74 + 4.5 * (col - 1.15) + rng.normal(0, 0.1, n),
        "sbf_dmu": sbf_mu - mu_z, "sbf_vpec": np.where(np.isfinite(sbf_mu), rng.normal(0, 300, n), np.nan),
        "fp_mu": fp_mu, "fp_mu_err": np.full(n, 0.5), "fp_flags": fp_flags, "fp_log_re_pred": r_pred,
        "fp_log_re_z": r_pred + fp_eta, "fp_dmu": fp_mu - mu_z,
        "fp_vpec": np.where(np.isfinite(fp_mu), rng.normal(0, 900, n), np.nan),
    })


def _draw_all(df, tmp_path, grid, calibrations):
    tf_cal, sbf_cal, fp_cal = calibrations
    cals = {"tf": tf_cal, "sbf": sbf_cal, "fp": fp_cal}
    return {
        "hubble": plots.hubble_diagram(df, tmp_path / "hubble.png", grid),
        "tf": plots.relation(df, tmp_path / "tf.png", "tf", tf_cal),
        "sbf": plots.relation(df, tmp_path / "sbf.png", "sbf", sbf_cal),
        "fp": plots.relation(df, tmp_path / "fp.png", "fp", fp_cal),
        "dmu": plots.dmu_histograms(df, tmp_path / "dmu.png"),
        "dmu_cz": plots.dmu_cz(df, tmp_path / "dmu_cz.png"),
        "dmu_pred": plots.dmu_predictor(df, tmp_path / "dmu_pred.png", calibrations=cals),
        "pairs": plots.method_comparison(df, tmp_path / "pairs.png"),
        "sky": plots.vpec_sky(df, tmp_path / "sky.png"),
    }


def _assert_pngs(tmp_path, names):
    for name in names:
        data = (tmp_path / f"{name}.png").read_bytes()
        assert data[:8] == PNG_MAGIC and len(data) > 2000, name


def test_plots_of_synthetic_frame(tmp_path, grid, calibrations):
    df = _frame(grid)
    counts = _draw_all(df, tmp_path, grid, calibrations)
    _assert_pngs(tmp_path, counts)
    n_sbf, n_fp = int(np.isfinite(df["sbf_mu"]).sum()), int(np.isfinite(df["fp_mu"]).sum())
    assert counts["hubble"] == len(df) + n_sbf + n_fp
    assert counts["tf"] == len(df) and counts["sbf"] == len(df) and counts["fp"] == len(df)
    cz_ok = df["z_cmb"] * 299792.458 >= 3000
    assert counts["dmu"] == int(cz_ok.sum() + (cz_ok & np.isfinite(df["sbf_dmu"])).sum()
                                + (cz_ok & np.isfinite(df["fp_dmu"])).sum())
    assert counts["dmu_cz"] == counts["dmu_pred"] == len(df) + n_sbf + n_fp
    both = {p: np.isfinite(df[f"{p[0]}_mu"]) & np.isfinite(df[f"{p[1]}_mu"])
            for p in (("tf", "sbf"), ("tf", "fp"), ("sbf", "fp"))}
    assert counts["pairs"] == sum(int(b.sum()) for b in both.values()) > 0
    assert counts["sky"] == len(df) + n_sbf + n_fp


def test_plots_of_all_nan_frame(tmp_path, grid, calibrations):
    df = pd.DataFrame({c: np.full(20, np.nan) for c in COLUMNS})
    for m in ALL:
        df[f"{m}_flags"] = flags.new(20)
    counts = _draw_all(df, tmp_path, grid, calibrations)
    assert all(v == 0 for v in counts.values())
    _assert_pngs(tmp_path, counts)


def test_plots_of_empty_frame_without_columns_or_calibration(tmp_path, grid):
    df = pd.DataFrame({"z_cmb": np.zeros(0)})
    paths = plots.write_all(df, tmp_path / "plots", grid)
    assert set(paths) == {"hubble_diagram", "tf_relation", "sbf_relation", "fp_relation", "dmu_histograms",
                          "dmu_cz", "dmu_predictor", "method_comparison", "vpec_sky"}
    for p in paths.values():
        data = open(p, "rb").read()
        assert data[:8] == PNG_MAGIC and len(data) > 2000


@pytest.mark.parametrize("methods", [["tf"], ["sbf"], ["fp"], ["tf", "sbf"], ["sbf", "fp"], ALL])
def test_one_method_run_draws_only_its_plots(tmp_path, grid, calibrations, methods):
    other = set(ALL) - set(methods)
    df = _frame(grid).drop(columns=[c for c in COLUMNS if c.split("_")[0] in other])
    cals = dict(zip(ALL, calibrations))
    out = tmp_path / "plots"
    paths = plots.write_all(df, out, grid, methods=methods, calibrations=cals)
    pairs = ["method_comparison"] if len(methods) > 1 else []
    expected = ["hubble_diagram", *(f"{m}_relation" for m in methods), "dmu_histograms", "dmu_cz",
                "dmu_predictor", *pairs, "vpec_sky"]
    assert list(paths) == plots.plot_names(methods) == expected
    assert sorted(p.name for p in out.iterdir()) == sorted(f"{n}.png" for n in expected)
    _assert_pngs(out, expected)
    # one panel per method that ran, none for the absent one, even when asked for every method
    n_draw = {m: int(np.isfinite(df[f"{m}_mu"]).sum()) for m in methods}
    for name in ("vpec_sky", "dmu_cz", "dmu_predictor"):
        assert plots.draw(name, df, tmp_path / "x.png", grid, methods=ALL) == sum(n_draw.values()), name
    # a single method has no pair to compare: a panel saying so, nothing drawn
    if len(methods) == 1:
        assert plots.method_comparison(df, tmp_path / "pairs.png", ALL) == 0


def test_plot_names_without_methods_and_unknown_plot(tmp_path, grid):
    assert plots.plot_names([]) == []
    assert plots.plot_names(["fp"]) == ["hubble_diagram", "fp_relation", "dmu_histograms", "dmu_cz",
                                        "dmu_predictor", "vpec_sky"]
    with pytest.raises(ValueError, match="unknown plot 'xx_relation'"):
        plots.draw("xx_relation", pd.DataFrame({"z_cmb": []}), tmp_path / "x.png", grid)


def test_log_axis_labels_are_plain_numbers():
    fig, ax = plots.plt.subplots()
    ax.set_xscale("log")
    ax.set_xlim(0.004, 0.06)
    plots._plain_log_axis(ax.xaxis)
    fig.canvas.draw()
    labels = [t.get_text() for t in ax.get_xticklabels() if t.get_text()]
    plots.plt.close(fig)
    assert {"0.005", "0.01", "0.02", "0.05"} <= set(labels), labels
    assert not any("10^" in t or "times" in t or "×" in t for t in labels), labels


def test_band_in_labels_is_the_users_with_the_calibrations_where_it_differs(calibrations):
    from galdist.methods import REGISTRY

    tf_cal = calibrations[0]  # band Cousins I, Vega
    spec = REGISTRY["tully_fisher"]
    bands = {"I": {"filter": "bessell-I", "system": "Vega"}, "i": {"filter": "sdss2010-i", "system": "AB"}}
    same = plots.band_text(spec, tf_cal, bands, {"band": "I"})
    assert same == "I (bessell-I, Vega)"
    other = plots.band_text(spec, tf_cal, bands, {"band": "i"})
    assert other.startswith("i (sdss2010-i, Vega)") and "calibration's band Cousins I" in other
    assert plots.band_text(spec, tf_cal) == "Cousins I"  # no config: the calibration's band
