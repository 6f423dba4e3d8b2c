"""Integrity: staleness decided by content, recovery that always ends, hostile configs.

One regression test per reproduced problem, each with its reproducer. The end-to-end
ones share one small workflow copy (200 invented galaxies, shards of 100 rows) and
run in order.
"""

from __future__ import annotations

import json
import os
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import yaml

from conftest import REPO, copy_workflow, run_snakemake, small_catalog
from galdist import config as gconfig
from galdist import io, preflight, redshift
from galdist.calibration import load_calibration
from galdist.errors import CalibrationError, CorruptFileError, StaleInputError

OLD = time.time() - 30 * 86400  # a month ago: what `cp -p` of an old file leaves


def write(cols, path):
    pq.write_table(pa.table(cols), path)
    return path


# --- staleness by content, end to end ---------------------------------------------------------

@pytest.fixture(scope="module")
def wf(tmp_path_factory):
    wf = copy_workflow(tmp_path_factory.mktemp("integrity"))
    write(small_catalog(200, seed=3), wf / "cat.parquet")
    cal = wf / "my_tf.yaml"
    cal.write_text((wf / "workflow/galdist/data/calibrations/tf_i_tully_courtois_2012.yaml").read_text())
    conf = {"catalog": "cat.parquet", "run": "integ", "shard_rows": 100, "methods": ["tully_fisher"],
            "tully_fisher": {"calibration": "my_tf.yaml", "mc_draws": 0}}
    (wf / "run.yaml").write_text(yaml.safe_dump(conf))
    return wf


def _run(wf, *extra):
    res = run_snakemake(wf, "--configfile", "run.yaml", *extra)
    assert res.returncode == 0, res.stderr[-3000:]
    return res


def _product(wf):
    return pq.read_table(wf / "results/integ/distances.parquet")


@pytest.mark.slow
def test_1_older_catalog_copied_in_is_seen(wf):
    """`cp -p` of another catalog with an older time stamp: Snakemake used to say
    "Nothing to be done" and keep the old product."""
    _run(wf)
    z_before = _product(wf).column("z_helio").to_numpy()
    cols = small_catalog(200, seed=3)
    cols["z_helio"] = cols["z_helio"] * 1.1
    write(cols, wf / "cat.parquet")
    os.utime(wf / "cat.parquet", (OLD, OLD))
    _run(wf)
    np.testing.assert_allclose(_product(wf).column("z_helio").to_numpy(), z_before * 1.1)
    summary = json.loads((wf / "results/integ/ingest_summary.json").read_text())
    assert summary["inputs"][0]["sha256"] == io.sha256_of(wf / "cat.parquet")


@pytest.mark.slow
def test_2_edited_calibration_with_old_time_stamp_reruns_the_method(wf):
    """An edited calibration with an old mtime: assembly used to record the new text
    while tf_mu still came from the old one."""
    mu_before = _product(wf).column("tf_mu").to_numpy()
    cal = wf / "my_tf.yaml"
    cal.write_text(cal.read_text().replace("coefficients: [-21.39, -8.81]", "coefficients: [-21.29, -8.81]"))
    os.utime(cal, (OLD, OLD))
    _run(wf)
    product = _product(wf)
    # a zero point 0.1 mag fainter: every distance modulus 0.1 mag smaller
    # tf_mu is stored as float32 (galdist.dictionary.PRECISION_NOTE): 2^-24 relative, 2.3e-6 mag at mu = 39
    np.testing.assert_allclose(product.column("tf_mu").to_numpy(), mu_before - 0.1, atol=1e-5, rtol=0)
    prov = json.loads(product.schema.metadata[b"galdist.provenance"])
    assert prov["calibrations"]["tully_fisher"]["text"] == cal.read_text()


@pytest.mark.slow
@pytest.mark.parametrize("damage", ["truncate", "empty", "delete"])
def test_3_damaged_ingest_shard_is_rebuilt_by_the_same_command(wf, damage):
    """A truncated, empty or deleted shard used to drop out of the glob: statistics over
    fewer rows, then "row count changed" on every re-run, the old product gone."""
    before = _product(wf)
    shard = wf / "results/integ/shards/ingest/part-00001.parquet"
    if damage == "truncate":
        shard.write_bytes(shard.read_bytes()[:500])
    elif damage == "empty":
        shard.write_bytes(b"")
    else:
        shard.unlink()
    res = _run(wf)
    assert "ingest will run again" in res.stderr
    after = _product(wf)
    assert after.num_rows == 200
    assert after.column("tf_mu").equals(before.column("tf_mu"))


# --- stage files joined only to their own shard and calibration --------------------------------

def _shard_pair(tmp_path, z_factor=1.0):
    cols = small_catalog(30)
    cols["z_helio"] = cols["z_helio"] * z_factor
    table = pa.table(cols)
    path = tmp_path / f"shard-{z_factor}.parquet"
    pq.write_table(table.replace_schema_metadata({io.FINGERPRINT_KEY: io.fingerprint(table).encode()}), path)
    return path


def test_stage_file_from_a_shard_with_other_redshifts_is_refused(tmp_path):
    """Same IDs, z x 1.1: the fingerprint used to hash galaxy_id only, and the stale
    redshift file was joined silently."""
    old, new = _shard_pair(tmp_path), _shard_pair(tmp_path, 1.1)
    stage = tmp_path / "redshift.parquet"
    io.write_stage_columns({"mu_z": np.zeros(30)}, stage, io.read_fingerprint(old))
    io.read_shard(old, ["galaxy_id"], {"redshift": stage})  # its own shard: fine
    with pytest.raises(StaleInputError, match=f"computed from another version of shard {new}.*{stage}"):
        io.read_shard(new, ["galaxy_id"], {"redshift": stage})


def test_every_stale_file_is_named_at_once(tmp_path):
    old, new = _shard_pair(tmp_path), _shard_pair(tmp_path, 1.1)
    stages = {}
    for name in ("extinction", "kcorr"):
        stages[name] = tmp_path / f"{name}.parquet"
        io.write_stage_columns({"x": np.zeros(30)}, stages[name], io.read_fingerprint(old))
    with pytest.raises(StaleInputError, match="2 file") as err:
        io.read_shard(new, ["galaxy_id"], stages)
    assert all(str(p) in str(err.value) for p in stages.values())


def test_leftover_temporary_of_a_killed_write_is_cleaned(tmp_path):
    target = tmp_path / "distances.parquet"
    left = tmp_path / ".distances.parquet.k1ll3d.tmp"
    left.write_bytes(b"half a product")
    io.write_parquet(pa.table({"a": [1.0]}), target)
    assert not left.exists() and target.exists()


def test_damaged_grid_and_json_are_named(tmp_path):
    grid = tmp_path / "mu_grid.npz"
    grid.write_bytes(b"not a zip file at all")
    with pytest.raises(CorruptFileError, match=f"{grid}.*delete it"):
        redshift.MuGrid.load(grid)
    summary = tmp_path / "ingest_summary.json"
    summary.write_text('{"rows_in": 3, ')
    with pytest.raises(CorruptFileError, match=f"{summary}.*delete it"):
        io.read_json(summary)


# --- catalogs and configs that used to hang, crash late or pass ---------------------------------

def test_empty_catalog_stops_before_any_job(tmp_path):
    cols = {k: v[:0] for k, v in small_catalog(3).items()}
    path = write(cols, tmp_path / "empty.parquet")
    msgs = [f.message for f in preflight.check({"catalog": str(path)}).errors]
    assert any("holds no rows" in m for m in msgs), msgs
    (tmp_path / "empty.csv").write_text(",".join(cols) + "\n")
    msgs = [f.message for f in preflight.check({"catalog": str(tmp_path / "empty.csv")}).errors]
    assert any("holds no rows" in m for m in msgs), msgs


BOMB = "".join(f"l{i}: &l{i} [{', '.join([f'*l{i - 1}'] * 9)}]\n" for i in range(1, 10))


def test_alias_bomb_is_refused_at_once(tmp_path):
    """~600 bytes of nested aliases used to hang for minutes in the finite-number check."""
    path = tmp_path / "bomb.yaml"
    path.write_text("l0: &l0 [1, 2, 3, 4, 5, 6, 7, 8, 9]\n" + BOMB + "run: x\n")
    start = time.perf_counter()
    with pytest.raises(gconfig.ConfigError, match="aliases expand"):
        gconfig.load(path)
    result = preflight.check(yaml.safe_load(path.read_text()))
    assert any("aliases expand" in f.message for f in result.errors)
    assert time.perf_counter() - start < 5


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs named pipes")
def test_pipes_and_devices_are_not_inputs(tmp_path):
    """A FIFO or /dev/zero as catalog or calibration used to hang or eat memory."""
    fifo = tmp_path / "cat.parquet"
    os.mkfifo(fifo)
    msgs = [f.message for f in preflight.check({"catalog": str(fifo)}).errors]
    assert any("not a regular file" in m for m in msgs), msgs
    good = write(small_catalog(20), tmp_path / "good.parquet")
    result = preflight.check({"catalog": str(good), "tully_fisher": {"calibration": "/dev/zero"}})
    assert any("/dev/zero" in f.message and "regular file" in f.message for f in result.errors)


@pytest.mark.parametrize("run", ["nl\n", "x" * 300, "../up", ".hidden"])
def test_run_names_are_restricted(run):
    result = preflight.check({"run": run})
    assert any("'run'" in f.message for f in result.errors), run


@pytest.mark.parametrize("user, expect", [
    ({"tully_fisher": {"width_definition": "w20"}}, "width_definition"),
    ({"kcorr": {"default_template": "exp_tau5gry"}}, "kcorr.default_template"),
    ({"redshift": {"cosmology": {"name": "Planck99"}}}, "redshift.cosmology.name"),
    ({"extinction": {"coefficients": "table", "table_keys": {"V": "landolt-V", "I": "landolt-Q", "J": "ukirt-J",
                                                                     "Ks": "ukirt-K"}}},
     "landolt-Q"),
    ({"extinction": {"r_v": -3.1}}, "extinction.r_v"),
    ({"extinction": {"law": "G23", "r_v": 2.1}}, "extinction.r_v"),
    ({"kcorr": {"dz": 0.0007}}, "kcorr.dz"),
    ({"redshift": {"grid_z_max": 0.5}}, "redshift.grid_z_max"),
    ({"tully_fisher": {"band": "V"}}, "tully_fisher.band"),
])
def test_cross_key_mistakes_stop_before_any_job(tmp_path, user, expect):
    path = write(small_catalog(20), tmp_path / "cat.parquet")
    msgs = [f.message for f in preflight.check({"catalog": str(path)} | user).errors]
    assert any(expect in m for m in msgs), msgs


def test_command_line_numbers_for_nullable_keys_are_converted(tmp_path):
    """--config 'tully_fisher={gamma0: 0.5, gamma1: 1.6}' arrives as text and was refused."""
    path = write(small_catalog(20), tmp_path / "cat.parquet")
    result = preflight.check({"catalog": str(path), "tully_fisher": {"gamma0": "0.5", "gamma1": "1.6",
                                                                     "turbulence_wt": "null"}})
    assert result.errors == [], [f.message for f in result.errors]
    assert result.config["tully_fisher"]["gamma0"] == 0.5 and result.config["tully_fisher"]["turbulence_wt"] is None


# --- absurd calibration values and plots of any finite value ------------------------------------

CAL_DIR = REPO / "workflow" / "galdist" / "data" / "calibrations"


@pytest.mark.parametrize("old, new, expect", [
    ("pivot: 2.5", "pivot: 1.0e+300", "'pivot'"),
    ("scatter: 0.41", "scatter: 1.0e+308", "'scatter'"),
    ("coefficients: [-21.39, -8.81]", "coefficients: [-21.39, 1.0e+308]", "'coefficients.1'"),
    ("coefficient_errors: [0.07, 0.16]", "coefficient_errors: [0.07, 1.0e+300]", "'coefficient_errors.1'"),
    ("valid_range: [2.0, 2.9]", "valid_range: [2.0, 1.0e+300]", "'valid_range.1'"),
    # negative-definite: used to drop the calibration error silently (tf_mu_err 0.42 vs 10.2)
    ("coefficient_errors: [0.07, 0.16]", "coefficient_errors: [0.07, 0.16]\ncovariance: [[-0.0049, 0], [0, -0.0256]]",
     "positive semi-definite"),
    # indefinite: used to make the analytic and Monte Carlo errors disagree
    ("coefficient_errors: [0.07, 0.16]", "coefficient_errors: [0.07, 0.16]\ncovariance: [[0.0049, 0.05], [0.05, 0.0256]]",
     "positive semi-definite"),
])
def test_absurd_calibration_values_are_refused(tmp_path, old, new, expect):
    text = (CAL_DIR / "tf_i_tully_courtois_2012.yaml").read_text()
    assert old in text
    path = tmp_path / "cal.yaml"
    path.write_text(text.replace(old, new))
    with pytest.raises(CalibrationError, match=expect):
        load_calibration(path)


def test_plots_draw_any_finite_value(tmp_path):
    """ebv = 1e308 once gave mu = -1.5e308 and the plots job crashed ('arange: cannot
    compute length'); ingest now flags such inputs, and the plots still never break."""
    import pandas as pd

    from galdist import plots

    n = 40
    rng = np.random.default_rng(5)
    df = pd.DataFrame({"z_cmb": np.r_[np.full(n - 1, 0.02), 1e300], "tf_mu": np.r_[np.full(n - 1, 35.0), -1.5e308],
                       "tf_mu_err": np.full(n, 0.4), "mu_z_err": np.full(n, 0.1),
                       "tf_dmu": np.r_[rng.normal(0, 0.4, n - 2), 1.0e300, -1.5e308], "tf_flags": np.zeros(n, int),
                       "gal_l": np.full(n, 10.0), "gal_b": np.full(n, 20.0), "tf_vpec": np.r_[np.zeros(n - 1), 1e308]})
    assert plots.dmu_histograms(df, tmp_path / "h.png", ["tf"], 0.0) == n - 2
    assert plots.vpec_sky(df, tmp_path / "v.png", ["tf"]) == n - 1
    assert (tmp_path / "h.png").stat().st_size > 0 and (tmp_path / "v.png").stat().st_size > 0


@pytest.mark.slow
def test_removed_stage_files_keep_the_run_resumable(tmp_path):
    """keep_intermediates: false: the per-shard stage files are gone once the product is
    written (and copy_inputs: false leaves the measured inputs out of it), a second run finds nothing to do, and an edited calibration re-creates what its
    method needs and gives the right numbers (the zero point's shift, exactly)."""
    wf = copy_workflow(tmp_path)
    write(small_catalog(200, seed=4), wf / "cat.parquet")
    cal = wf / "my_tf.yaml"
    cal.write_text((wf / "workflow/galdist/data/calibrations/tf_i_tully_courtois_2012.yaml").read_text())
    conf = {"catalog": "cat.parquet", "run": "lean", "shard_rows": 100, "methods": ["tully_fisher"],
            "keep_intermediates": False, "copy_inputs": False,
            "tully_fisher": {"calibration": "my_tf.yaml", "mc_draws": 0}}
    (wf / "run.yaml").write_text(yaml.safe_dump(conf))
    run = wf / "results/lean"
    _run(wf)
    assert not [p for stage in ("extinction", "kcorr", "redshift", "tully_fisher")
                for p in (run / "shards" / stage).rglob("*.parquet")]
    assert len(list((run / "shards/ingest").glob("part-*.parquet"))) == 2
    mu_before = pq.read_table(run / "distances.parquet").column("tf_mu").to_numpy()
    assert mu_before.size == 200
    # copy_inputs: false: the catalog's identity columns only, the measured ones left in the catalog
    names = set(pq.read_schema(run / "distances.parquet").names)
    assert {"galaxy_id", "ra", "dec", "z_helio", "tf_mu", "A_I", "quality_flags"} <= names
    assert not names & {"mag_I", "mag_I_err", "w50", "axis_ratio"}
    dry = run_snakemake(wf, "--configfile", "run.yaml", "-n")
    assert dry.returncode == 0 and "Nothing to be done" in dry.stdout + dry.stderr, dry.stdout[-2000:]
    cal.write_text(cal.read_text().replace("coefficients: [-21.39, -8.81]", "coefficients: [-21.29, -8.81]"))
    _run(wf)
    # a zero point 0.1 mag fainter: every modulus 0.1 mag smaller (float32 storage: 1e-5 mag)
    np.testing.assert_allclose(pq.read_table(run / "distances.parquet").column("tf_mu").to_numpy(),
                               mu_before - 0.1, atol=1e-5, rtol=0)
