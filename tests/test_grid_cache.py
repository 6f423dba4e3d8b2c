"""Tests of galdist.grid_cache through the real rule scripts: a hit gives the very bytes
the computation gave and skips the heavy imports; any changed input misses."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from galdist import config as gconfig
from galdist import grid_cache, integrity
from galdist.kcorr import DEFAULT_TEMPLATE_FILE

ROOT = Path(__file__).resolve().parents[1]
HEAVY = ("astropy", "scipy", "speclite", "dust_extinction")

# Runs a rule script as Snakemake would (a `snakemake` object in its globals) in a fresh
# interpreter, then prints which heavy libraries it imported.
DRIVER = """
import json, runpy, sys, types
spec = json.loads(sys.argv[1])
snakemake = types.SimpleNamespace(config=spec["config"], params=types.SimpleNamespace(**spec["params"]),
                                  output=[spec["output"]], log=[spec["log"]])
runpy.run_path(spec["script"], init_globals={"snakemake": snakemake})
print(json.dumps(sorted({m.split(".")[0] for m in sys.modules} & set(spec["heavy"]))))
"""


@pytest.fixture(scope="module")
def defaults():
    return gconfig.validate(gconfig.load(ROOT / "config" / "config.yaml"))


def run_rule(name: str, tmp: Path, config: dict, params: dict, tag: str) -> tuple[Path, list[str]]:
    out = tmp / "run" / f"{name}-{tag}{'.json' if name == 'extinction_coefficients' else '.npz'}"
    spec = {"script": str(ROOT / "scripts" / "rules" / f"{name}.py"), "config": config, "params": params,
            "output": str(out), "log": str(tmp / f"{name}-{tag}.log"), "heavy": HEAVY}
    done = subprocess.run([sys.executable, "-c", DRIVER, json.dumps(spec)], capture_output=True, text=True,
                          cwd=tmp)
    assert done.returncode == 0, done.stderr
    return out, json.loads(done.stdout.strip().splitlines()[-1])


def entries(tmp: Path) -> list[Path]:
    return sorted((tmp / "out" / grid_cache.CACHE_FOLDER).glob("*"))


def test_mu_grid_hit_is_identical_and_light_and_a_changed_cosmology_misses(tmp_path, defaults):
    config = {"output_dir": str(tmp_path / "out"), "redshift": defaults["redshift"]}
    params = {"redshift": defaults["redshift"]}
    cold, imported_cold = run_rule("mu_grid", tmp_path, config, params, "cold")
    assert "astropy" in imported_cold  # the miss computed with astropy.cosmology
    assert len(entries(tmp_path)) == 1
    warm, imported_warm = run_rule("mu_grid", tmp_path, config, params, "warm")
    assert warm.read_bytes() == cold.read_bytes()
    assert imported_warm == []  # the hit copied the file: no astropy, scipy, ...
    assert "from the cache" in (tmp_path / "mu_grid-warm.log").read_text()

    other = json.loads(json.dumps(defaults["redshift"]))
    other["cosmology"]["H0"] = 73.0
    changed, imported = run_rule("mu_grid", tmp_path, dict(config, redshift=other), {"redshift": other}, "h73")
    assert "astropy" in imported and len(entries(tmp_path)) == 2
    with np.load(cold) as a, np.load(changed) as b:
        # mu shifts by 5 log10(73/70) at every z (distances scale as 1/H0; common practice)
        assert np.allclose(a["mu"] - b["mu"], 5 * np.log10(73 / 70), atol=1e-9, equal_nan=True)


def test_kcorr_grid_changed_template_file_misses(tmp_path, defaults):
    templates = tmp_path / "templates.ecsv"
    shutil.copyfile(DEFAULT_TEMPLATE_FILE, templates)
    kcorr = dict(defaults["kcorr"], templates=str(templates), dz=0.005, z_max=0.1)
    config = {"output_dir": str(tmp_path / "out"), "kcorr": kcorr, "bands": defaults["bands"]}

    def params():  # as common.smk passes them: the content digest of the template file
        return {"kcorr": kcorr, "bands": defaults["bands"], "content": [integrity.content_digest([templates])]}

    cold, _ = run_rule("kcorr_grid", tmp_path, config, params(), "cold")
    warm, imported = run_rule("kcorr_grid", tmp_path, config, params(), "warm")
    assert warm.read_bytes() == cold.read_bytes() and imported == []

    # the same file with one template's fluxes doubled: same config, new content
    lines = templates.read_text().splitlines()
    data = [i for i, line in enumerate(lines) if line and not line.startswith("#")][1:]  # after the header
    for i in data:
        wave, first, *rest = lines[i].split()
        lines[i] = " ".join([wave, repr(2 * float(first)), *rest])
    templates.write_text("\n".join(lines) + "\n")
    changed, imported = run_rule("kcorr_grid", tmp_path, config, params(), "changed")
    assert "speclite" in imported and len(entries(tmp_path)) == 2
    with np.load(cold) as a, np.load(changed) as b:
        # scaling a template leaves K unchanged (K depends on the spectrum's shape alone:
        # Hogg et al. 2002, arXiv:astro-ph/0210394, eq. 13, from memory): same values, new entry
        assert np.allclose(a["k"], b["k"], equal_nan=True)


def test_extinction_coefficients_hit_and_changed_law_misses(tmp_path, defaults):
    ext = defaults["extinction"]
    config = {"output_dir": str(tmp_path / "out"), "extinction": ext, "bands": defaults["bands"]}
    params = {"extinction": ext, "bands": defaults["bands"], "content": ["no table", "no filter files"]}
    cold, _ = run_rule("extinction_coefficients", tmp_path, config, params, "cold")
    warm, imported = run_rule("extinction_coefficients", tmp_path, config, params, "warm")
    assert warm.read_bytes() == cold.read_bytes() and imported == []
    other = dict(ext, r_v=2.5)
    changed, _ = run_rule("extinction_coefficients", tmp_path, dict(config, extinction=other),
                          dict(params, extinction=other), "rv25")
    assert len(entries(tmp_path)) == 2
    # the changed law was computed, not served from the first entry
    assert json.loads(changed.read_text()) != json.loads(cold.read_text())


def test_key_follows_the_code_and_the_inputs(tmp_path):
    package = tmp_path / "galdist"
    shutil.copytree(grid_cache.PACKAGE, package, ignore=shutil.ignore_patterns("__pycache__"))
    before = grid_cache.code_digest(package)
    assert before == grid_cache.code_digest(grid_cache.PACKAGE)
    (package / "kcorr.py").write_text((package / "kcorr.py").read_text() + "\n# changed\n")
    grid_cache.code_digest.cache_clear()  # once per process in a job; here the file changed since
    assert grid_cache.code_digest(package) != before
    key = grid_cache.cache_key("mu_grid", {"redshift": {"grid_n": 10}})
    assert key == grid_cache.cache_key("mu_grid", {"redshift": {"grid_n": 10}})
    assert key != grid_cache.cache_key("mu_grid", {"redshift": {"grid_n": 11}})
    assert key != grid_cache.cache_key("kcorr_grid", {"redshift": {"grid_n": 10}})


def test_a_hit_never_calls_the_computation(tmp_path):
    calls = []

    def build(path):
        calls.append(path)
        Path(path).write_text("grid")

    for name in ("a.json", "b.json"):
        grid_cache.cached(tmp_path / name, tmp_path, "demo_kind", {"x": 1}, build)
    assert len(calls) == 1 and (tmp_path / "b.json").read_text() == "grid"


def test_remembered_answers_are_kept_only_in_an_existing_cache(tmp_path):
    calls = []

    def compute():
        calls.append(1)
        return [["r", 1.0000000000000002]]

    folder = tmp_path / grid_cache.CACHE_FOLDER
    assert grid_cache.remembered(folder, "demo_answer", {"x": 1}, compute) == [["r", 1.0000000000000002]]
    assert not folder.exists()  # nothing written where no grid job ran yet (a failed start writes nothing)
    folder.mkdir()
    for _ in range(2):
        assert grid_cache.remembered(folder, "demo_answer", {"x": 1}, compute) == [["r", 1.0000000000000002]]
    assert len(calls) == 2  # the first call with a folder stored it; the next read it (float exact)
    grid_cache.remembered(folder, "demo_answer", {"x": 2}, compute)
    assert len(calls) == 3


def test_parse_time_answers_match_the_computed_ones(tmp_path, defaults):
    # the extinction factors go into the method rules' params: a remembered value must be
    # the very value computed, or every start would re-run the method jobs
    from galdist import conventions

    folder = tmp_path / grid_cache.CACHE_FOLDER
    folder.mkdir()
    direct = conventions.extinction_factors(defaults, "sfd98")
    first = conventions.extinction_factors(defaults, "sfd98", cache_dir=folder)
    again = conventions.extinction_factors(defaults, "sfd98", cache_dir=folder)
    assert direct == first == again and list(direct) == list(again)
    assert len(list(folder.glob("extinction_factors-*.json"))) == 1
    # a changed extinction section is another entry
    conventions.extinction_factors(dict(defaults, extinction=dict(defaults["extinction"], r_v=2.9)), "sfd98",
                                   cache_dir=folder)
    assert len(list(folder.glob("extinction_factors-*.json"))) == 2


def test_filter_check_remembers_a_file_by_content(tmp_path, defaults):
    folder = tmp_path / grid_cache.CACHE_FOLDER
    folder.mkdir()
    curve = tmp_path / "tophat.csv"
    curve.write_text("wavelength,throughput\n6000,1\n6500,1\n7000,1\n")
    config = dict(defaults, bands={"R": {"filter": str(curve), "system": "AB", "ab_minus_vega": None}})
    gconfig.check_bands(config, folder)
    gconfig.check_bands(config, folder)
    assert len(list(folder.glob("filter_check-*.json"))) == 1
    curve.write_text("wavelength,throughput\n6000,0\n6500,0\n7000,0\n")  # now unusable: must be checked again
    with pytest.raises(gconfig.ConfigError, match="positive throughput"):
        gconfig.check_bands(config, folder)


def test_cache_entries_and_copies_get_ordinary_permissions(tmp_path):
    """Entries are written through a private temporary (mkstemp: 0600); the renamed file
    must get the mode any new file gets (common practice: 0666 & ~umask)."""
    import os
    import stat

    umask = os.umask(0o022)
    try:
        for name in ("a.json", "b.json"):  # a miss (entry written) then a hit (output copied)
            grid_cache.cached(tmp_path / "run" / name, tmp_path, "demo_kind", {"x": 3},
                              lambda path: Path(path).write_text("grid"))
    finally:
        os.umask(umask)
    written = [*entries_in(tmp_path), tmp_path / "run" / "a.json", tmp_path / "run" / "b.json"]
    assert len(written) == 3
    for path in written:
        assert stat.S_IMODE(path.stat().st_mode) == 0o644, path


def entries_in(output_dir: Path) -> list[Path]:
    return sorted((output_dir / grid_cache.CACHE_FOLDER).glob("*"))
