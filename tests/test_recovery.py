"""Resume and recovery: atomic writes, SIGKILL at several points, a failed shard.

- Every writer in galdist.io puts a file in place by rename only: a failed or killed
  write leaves the old file (or nothing) under the final name.
- Kill test: the demo workflow is started in its own process group and the whole group
  is SIGKILLed while the demo catalog is built, while ingest writes its shards, during the
  per-shard stages, while the product is assembled and while the plots are drawn. After
  each kill the README's command is run again (when Snakemake refuses because the killed
  run left its lock, with the remedy it names, `--unlock`, first, as the README says);
  right after each kill every Parquet and JSON
  file under its final name is complete; the final products equal a clean run's (Parquet
  content and summary; provenance creation time aside) and every other file is
  byte-identical.
- Failed shard: a truncated intermediate makes one shard's job fail with an error naming
  the shard and the file; with --keep-going the other shards finish; once the file is
  removed a dry run plans only that shard's jobs and what depends on them.

The demo survey is invented (galdist.demo); nothing here depends on published values.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import stat
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from conftest import REPO, copy_workflow, file_bytes, run_snakemake, start_and_kill
from galdist import io as gio
from test_determinism import assert_same_products, product_files

# 20000 rows in 4 shards: phases long enough to hit (a clean run takes ~35 s on 2 cores).
ARGS = ("--config", "demo={n_galaxies: 20000}", "shard_rows=5000")
SHARD_IDS = [f"{i:05d}" for i in range(4)]
PLOTS = ["hubble_diagram", "tf_relation", "sbf_relation", "fp_relation", "dmu_histograms", "dmu_cz",
         "dmu_predictor", "method_comparison", "vpec_sky"]
LOCKED = "Directory cannot be locked"
INCOMPLETE = "IncompleteFilesException"


# --- atomic writes (library level) ------------------------------------------------------

def _leftovers(directory: Path) -> list[str]:
    return sorted(p.name for p in directory.iterdir() if p.name.endswith(".tmp"))


def test_failed_parquet_write_keeps_the_old_file(tmp_path, monkeypatch):
    path = tmp_path / "part-00000.parquet"
    gio.write_parquet(pa.table({"x": [1.0, 2.0]}), path)
    real = pq.write_table

    def write_then_die(table, where, **kw):
        real(table.slice(0, 1), where, **kw)  # half the data reaches the disk
        raise OSError("disk full")

    monkeypatch.setattr(gio.pq, "write_table", write_then_die)
    with pytest.raises(OSError, match="disk full"):
        gio.write_parquet(pa.table({"x": [7.0, 8.0, 9.0]}), path)
    assert pq.read_table(path).column("x").to_pylist() == [1.0, 2.0]
    assert _leftovers(tmp_path) == []


def test_streamed_parquet_appears_only_when_complete(tmp_path):
    path = tmp_path / "distances.parquet"
    schema = pa.schema([("x", pa.float64())])
    with gio.AtomicParquetWriter(path, schema) as writer:
        writer.write(pa.table({"x": [1.0]}))
        assert not path.exists()  # a reader sees nothing until the file is complete
    assert pq.read_table(path).num_rows == 1
    with pytest.raises(RuntimeError):
        with gio.AtomicParquetWriter(path, schema) as writer:
            writer.write(pa.table({"x": [5.0, 6.0]}))
            raise RuntimeError("killed")
    assert pq.read_table(path).column("x").to_pylist() == [1.0]
    assert _leftovers(tmp_path) == []


def test_failed_json_write_keeps_the_old_file(tmp_path):
    path = tmp_path / "summary.json"
    gio.write_json({"rows": 3}, path)
    with pytest.raises(ValueError):
        gio.write_json({"rows": float("nan")}, path)  # allow_nan=False refuses NaN
    assert path.read_text() == '{\n  "rows": 3\n}\n'
    assert _leftovers(tmp_path) == []


def test_atomic_path_for_other_writers(tmp_path):
    """io.atomic_path: a temporary name with the final suffix (numpy, matplotlib pick the format from it)."""
    path = tmp_path / "grid.npz"
    with gio.atomic_path(path) as tmp:
        assert tmp.parent == path.parent and tmp.suffix == ".npz" and tmp.name.startswith(".")
        np.savez(tmp, z=np.arange(3.0))
        assert not path.exists()
    with np.load(path) as data:
        assert data["z"].tolist() == [0.0, 1.0, 2.0]
    with pytest.raises(KeyError):
        with gio.atomic_path(path) as tmp:
            np.savez(tmp, z=np.zeros(1))
            raise KeyError("killed")
    with np.load(path) as data:
        assert data["z"].size == 3
    assert [p.name for p in tmp_path.iterdir()] == ["grid.npz"]


def test_atomic_files_get_ordinary_permissions(tmp_path):
    """A renamed temporary file must not keep mkstemp's owner-only mode (common practice: 0666 & ~umask)."""
    umask = os.umask(0o022)
    try:
        gio.write_parquet(pa.table({"x": [1.0]}), tmp_path / "a.parquet")
        gio.write_json({"a": 1}, tmp_path / "a.json")
        with gio.AtomicParquetWriter(tmp_path / "b.parquet", pa.schema([("x", pa.float64())])) as w:
            w.write(pa.table({"x": [1.0]}))
        with gio.atomic_path(tmp_path / "c.npz") as tmp:
            np.savez(tmp, x=np.zeros(1))
    finally:
        os.umask(umask)
    for name in ("a.parquet", "a.json", "b.parquet", "c.npz"):
        assert stat.S_IMODE((tmp_path / name).stat().st_mode) == 0o644, name


def test_unreadable_intermediate_names_the_file(tmp_path):
    shard = tmp_path / "part-00003.parquet"
    shard.write_bytes(b"PAR1 this is not a parquet file")
    with pytest.raises(gio.CorruptFileError, match=r"part-00003\.parquet.*not a readable Parquet file"):
        gio.read_shard(shard, ["ra"])


# Writers outside galdist.io that still write in place (files the lead owns): each test
# fails the writer half-way, as a full disk or a kill would, and looks at the final name.

def _partial_write_then_fail(target, *args, **kwargs):
    if hasattr(target, "write"):
        target.write(b"PK\x03\x04 half a file")
    else:
        Path(target).write_bytes(b"half a file")
    raise OSError("disk full")


def test_mu_grid_is_written_atomically(tmp_path, monkeypatch):
    from galdist import redshift
    grid = redshift.MuGrid.build(redshift.make_cosmology(H0=70.0, Om0=0.3), z_max=0.5, n=200)
    monkeypatch.setattr(np, "savez", _partial_write_then_fail)
    with pytest.raises(OSError, match="disk full"):
        grid.save(tmp_path / "mu_grid.npz")
    assert list(tmp_path.iterdir()) == []


def test_kcorr_grid_is_written_atomically(tmp_path, monkeypatch):
    from galdist import kcorr
    grid = kcorr.KGrid(z=np.linspace(0.0, 0.2, 3), k={"V": np.zeros((1, 3))}, names=("flat",))
    monkeypatch.setattr(np, "savez_compressed", _partial_write_then_fail)
    with pytest.raises(OSError, match="disk full"):
        grid.to_file(tmp_path / "kcorr_grid.npz")
    assert list(tmp_path.iterdir()) == []


def test_plots_are_written_atomically(tmp_path, monkeypatch):
    import matplotlib.figure
    from galdist import plots
    fig = matplotlib.figure.Figure()
    monkeypatch.setattr(matplotlib.figure.Figure, "savefig", lambda self, path, **kw: _partial_write_then_fail(path))
    with pytest.raises(OSError, match="disk full"):
        plots._save(fig, tmp_path / "hubble_diagram.png")
    assert list(tmp_path.iterdir()) == []


# --- the kill test ----------------------------------------------------------------------

def _env() -> dict:
    env = dict(os.environ)
    env.pop("SNAKEMAKE_PROFILE", None)
    return env


def _command(*extra: str) -> list[str]:
    # the README's command (`snakemake --cores all`), on the CI's two cores, with the demo size
    return [sys.executable, "-m", "snakemake", "--cores", "2", *ARGS, *extra]


def _start_and_kill(workdir: Path, when, log: Path, extra: list[str],
                    timeout: float = 600) -> tuple[bool, int | None, str]:
    """The workflow, SIGKILLed as soon as ``when()`` holds: (killed, return code, its output)."""
    killed, rc = start_and_kill(_command(*extra), workdir, _env(), when, log, timeout, poll=0.001)
    return killed, rc, log.read_text()


def _recovery_step(output: str, remedies: list[str], workdir: Path) -> list[str]:
    """If the README's command refused to start after a kill, apply the remedy Snakemake names.

    Returns the extra arguments for the next attempt. Fails if the refusal does not say what to do.
    """
    if LOCKED in output:
        assert "--unlock" in output  # Snakemake names the remedy
        remedies.append("--unlock")
        unlock = subprocess.run(_command("--unlock"), cwd=workdir, env=_env(), capture_output=True, text=True,
                                timeout=300)
        assert unlock.returncode == 0, unlock.stderr[-2000:]
        return []
    if INCOMPLETE in output:
        assert "--rerun-incomplete" in output
        remedies.append("--rerun-incomplete")
        return ["--rerun-incomplete"]
    raise AssertionError(f"the re-run failed for another reason:\n{output[-3000:]}")


def _exists(p: Path) -> bool:
    return p.exists()


def _phases(run: Path, demo: Path):
    """(name, when to kill, what must still be missing right after the kill)."""
    shards = run / "shards"
    stage_files = [shards / stage / f"part-{s}.parquet" for stage in ("extinction", "kcorr", "redshift")
                   for s in SHARD_IDS]
    return [
        ("demo catalog",
         lambda: (demo / "demo_catalog.log").exists(),
         lambda: not (demo / "corvid_reach_survey.parquet").exists()),
        ("ingest",
         lambda: (shards / ".ingest.tmp").exists() or (run / "logs" / "ingest.log").exists(),
         lambda: not (run / "ingest_summary.json").exists()),
        ("per-shard stages",
         lambda: any(map(_exists, stage_files[:4])),
         lambda: not all(map(_exists, stage_files))),
        ("assemble",
         lambda: (run / "logs" / "assemble.log").exists() or any(run.glob(".distances.parquet.*")),
         lambda: not (run / "distances.parquet").exists()),
        ("plots",
         lambda: (run / "logs" / "plots.log").exists(),
         lambda: not all((run / "plots" / f"{p}.png").exists() for p in PLOTS)),
    ]


def _assert_no_half_written_files(results: Path) -> None:
    """Right after a kill every Parquet and JSON file under its final name is complete."""
    for path in results.rglob("*"):
        if path.name.startswith(".") or not path.is_file():
            continue
        if path.suffix == ".parquet":
            pq.read_metadata(path)  # raises on a truncated file (the footer is written last)
        elif path.suffix == ".json":
            json.loads(path.read_text())


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    workdir = copy_workflow(tmp_path_factory.mktemp("clean"))
    result = run_snakemake(workdir, *ARGS)
    assert result.returncode == 0, result.stderr[-3000:]
    return workdir / "results" / "demo"


@pytest.fixture(scope="module")
def killed(tmp_path_factory):
    """The demo, killed once in each phase and resumed after each kill, then run to the end."""
    workdir = copy_workflow(tmp_path_factory.mktemp("killed"))
    logs = tmp_path_factory.mktemp("killed-logs")
    run, demo = workdir / "results" / "demo", workdir / "results" / "demo-input"
    remedies: list[str] = []
    hit = []
    for i, (name, when, unfinished) in enumerate(_phases(run, demo)):
        extra: list[str] = []
        for attempt in range(4):
            killed_now, rc, output = _start_and_kill(workdir, when, logs / f"{i}-{attempt}.log", extra)
            if killed_now:
                break
            assert rc != 0, f"the run finished before the {name} phase could be hit"
            extra = _recovery_step(output, remedies, workdir)
        else:
            raise AssertionError(f"could not reach the {name} phase")
        assert unfinished(), f"the kill during {name} landed after the phase had finished"
        _assert_no_half_written_files(workdir / "results")
        hit.append(name)
    extra: list[str] = []
    for attempt in range(4):
        final = subprocess.run(_command(*extra), cwd=workdir, env=_env(), capture_output=True, text=True,
                               timeout=900)
        if final.returncode == 0:
            break
        extra = _recovery_step(final.stdout + final.stderr, remedies, workdir)
    assert final.returncode == 0, final.stderr[-3000:]
    (logs / "remedies.txt").write_text("\n".join(remedies) + "\n")
    return {"workdir": workdir, "run": run, "phases": hit, "remedies": remedies}


@pytest.mark.slow
def test_kill_at_every_phase_then_resume_gives_the_clean_products(reference, killed):
    assert killed["phases"] == ["demo catalog", "ingest", "per-shard stages", "assemble", "plots"]
    run = killed["run"]
    assert_same_products(reference, run)
    files_ref, files_run = product_files(reference), product_files(run)
    # killed writers may leave hidden temporary files behind; never a file under a final name
    extra = sorted(set(files_run) - set(files_ref))
    assert all(Path(rel).name.startswith(".") for rel in extra), extra
    assert sorted(files_ref) == sorted(set(files_run) - set(extra))
    differ = [rel for rel in files_ref if rel not in ("distances.parquet", "summary.json")
              and file_bytes(files_ref[rel]) != file_bytes(files_run[rel])]
    assert differ == [], differ
    again = run_snakemake(killed["workdir"], "-n", *ARGS)
    assert "Nothing to be done" in again.stdout + again.stderr


@pytest.mark.slow
def test_resume_needs_only_the_readme_command(killed):
    readme = (REPO / "README.md").read_text()
    undocumented = [r for r in dict.fromkeys(killed["remedies"]) if r not in readme]
    assert undocumented == [], f"steps needed after a kill that the README does not give: {undocumented}"


# --- a failed shard --------------------------------------------------------------------

def _job_counts(output: str) -> dict[str, int]:
    """The 'Job stats' table of a Snakemake plan or run."""
    counts = {}
    table = output.split("Job stats:", 1)[1]
    for line in table.splitlines()[3:]:
        parts = line.split()
        if len(parts) != 2 or not parts[1].isdigit() or parts[0] == "total":
            if counts:
                break
            continue
        counts[parts[0]] = int(parts[1])
    return counts


@pytest.mark.slow
def test_failed_shard_names_itself_others_finish_and_only_it_reruns(reference, killed):
    workdir, run = killed["workdir"], killed["run"]
    assert run_snakemake(workdir, *ARGS).returncode == 0  # complete (nothing to do)
    # the state of a run that has finished the extinction stage and nothing after it...
    for name in ("shards/kcorr", "shards/tully_fisher", "shards/sbf", "shards/fp", "plots"):
        shutil.rmtree(run / name)
    for name in ("crosscheck_statistics.json", "distances.parquet", "summary.json", "plot_sample.parquet"):
        (run / name).unlink()
    # ...when a disk problem truncates one shard's extinction file
    bad = run / "shards" / "extinction" / "part-00001.parquet"
    data = bad.read_bytes()
    bad.write_bytes(data[: len(data) // 2])

    result = run_snakemake(workdir, "--keep-going", *ARGS)
    out = result.stdout + result.stderr
    assert result.returncode != 0
    assert "K-corrections, shard 00001 failed" in out, out[-3000:]
    assert "shards/extinction/part-00001.parquet: not a readable Parquet file" in out
    assert not re.search(r"shard 0000[023] failed", out)  # only that shard's job failed
    log = (run / "logs" / "kcorr" / "part-00001.log").read_text()
    assert "part-00001.parquet: not a readable Parquet file" in log
    # the other shards' jobs ran to the end; nothing after the failed shard's job ran
    for shard in ("00000", "00002", "00003"):
        for stage in ("kcorr", "tully_fisher/tf_i_tully_courtois_2012", "sbf/sbf_tonry1997_cousins_i",
                      "fp/fp_j_magoulas_2012"):
            assert (run / "shards" / stage / f"part-{shard}.parquet").exists(), (stage, shard)
    assert not (run / "shards" / "kcorr" / "part-00001.parquet").exists()
    assert not (run / "distances.parquet").exists()

    # the fix: remove the bad file; only shard 00001's jobs and the gathering steps are planned
    bad.unlink()
    plan = run_snakemake(workdir, "-n", *ARGS)
    planned = plan.stdout + plan.stderr
    assert plan.returncode == 0, planned[-2000:]
    assert _job_counts(planned) == {
        "extinction": 1, "kcorr": 1, "distance": 3, "crosscheck_statistics": 1, "groups": 1,  # one per method
        "assemble_part": 4, "assemble": 1, "plots": 1, "run_report": 1, "all": 1}
    # the stage files: only shard 00001's (every product part follows the groups, which gather all shards)
    outputs = [line for line in planned.splitlines() if line.strip().startswith("output:")
               and "/shards/assembly/" not in line]
    assert any("part-00001.parquet" in line for line in outputs)
    assert not any(re.search(r"part-0000[023]\.parquet", line) for line in outputs)

    fixed = run_snakemake(workdir, *ARGS)
    assert fixed.returncode == 0, fixed.stderr[-3000:]
    assert_same_products(reference, run)
