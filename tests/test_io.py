"""Streaming I/O helpers: aligned shard walks, the on-disk record spill, writer settings.

These are galdist's own mechanics (no published values); each test checks a result
against a direct, whole-file computation.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from galdist import io


def _write(path, table, row_group):
    pq.write_table(table, path, row_group_size=row_group)
    return path


def test_iter_shard_walks_files_with_different_row_groups_in_step(tmp_path):
    n = 1000
    ids = pa.array([f"G{i:04d}" for i in range(n)])
    shard_table = pa.table({"galaxy_id": ids, "x": np.arange(n, dtype=float)})
    fp = io.fingerprint(shard_table)
    shard = tmp_path / "shard.parquet"
    pq.write_table(shard_table.replace_schema_metadata(
        {io.FINGERPRINT_KEY: fp.encode()}), shard, row_group_size=97)
    stage = tmp_path / "stage.parquet"
    pq.write_table(pa.table({"y": -np.arange(n, dtype=float)}).replace_schema_metadata(
        {io.FINGERPRINT_KEY: fp.encode()}), stage, row_group_size=256)
    seen = []
    for cols, _ in io.iter_shard(shard, {"stage": stage}, rows=128):
        assert isinstance(cols["galaxy_id"], pa.Array)               # text stays Arrow
        assert np.array_equal(cols["x"], -cols["y"])                  # rows aligned
        assert cols["galaxy_id"].to_pylist() == [f"G{int(i):04d}" for i in cols["x"]]
        seen.append(len(cols["x"]))
    assert seen == [128] * 7 + [104]


def test_record_spill_round_trip_in_chunks_and_cleanup(tmp_path):
    dtype = np.dtype([("a", "<f4"), ("b", "<u4")])
    parts = [np.zeros(n, dtype=dtype) for n in (5, 0, 11, 3)]
    for i, p in enumerate(parts):
        p["a"], p["b"] = np.arange(len(p)) + 0.5, i
    with io.RecordSpill(tmp_path / "out.json", chunk_rows=4) as spill:
        for p in parts:
            spill.extend({"methods": {"tf": p}})
        reader = spill.nested()["methods"]["tf"]
        first, second = list(reader), list(reader)                    # re-iterable
        assert [len(c) for c in first] == [4, 4, 4, 4, 3] and len(reader) == 19
        assert np.array_equal(np.concatenate(first), np.concatenate(parts))
        assert np.array_equal(np.concatenate(second), np.concatenate(parts))
        assert [p.name for p in tmp_path.iterdir()] == [".out.json.spill"]
    assert not any(tmp_path.iterdir())                                # removed on close
    (tmp_path / ".out.json.spill").mkdir()                            # left by a killed job
    (tmp_path / ".out.json.spill" / "0.bin").write_bytes(b"stale")
    with io.RecordSpill(tmp_path / "out.json") as spill:
        spill.append("x", np.zeros(2))
        assert sorted(p.name for p in (tmp_path / ".out.json.spill").iterdir()) == ["0.bin"]
        assert np.array_equal(np.concatenate(list(spill.reader("x"))), np.zeros(2))


def test_writer_dictionary_only_on_text_and_flags(tmp_path):
    table = pa.table({"galaxy_id": ["a", "b"], "tf_flags": pa.array([0, 1], pa.uint32()),
                      "tf_mu": [33.0, 34.0]})
    path = tmp_path / "t.parquet"
    io.write_parquet(table, path)
    meta = pq.read_metadata(path).row_group(0)
    encodings = {meta.column(i).path_in_schema: meta.column(i).encodings for i in range(meta.num_columns)}
    assert "RLE_DICTIONARY" in encodings["galaxy_id"] and "RLE_DICTIONARY" in encodings["tf_flags"]
    assert "RLE_DICTIONARY" not in encodings["tf_mu"]
    assert pq.read_table(path).equals(table)
