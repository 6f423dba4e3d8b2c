"""The contract every distance method keeps, one harness for all of them (every entry of
galdist.methods.REGISTRY), and the lists of methods that must follow the registry.

Each method runs here with its default calibration and settings (config/config.yaml
over the schema defaults) on rows of its registry entry's typical galaxy. No check
value is a published number: the science of each method is tested in its own file;
this file tests what every method must do alike.
"""

from __future__ import annotations

import copy
import dataclasses

import astropy.units as u
import numpy as np
import pytest
import yaml

from conftest import REPO
from galdist import columns, crosscheck, flags, methods, passbands, plots, product, schema, shipped, stages
from galdist.calibration import load_calibration
from galdist.config import DEFAULT_CONFIG, load, validate
from galdist.flags import Ext, KCorr, Method
from galdist.settings import WORKFLOW_KEYS

CONFIG = validate(load(DEFAULT_CONFIG))
SPECS = list(methods.REGISTRY.values())
IDS = [s.name for s in SPECS]


def _config(spec, **settings) -> dict:
    """The default config, with ``settings`` in the method's section and any band its
    default calibration names that the demo's bands lack (the calibration's own passband)."""
    config = copy.deepcopy(CONFIG)
    config[spec.name] |= settings
    cal = load_calibration(config[spec.name]["calibration"])
    speclite = {family: group for group, family in reversed(passbands.SPECLITE_FAMILIES.items())}
    for label in spec.band_labels(config[spec.name]).values():
        if label not in config["bands"]:
            family, _, name = cal.band.partition(" ")
            config["bands"][label] = {"filter": f"{speclite[family]}-{name}", "system": cal.system,
                                      "ab_minus_vega": None}
    return config


def _setup(spec, **settings):
    """The method's default calibration and its settings under the default config."""
    config = _config(spec, **settings)
    cal = load_calibration(config[spec.name]["calibration"])
    return cal, spec.check(config, cal)


def _rows(spec, n: int) -> dict:
    """n copies of the registry entry's typical galaxy, flags clear."""
    return {name: (flags.new(n) if inp.kind == "flags" else np.full(n, float(inp.typical)))
            for name, inp in spec.inputs.items()}


def _run(spec, inputs, **settings):
    cal, s = _setup(spec, **({"mc_draws": 0} | settings))
    return spec.distance_function()(inputs, cal, s)


@pytest.mark.parametrize("spec", SPECS, ids=IDS)
def test_every_row_kept_and_every_declared_column_written(spec):
    out = _run(spec, _rows(spec, 5))
    assert list(out) == list(spec.output_units())  # the columns, in the order declared
    assert all(np.shape(v) == (5,) for v in out.values())
    mu, d = out[f"{spec.prefix}_mu"], out[f"{spec.prefix}_d_mpc"]
    assert np.all(np.isfinite(mu)) and np.all(out[spec.flags_column] == 0), out[spec.flags_column]
    # mu = 5 log10(d / 10 pc): d in Mpc (the finishing step every method shares)
    np.testing.assert_allclose(5 * np.log10(d) + 25, mu, rtol=0, atol=1e-9)
    assert out[spec.flags_column].dtype == flags.FLAG_DTYPE


@pytest.mark.parametrize("spec", SPECS, ids=IDS)
def test_units_on_every_column_and_input(spec):
    for name, unit in spec.output_units().items():
        assert name.startswith(f"{spec.prefix}_"), name
        u.Unit(unit)  # an astropy unit ("" = dimensionless), or this raises
    # each input's unit is the one its stage declares for that column
    config = _config(spec)
    bands = list(config["bands"])
    declared = {c.name: c.unit for c in columns.all_columns(bands, list(methods.REGISTRY)) + columns.DERIVED}
    declared["quality_flags"] = ""
    for stage in ("extinction", "kcorr", "redshift"):
        declared |= stages.output_units(stage, bands)
    labels = spec.band_labels(config[spec.name])
    for name, inp in spec.inputs.items():
        assert inp.stage in methods.STAGES, name
        assert declared[inp.column.format(**labels)] == inp.unit, (name, inp)
    for col in spec.catalog_columns:
        assert col.valid is None or col.valid[0] < col.valid[1], col
        assert col.quality is None or col.quality in flags.Quality.__members__, col


@pytest.mark.parametrize("spec", SPECS, ids=IDS)
def test_stage_flags_are_inherited_the_same_way(spec):
    cases = [(Ext.HIGH_EXTINCTION, 0), (Ext.OUTSIDE_MAP, 0), (0, KCorr.COLOR_CLIPPED), (0, KCorr.COLOR_MISSING),
             (Ext.HIGH_EXTINCTION | Ext.OUTSIDE_MAP, KCorr.COLOR_CLIPPED), (0, 0)]
    inputs = _rows(spec, len(cases))
    inputs["ext_flags"] = np.array([int(e) for e, _ in cases], dtype=flags.FLAG_DTYPE)
    inputs["kcorr_flags"] = np.array([int(k) for _, k in cases], dtype=flags.FLAG_DTYPE)
    out = _run(spec, inputs)
    expected = flags.inherited(inputs["ext_flags"], inputs["kcorr_flags"])
    assert out[spec.flags_column].tolist() == expected.tolist()
    assert expected.tolist()[:2] == [int(Method.HIGH_EXTINCTION)] * 2  # OUTSIDE_MAP counts for every method
    assert np.all(np.isfinite(out[f"{spec.prefix}_mu"]))  # a flag says how far to trust, it removes nothing


@pytest.mark.parametrize("spec", SPECS, ids=IDS)
def test_monte_carlo_and_analytic_errors_agree(spec):
    out = _run(spec, _rows(spec, 3), mc_draws=4000, mc_seed=21)
    err, mc = out[f"{spec.prefix}_mu_err"], out[f"{spec.prefix}_mu_err_mc"]
    assert np.all(err > 0.01)
    # 4000 draws: the Monte Carlo standard deviation is uncertain by 1/sqrt(8000) ~ 1.1 %
    np.testing.assert_allclose(mc, err, rtol=0.05)


@pytest.mark.parametrize("spec", SPECS, ids=IDS)
def test_a_bad_input_is_flagged_not_fatal(spec):
    good = _run(spec, _rows(spec, 3))
    mu = f"{spec.prefix}_mu"
    for name, inp in spec.inputs.items():
        if inp.kind in ("flags", "optional"):
            continue
        inputs = _rows(spec, 3)
        inputs[name][1] = np.nan  # what ingest leaves of a value it flagged
        out = _run(spec, inputs)
        assert all(np.shape(v) == (3,) for v in out.values()), name
        for k in (0, 2):  # the other rows do not notice
            assert out[mu][k] == good[mu][k] and out[spec.flags_column][k] == 0, name
        if inp.kind == "value":
            assert np.isnan(out[mu][1]), name
            assert flags.has(out[spec.flags_column][1:2], Method.MISSING_INPUT)[0], name
        else:  # an error: the term left out (the distance stays) or the row flagged, never a silent NaN
            assert np.isfinite(out[mu][1]) or out[spec.flags_column][1] != 0, name


@pytest.mark.parametrize("spec", SPECS, ids=IDS)
def test_malmquist_moves_the_distance_never_mu(spec):
    plain = _run(spec, _rows(spec, 2))
    corrected = _run(spec, _rows(spec, 2), malmquist=True)
    p = spec.prefix
    assert np.array_equal(plain[f"{p}_mu"], corrected[f"{p}_mu"])
    assert corrected[f"{p}_malmquist_applied"].all() and not plain[f"{p}_malmquist_applied"].any()
    assert np.all(corrected[f"{p}_d_mpc"] > plain[f"{p}_d_mpc"])


# ---------------------------------------------------------------- the registry entry itself

@pytest.mark.parametrize("spec", SPECS, ids=IDS)
def test_schema_section_holds_the_common_keys_and_every_default(spec):
    section = schema.section(spec.name)
    assert set(methods.COMMON_KEYS) <= set(section["properties"]), spec.name
    assert section.get("additionalProperties") is False
    for key, sub in section["properties"].items():
        assert "default" in sub, f"{spec.name}.{key} has no default"
    for key in spec.band_keys():
        assert key in section["properties"], key
    # built with no config at all, the settings are the schema's defaults
    defaults = spec.settings_class()()
    for key, sub in section["properties"].items():
        if key not in WORKFLOW_KEYS:
            assert getattr(defaults, key) == sub["default"], key


@pytest.mark.parametrize("spec", SPECS, ids=IDS)
def test_shipped_calibrations_of_the_method_load_and_fit(spec):
    files = [f for f in shipped.names("calibrations") if f.startswith(f"{spec.prefix}_")]
    assert files, f"no shipped calibration named {spec.prefix}_*"
    for name in files:
        cal = load_calibration(name)
        assert cal.method == spec.name and cal.form in spec.forms, name
    assert schema.section(spec.name)["properties"]["calibration"]["default"] in files


@pytest.mark.parametrize("spec", SPECS, ids=IDS)
def test_check_refuses_a_calibration_of_another_method(spec):
    other = next(s for s in SPECS if s is not spec)
    cal = load_calibration(CONFIG[other.name]["calibration"])
    with pytest.raises(ValueError, match=f"not {spec.name}"):
        spec.check(CONFIG, cal)
    wrong_form = dataclasses.replace(load_calibration(CONFIG[spec.name]["calibration"]), form="no_such_form")
    with pytest.raises(ValueError, match="no_such_form"):
        spec.check(CONFIG, wrong_form)


def test_every_list_of_methods_follows_the_registry():
    names, prefixes = list(methods.REGISTRY), methods.prefixes()
    assert len(set(prefixes)) == len(prefixes)
    assert schema.config_schema()["properties"]["methods"]["items"]["enum"] == names
    assert schema.calibration_schema()["properties"]["method"]["enum"] == names
    assert set(schema.calibration_schema()["properties"]["form"]["enum"]) == {f for s in SPECS for f in s.forms}
    assert list(flags.ALL)[-len(names):] == [f"{p}_flags" for p in prefixes]
    assert product.FLAG_COLUMNS == tuple(flags.ALL)
    assert product.METHOD_PREFIX == dict(zip(names, prefixes))
    assert crosscheck.DEFAULT_METHODS == tuple(prefixes)
    assert plots.plot_names(prefixes) == ["hubble_diagram", *(f"{s.prefix}_relation" for s in SPECS
                                                              if s.relation_plot), "dmu_histograms", "dmu_cz",
                                          "dmu_predictor", "method_comparison", "vpec_sky"]
    assert len({s.marker for s in SPECS}) == len(SPECS)  # flagged points told apart by shape
    for spec in SPECS:
        assert columns.method_columns(spec.name) == list(spec.catalog_columns)
        if spec.relation_plot:
            for c in (spec.relation_plot.x, spec.relation_plot.y):
                assert f"{spec.prefix}_{c}" in spec.output_units() and f"{spec.prefix}_{c}" in product.PLOT_COLUMNS
    # one rule serves every method: no per-method rule, resource or group in the SLURM profile
    profile = yaml.safe_load((REPO / "profiles" / "slurm" / "config.yaml").read_text())
    for key in ("set-threads", "set-resources", "groups"):
        assert "distance" in profile[key] and not set(names) & set(profile[key]), key
    assert not list((REPO / "workflow" / "rules").glob(f"{names[0]}.smk"))


# ------------------------------------------------------------------- the stages before

def test_every_stage_writes_the_columns_it_declares():
    from galdist import extinction, kcorr, redshift

    bands = list(CONFIG["bands"])
    n = 4
    coeffs = extinction.ExtinctionCoefficients({b: 1.0 + i for i, b in enumerate(bands)}, method="law",
                                               ebv_scale_included=1.0)
    ext = extinction.apply_extinction(np.full(n, 0.05), np.full(n, 0.005), coeffs)
    assert set(ext) == set(stages.output_units("extinction", bands))
    grid = redshift.MuGrid.build(redshift.make_cosmology(), z_max=0.2, n=200)
    z = redshift.redshift_distances(np.full(n, 10.0), np.full(n, 45.0), np.full(n, 0.02), np.full(n, 1e-4), grid)
    assert set(z) == set(stages.output_units("redshift", bands))
    kc = dict(CONFIG, kcorr=dict(CONFIG["kcorr"], z_max=0.045, dz=0.005))
    k = kcorr.assign(stages.kcorr_grid(kc), np.full(n, 0.02), None, CONFIG["kcorr"]["default_template"])
    assert set(k) == set(stages.output_units("kcorr", bands))
