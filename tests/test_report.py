"""The run report page (galdist.report): self-contained, key numbers as text, plots
embedded with their captions in view, and it opens in a real browser."""

from __future__ import annotations

import base64
import re

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import pytest  # noqa: E402

from conftest import open_in_browser  # noqa: E402
from galdist import report  # noqa: E402

SUMMARY = {
    "rows_in": 800, "rows_out": 800, "best_method": {"none": 133, "tf": 371, "sbf": 277, "tf+sbf": 19},
    "cosmology": {"name": None, "H0": 70.0, "Om0": 0.3},
    "inputs": [{"path": "cat.parquet", "format": "parquet", "sha256": "ab" * 32}],
    "cautions": ["Tully-Fisher distances of discs below the inclination limit are unreliable."],
    "flag_counts": {"tf_flags": {"LOW_INCLINATION": 121, "OUTLIER": 2}, "sbf_flags": {}},
    "statistics": {
        "methods": {"tf": {"n_used": 384, "n_measured": 513, "wmean": 0.0062, "wmean_err": 0.0223, "median": -0.0063,
                           "median_err": 0.0266, "std": 0.4153, "rms_expected_err": 0.4381, "chi2_nu": 0.90,
                           "h0_implied": 69.80, "h0_implied_err_stat": 0.72, "h0_implied_err_sys": 2.3},
                    "sbf": {"n_used": 293, "n_measured": 299, "wmean": -0.0066, "wmean_err": 0.0090}},
        "pairs": {"tf-sbf": {"n_used": 19, "wmean": 0.0006, "wmean_err": 0.105}},
    },
}
PROVENANCE = {"created_utc": "2026-12-03T09:04:57+00:00", "git_commit": "0e53adc",
              "calibrations": {"tully_fisher": {"name": "tf_i_tully_courtois_2012",
                                                "reference": "Tully & Courtois 2012, ApJ 749, 78 (from memory)"}}}


@pytest.fixture
def page(tmp_path):
    plots = []
    for name in ("hubble_diagram", "dmu_histograms"):
        fig, ax = plt.subplots(figsize=(3, 2))
        ax.plot([0, 1], [0, 1])
        fig.savefig(tmp_path / f"{name}.png")
        plt.close(fig)
        plots.append((name, tmp_path / f"{name}.png", f"caption of {name}"))
    path = tmp_path / "report.html"
    report.write(path, "demo", SUMMARY, PROVENANCE, plots, config_files=["run.yaml"])
    return path


def test_key_numbers_are_text_and_the_page_stands_alone(page):
    text = page.read_text()
    for needle in ("384", "+0.006 ± 0.022", "69.8 ± 0.7", "800 / 800", "Tully–Fisher − SBF",
                   "tf_i_tully_courtois_2012", "LOW_INCLINATION", "caption of dmu_histograms",
                   "inclination limit are unreliable", "config/config.yaml (defaults) + run.yaml"):
        assert needle in text, needle
    assert "<script" not in text.lower()
    images = re.findall(r"src='data:image/png;base64,([^']+)'", text)
    assert len(images) == 2 and all(base64.b64decode(i).startswith(b"\x89PNG") for i in images)
    assert not re.search(r"src=['\"](?!data:)", text)  # nothing loaded from elsewhere


def test_single_method_says_there_is_no_comparison(tmp_path):
    one = SUMMARY | {"statistics": {"methods": {"tf": SUMMARY["statistics"]["methods"]["tf"]}, "pairs": {}}}
    html = report.render("tf-only", one, PROVENANCE, [])
    assert "no comparison between methods" in html and "SBF" not in html.split("<h2>Cautions")[0].split("Key numbers")[1]


@pytest.mark.slow
def test_opens_in_a_real_browser(page, tmp_path):
    dom, shot = open_in_browser(page, tmp_path)
    assert "IMAGES LOADED" in dom and "69.8 ± 0.7" in dom
    assert shot.stat().st_size > 10_000


def test_calibration_fit_section_where_the_calibrate_target_ran(tmp_path):
    fig, ax = plt.subplots(figsize=(3, 2))
    ax.plot([0, 1], [0, 1])
    fig.savefig(tmp_path / "fit_report.png")
    plt.close(fig)
    fit = {"calibration": "tf_fitted", "form": "luminosity", "galaxies_fitted": 324, "groups": 24,
           "groups_with_reference": 6,
           "selection_aware": {"coefficients": [-21.41, -8.52], "errors": [0.08, 0.22], "scatter": 0.410,
                               "scatter_err": 0.019},
           "naive": {"coefficients": [-21.49, -7.98], "errors": [0.08, 0.18], "scatter": 0.392, "scatter_err": 0.016},
           "bootstrap": {"errors": [0.07, 0.2]}}
    text = report.render("demo", SUMMARY, PROVENANCE, [], [(fit, tmp_path / "fit_report.png")])
    assert "Calibration fits" in text and "tf_fitted" in text
    assert "-21.410 ± 0.080, -8.520 ± 0.220" in text and "-7.980 ± 0.180" in text
    assert text.count("data:image/png;base64") == 1
    assert "Calibration fits" not in report.render("demo", SUMMARY, PROVENANCE, [])
