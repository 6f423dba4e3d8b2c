"""Blueshifted galaxies get distances: Local Group members and galaxies falling into
nearby clusters have cz < 0 and are classic Tully-Fisher and SBF objects.

Reproducer: an early type at cz = -244 km/s used to get REDSHIFT_INVALID, K = NaN and
no SBF distance. Now z_helio down to -0.005 (galdist's limit, cz = -1500 km/s) is valid,
the K(z) grid starts there, and such rows are LOCAL_FLOW, never invalid.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import yaml

from conftest import copy_workflow, run_snakemake, small_catalog
from galdist import flags

C_KMS = 299792.458


@pytest.mark.slow
def test_blueshifted_galaxy_gets_the_distances_of_the_same_galaxy_at_rest(tmp_path):
    wf = copy_workflow(tmp_path)
    cols = small_catalog(60, seed=8)
    # rows 0 and 1: one galaxy, observed at cz = -244 km/s and at z = 0
    for name, values in cols.items():
        values[1] = values[0]
    cols["galaxy_id"][1] = "T-REST"
    cols["z_helio"][0], cols["z_helio"][1] = -244.0 / C_KMS, 0.0
    pq.write_table(pa.table(cols), wf / "cat.parquet")
    # K and the (1 + z) width broadening are the only places z enters a method's modulus:
    # switched off here so the two rows must agree exactly ("K aside")
    conf = {"catalog": "cat.parquet", "run": "blue", "shard_rows": 100,
            "tully_fisher": {"apply_kcorrection": False, "apply_redshift_broadening": False, "mc_draws": 0},
            "sbf": {"apply_kcorrection": False, "mc_draws": 0}}
    (wf / "run.yaml").write_text(yaml.safe_dump(conf))
    res = run_snakemake(wf, "--configfile", "run.yaml")
    assert res.returncode == 0, res.stderr[-3000:]
    t = pq.read_table(wf / "results/blue/distances.parquet").to_pandas()
    blue, rest = t.iloc[0], t.iloc[1]
    assert not blue["quality_flags"] & flags.Quality.REDSHIFT_INVALID
    assert blue["z_flags"] & flags.Redshift.LOCAL_FLOW and not blue["z_flags"] & flags.Redshift.NO_REDSHIFT
    assert np.isfinite(blue["K_I"])  # the K stage still ran for it, on a grid reaching cz = -1500 km/s
    for m in ("tf", "sbf"):
        assert np.isfinite(blue[f"{m}_mu"]), m
        assert blue[f"{m}_mu"] == pytest.approx(rest[f"{m}_mu"], abs=1e-9), m
        assert blue[f"{m}_mu_err"] == pytest.approx(rest[f"{m}_mu_err"], abs=1e-9), m
