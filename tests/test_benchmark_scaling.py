"""The benchmark's arithmetic: the scaling model (scripts/bench/scaling.py), the disk
sampler and disk use of either product layout (scripts/bench/disk.py), and --config's
checks. Every expected figure is computed by hand from the model's stated assumptions
(its module docstring) on a synthetic benchmark JSON; nothing here times anything."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO / "scripts"))

from bench import scaling  # noqa: E402
from bench.disk import DiskSampler, disk_use, tree_bytes  # noqa: E402


def stage(jobs, seconds):
    return {"jobs": jobs, "seconds": seconds, "max_job_s": seconds / jobs, "cpu_s": 0.0, "max_rss_mb": 0.0}


def synthetic_report() -> dict:
    """Shards of 1000 rows; every job starts in 1 s; extinction costs 1 ms a row, kcorr 2 ms,
    ingest 0.5 ms, crosscheck_statistics 0.25 ms, groups 0.5 ms, assemble 1 ms; kcorr_grid
    3 s, mu_grid 1 s, plots 2 s; Snakemake's dry run 1 s + 0.1 s per job."""
    def size(rows, shards):
        stages = {"ingest": stage(1, 1 + 0.5e-3 * rows), "kcorr_grid": stage(1, 3.0), "mu_grid": stage(1, 1.0),
                  "extinction": stage(shards, shards + 1e-3 * rows), "kcorr": stage(shards, shards + 2e-3 * rows),
                  "crosscheck_statistics": stage(1, 1 + 0.25e-3 * rows), "groups": stage(1, 1 + 0.5e-3 * rows),
                  "assemble": stage(1, 1 + 1e-3 * rows), "plots": stage(1, 2.0)}
        jobs = sum(s["jobs"] for s in stages.values())
        return {"rows": rows, "wall_s": 30.0, "shards": shards, "stages": stages,
                "snakemake": {"noop_s": 1 + 0.1 * jobs}}
    # the smallest run: a tenth of a shard, its jobs nearly pure start-up (1.1, 1.2, 1.0 s)
    small = size(100, 1)
    return {"settings": {"shard_rows": 1000, "cores": 2},
            "sizes": [small, size(2000, 2), size(4000, 4)]}


def test_fit_recovers_the_costs_the_json_was_made_from():
    model = scaling.fit(synthetic_report(), 2000)
    assert model["startup_s"] == pytest.approx(1.1)  # median of extinction 1.1, kcorr 1.2, mu_grid 1.0
    # (seconds - jobs * s0) / rows with s0 = 1.1: extinction (4 - 2.2) / 2000, kcorr (6 - 2.2) / 2000
    assert model["per_shard_s_per_row"]["extinction"] == pytest.approx(0.9e-3)
    assert model["per_shard_s_per_row"]["kcorr"] == pytest.approx(1.9e-3)
    assert model["whole_s_per_row"]["assemble"] == pytest.approx((3.0 - 1.1) / 2000)
    assert model["constant_s"] == {"kcorr_grid": 3.0, "mu_grid": 1.0, "plots": 2.0}
    assert model["warnings"] == []  # a full-shard fit, start-up from a run smaller than a shard
    assert len(scaling.fit(synthetic_report(), 100)["warnings"]) == 1  # a fit from a tenth of a shard
    # dry runs at 9 and 11 jobs: 1.9 and 2.1 s -> 1 s + 0.1 s/job
    assert model["dag"]["s"] == pytest.approx(1.0) and model["dag"]["s_per_job"] == pytest.approx(0.1)


def hand_model():
    """The synthetic costs exactly, start-up 1 s (so the hand sums below stay simple)."""
    return {"fit_rows": 2000, "startup_rows": 100, "shard_rows": 1000, "startup_s": 1.0,
            "per_shard_s_per_row": {"extinction": 1e-3, "kcorr": 2e-3},
            "whole_s_per_row": {"ingest": 0.5e-3, "crosscheck_statistics": 0.25e-3, "groups": 0.5e-3,
                                "assemble": 1e-3},
            "constant_s": {"kcorr_grid": 3.0, "mu_grid": 1.0, "plots": 2.0},
            "dag": {"kind": "affine in jobs", "s": 1.0, "s_per_job": 0.1}}


def test_one_machine_wall_time_by_hand():
    p = scaling.predict(hand_model(), 4000, nodes=1, cores_per_node=2, queue_wait_s=0.0)
    # 4 shards x 2 rules + 4 whole-catalog + 3 constant jobs = 15; DAG 1 + 0.1 * 15 = 2.5 s
    assert (p["shards"], p["jobs"]) == (4, 15)
    parts = p["parts_s"]
    assert parts["Snakemake DAG"] == pytest.approx(2.5)
    # ingest 1 + 2 = 3 s; the grids 3 + 1 = 4 s on the other core -> 4 s
    assert parts["ingest (grids beside it)"] == pytest.approx(4.0)
    # extinction 4 + 4 = 8 s, kcorr 4 + 8 = 12 s: 20 job seconds on 2 cores = 10 s (> one shard's chain 2 + 3 s)
    assert parts["per-shard jobs"] == pytest.approx(10.0)
    # statistics 2 s beside groups 3 s, then assemble 5 s, plots 2 s
    assert parts["crosscheck_statistics | groups"] == pytest.approx(3.0)
    assert parts["assemble"] == pytest.approx(5.0) and parts["plots"] == pytest.approx(2.0)
    assert parts["queue waits"] == 0
    assert p["wall_s"] == pytest.approx(2.5 + 4 + 10 + 3 + 5 + 2)
    assert p["dominant"] == "per-shard jobs (most: kcorr)"


def test_cluster_waves_queue_wait_and_the_chain_limit():
    p = scaling.predict(hand_model(), 4000, nodes=2, cores_per_node=2, queue_wait_s=10.0)
    parts = p["parts_s"]
    # 4 slots: grids 4 s over the 3 free cores beside ingest's 3 s -> 3 s; 20 job s / 4 = 5 s = the chain 5 s
    assert parts["ingest (grids beside it)"] == pytest.approx(3.0)
    assert parts["per-shard jobs"] == pytest.approx(5.0)
    # waves: 8 jobs / 4 slots = 2 (= the chain's 2 steps); queue 10 s x (head 1 + waves 2 + tail 3 steps)
    assert p["waves"] == 2 and parts["queue waits"] == pytest.approx(60.0)
    assert p["wall_s"] == pytest.approx(2.5 + 3 + 5 + 3 + 5 + 2 + 60)
    # more nodes cannot beat one shard's chain (extinction 2 s -> kcorr 3 s)
    wide = scaling.predict(hand_model(), 4000, nodes=100, cores_per_node=2)
    assert wide["parts_s"]["per-shard jobs"] == pytest.approx(5.0)


def test_checks_predict_larger_measured_sizes_from_full_shard_fits_only():
    out = scaling.checks(synthetic_report())
    # the 100-row run is less than a shard: no fit from it; 2000 -> 4000 is the one check
    assert [(c["fit_rows"], c["rows"]) for c in out] == [(2000, 4000)]
    expected = scaling.predict(scaling.fit(synthetic_report(), 2000), 4000, 1, 2, 0.0)["wall_s"]
    assert out[0]["predicted_s"] == pytest.approx(expected, abs=0.05)
    assert out[0]["ratio"] == pytest.approx(expected / 30.0, abs=0.01)


def test_model_from_prints_the_table(tmp_path, capsys):
    import benchmark
    f = tmp_path / "b.json"
    f.write_text(json.dumps(synthetic_report()))
    assert benchmark.main(["--model-from", str(f), "--predict", "1e4", "--nodes", "1,3"]) == 0
    text = capsys.readouterr().out
    assert "2e3 -> 4e3" in text  # the check, sizes printed as labels
    rows = [line.split() for line in text.splitlines() if line.strip().startswith("1e4 ")]
    assert [r[1] for r in rows] == ["1", "3"]  # one line per node count


@pytest.mark.parametrize("item", ["run=other", "shard_rows=5000", "no_value", "=x"])
def test_config_rejects_what_the_benchmark_sets_or_cannot_parse(item, capsys):
    import benchmark
    with pytest.raises(SystemExit) as exc:
        benchmark.main(["--sizes", "1e4", "--config", item])
    assert exc.value.code == 2
    assert "--config" in capsys.readouterr().err


def test_sampler_keeps_the_peak_of_files_gone_by_the_end(tmp_path):
    run = tmp_path / "run"
    (run / "shards" / "kcorr").mkdir(parents=True)
    (run / "summary.json").write_bytes(b"x" * 100)
    with DiskSampler(run, interval=0) as sampler:  # no thread: sampled by hand
        part = run / "shards" / "kcorr" / "part-00000.parquet"
        part.write_bytes(b"x" * 3000)
        sampler.sample()
        part.unlink()  # a temp file removed once read
        sampler.sample()
    s = sampler.summary()
    assert (s["samples"], s["peak_shards_bytes"], s["peak_run_bytes"]) == (2, 3000, 3100)
    assert tree_bytes(run / "shards") == 0 and tree_bytes(run / "absent") == 0


@pytest.mark.parametrize("layout", ["file", "parts"])
def test_disk_use_reads_either_product_layout(tmp_path, layout):
    run = tmp_path / "run"
    (run / "shards" / "ingest").mkdir(parents=True)
    (run / "shards" / "ingest" / "part-00000.parquet").write_bytes(b"x" * 500)
    catalog = tmp_path / "catalog.parquet"
    catalog.write_bytes(b"x" * 1000)
    if layout == "file":
        (run / "distances.parquet").write_bytes(b"x" * 2000)
    else:
        (run / "distances").mkdir()
        for i in range(2):
            (run / "distances" / f"part-{i:05d}.parquet").write_bytes(b"x" * 1000)
    end = disk_use(run, catalog, rows=10)
    assert end["product_layout"] == layout and end["product_over_catalog"] == 2.0
    assert end["intermediates_over_catalog"] == 0.5 and end["intermediates_judged_on"] == "end of run"
    peak = {"peak_shards_bytes": 1200, "peak_run_bytes": 3700, "interval_s": 1.0, "samples": 3}
    during = disk_use(run, catalog, rows=10, peak=peak)
    assert during["intermediates_over_catalog"] == 1.2 and during["intermediates_judged_on"] == "sampled peak"
    assert during["peak"]["shards_bytes_per_row"] == 120.0 and during["intermediates_over_catalog_end"] == 0.5
