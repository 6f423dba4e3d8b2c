"""Flags: one meaning per bit, documented once, and the README shows exactly that."""

import subprocess
import sys

import numpy as np

from conftest import REPO
from galdist import flags as F


def test_bits_are_distinct_and_documented():
    for column, enum_cls in F.ALL.items():
        values = [int(m.value) for m in enum_cls]
        assert len(set(values)) == len(values), column
        assert all(v & (v - 1) == 0 for v in values), column  # one bit each
        for m in enum_cls:
            assert m.meaning and m.action, m


def test_set_and_test_bits():
    f = F.new(4)
    F.set_where(f, np.array([True, False, True, False]), F.Quality.WIDTH_INVALID)
    F.set_where(f, np.array([True, True, False, False]), F.Quality.MAG_INVALID)
    assert f.dtype == np.uint32
    assert F.has(f, F.Quality.WIDTH_INVALID).tolist() == [True, False, True, False]
    assert F.has(f, F.Quality.MAG_INVALID | F.Quality.WIDTH_INVALID).tolist() == [True, True, True, False]
    assert f[0] == (1 << 3) | (1 << 5)


def test_readme_flag_table_is_current():
    result = subprocess.run([sys.executable, str(REPO / "scripts" / "sync_flag_table.py"), "--check"])
    assert result.returncode == 0, "README flag table is stale: run python scripts/sync_flag_table.py"
