"""Determinism and isolation: identical products from identical runs, no network, no code from data.

- Two runs of the demo in two fresh copies of the workflow (different directories) give
  byte-identical intermediate files and identical products, provenance creation time aside.
- One of the two runs has outbound network blocked by a socket guard installed in every
  Python process (a ``sitecustomize`` module on PYTHONPATH); a unit test proves the guard
  really blocks.
- Config and calibration files are never executed: a static scan finds no eval/exec or
  unsafe YAML/pickle loading in the code, YAML tags that would build Python objects are
  refused, and shell syntax in a configured path is never run.

The demo survey is invented (galdist.demo); nothing here depends on published values.
"""

from __future__ import annotations

import ast
import json
import os
import re
import subprocess
import sys
import textwrap
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from conftest import REPO, assert_same_table, copy_workflow, drop_volatile, file_bytes, run_snakemake
from galdist import calibration as gcal
from galdist import config as gconfig

# 2000 rows in shards of 1000 (config/config.yaml): two shards, so shard order matters.
DEMO_ARGS = ("--config", "demo={n_galaxies: 2000}")
PROVENANCE_KEY = b"galdist.provenance"
# Files that are not products: logs and benchmarks hold times, the timestamp file is Snakemake's.
NOT_PRODUCTS = ("logs", "benchmarks")


# --- product comparison (also used by test_recovery) ----------------------------------

def provenance_of(path: Path) -> dict:
    meta = pq.read_schema(path).metadata or {}
    assert PROVENANCE_KEY in meta, f"{path} carries no provenance"
    return json.loads(meta[PROVENANCE_KEY])


def assert_same_products(run_a: Path, run_b: Path) -> None:
    """Final products of two runs are identical (provenance times aside)."""
    assert_same_table(pq.read_table(run_a / "distances.parquet"), pq.read_table(run_b / "distances.parquet"),
                      "distances.parquet")
    pa_, pb_ = provenance_of(run_a / "distances.parquet"), provenance_of(run_b / "distances.parquet")
    assert set(pa_) == set(pb_)
    assert drop_volatile(pa_) == drop_volatile(pb_)
    sa = json.loads((run_a / "summary.json").read_text())
    sb = json.loads((run_b / "summary.json").read_text())
    assert drop_volatile(sa) == drop_volatile(sb)
    assert sa["rows_in"] == sa["rows_out"] > 0


def product_files(run: Path) -> dict[str, Path]:
    """Every file a run leaves under results/<run>/, logs and benchmarks excepted."""
    out = {}
    for p in sorted(run.rglob("*")):
        rel = p.relative_to(run)
        if p.is_file() and rel.parts[0] not in NOT_PRODUCTS and p.name != ".snakemake_timestamp":
            out[str(rel)] = p
    return out


# --- the network guard ----------------------------------------------------------------

GUARD = textwrap.dedent('''
    """Test network guard (tests/test_determinism.py): refuse every non-local connection.

    Loaded by every Python process started with this directory on PYTHONPATH. Local
    IPC (AF_UNIX, loopback) stays allowed. Each install and each blocked attempt is
    appended to the file named by GALDIST_NET_GUARD_LOG.
    """
    import ipaddress
    import os
    import socket

    _LOG = os.environ.get("GALDIST_NET_GUARD_LOG")
    MESSAGE = "galdist test network guard: outbound network access blocked"


    def _note(line):
        if _LOG:
            with open(_LOG, "a", encoding="utf-8") as fh:
                fh.write(f"{line} pid={os.getpid()}\\n")


    def _local_host(host):
        if host in (None, "", "localhost", b"localhost"):
            return True
        if isinstance(host, bytes):
            host = host.decode("ascii", "replace")
        try:
            return ipaddress.ip_address(str(host).split("%")[0]).is_loopback
        except ValueError:
            return False


    def _local(family, address):
        if family == getattr(socket, "AF_UNIX", object()) or not isinstance(address, tuple):
            return True
        return _local_host(address[0])


    def _block(what, target):
        _note(f"BLOCKED {what} {target!r}")
        raise OSError(f"{MESSAGE} ({what} {target!r})")


    def _wrap_method(name, address_index):
        original = getattr(socket.socket, name)

        def guarded(self, *args):
            if not _local(self.family, args[address_index]):
                _block(name, args[address_index])
            return original(self, *args)

        setattr(socket.socket, name, guarded)


    _wrap_method("connect", 0)
    _wrap_method("connect_ex", 0)
    _wrap_method("sendto", -1)


    def _wrap_resolver(name):
        original = getattr(socket, name)

        def guarded(host, *args, **kwargs):
            if not _local_host(host):
                _block(name, host)
            return original(host, *args, **kwargs)

        setattr(socket, name, guarded)


    for _name in ("getaddrinfo", "gethostbyname", "gethostbyname_ex", "create_connection"):
        if _name == "create_connection":
            _orig_cc = socket.create_connection

            def create_connection(address, *args, **kwargs):
                if not _local_host(address[0]):
                    _block("create_connection", address)
                return _orig_cc(address, *args, **kwargs)

            socket.create_connection = create_connection
        else:
            _wrap_resolver(_name)

    _note("installed")
''')


def guard_env(directory: Path) -> dict:
    """Environment whose Python processes all load the network guard."""
    directory.mkdir(parents=True, exist_ok=True)
    (directory / "sitecustomize.py").write_text(GUARD, encoding="utf-8")
    env = dict(os.environ)
    env.pop("SNAKEMAKE_PROFILE", None)
    env["PYTHONPATH"] = os.pathsep.join([str(directory), *filter(None, [env.get("PYTHONPATH")])])
    env["GALDIST_NET_GUARD_LOG"] = str(directory / "guard.log")
    # astropy must not try to fetch IERS tables either: leave its defaults, the guard decides
    return env


def guard_log(directory: Path) -> list[str]:
    path = directory / "guard.log"
    return path.read_text(encoding="utf-8").splitlines() if path.exists() else []


# The guard's own test: a child process that TRIES outbound connections, DNS and a URL
# fetch, each of which the guard must refuse (nothing here reaches the network).
PROBE = textwrap.dedent('''
    import socket, sys, threading, urllib.request
    results = {}
    def attempt(name, func):
        try:
            func()
            results[name] = "ok"
        except OSError as exc:
            results[name] = "guard" if "network guard" in str(exc) else f"other: {exc}"
    # non-local: a TEST-NET-1 address (RFC 5737), a DNS name, a URL, UDP
    attempt("tcp", lambda: socket.create_connection(("192.0.2.1", 80), timeout=2))
    attempt("connect", lambda: socket.socket().connect(("192.0.2.1", 80)))
    attempt("dns", lambda: socket.getaddrinfo("example.org", 443))
    attempt("url", lambda: urllib.request.urlopen("http://example.org/", timeout=2))
    attempt("udp", lambda: socket.socket(socket.AF_INET, socket.SOCK_DGRAM).sendto(b"x", ("192.0.2.1", 53)))
    # local IPC stays possible
    server = socket.socket(); server.bind(("127.0.0.1", 0)); server.listen(1)
    threading.Thread(target=lambda: server.accept(), daemon=True).start()
    attempt("loopback", lambda: socket.create_connection(server.getsockname(), timeout=5).close())
    a, b = socket.socketpair(); a.sendall(b"hi")
    results["unix"] = "ok" if b.recv(2) == b"hi" else "failed"
    print(results)
''')


def test_network_guard_blocks_outbound_and_allows_local(tmp_path):
    """The guard itself: without it these would connect or fail differently, with it they are refused."""
    env = guard_env(tmp_path / "guard")
    out = subprocess.run([sys.executable, "-c", PROBE], env=env, capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    results = parse_probe_output(out.stdout)
    assert {k: results[k] for k in ("tcp", "connect", "dns", "url", "udp")} == dict.fromkeys(
        ("tcp", "connect", "dns", "url", "udp"), "guard"), results
    assert results["loopback"] == "ok" and results["unix"] == "ok", results
    log = guard_log(tmp_path / "guard")
    assert any(line.startswith("installed") for line in log)
    assert sum(line.startswith("BLOCKED") for line in log) >= 5


def parse_probe_output(text: str) -> dict:
    """Parse the probe's printed dict without eval."""
    return ast.literal_eval(text.strip().splitlines()[-1])


# --- two runs of the demo: one plain, one with the network blocked ----------------------

@pytest.fixture(scope="module")
def two_runs(tmp_path_factory):
    plain = copy_workflow(tmp_path_factory.mktemp("plain"))
    guarded = copy_workflow(tmp_path_factory.mktemp("guarded"))
    guard_dir = tmp_path_factory.mktemp("netguard")
    first = run_snakemake(plain, *DEMO_ARGS)
    cmd = [sys.executable, "-m", "snakemake", "--cores", "2", *DEMO_ARGS]
    second = subprocess.run(cmd, cwd=guarded, env=guard_env(guard_dir), capture_output=True, text=True,
                            timeout=900)
    return {"plain": (plain, first), "guarded": (guarded, second), "guard_dir": guard_dir}


@pytest.mark.slow
def test_demo_runs_with_network_blocked(two_runs):
    workdir, result = two_runs["guarded"]
    assert result.returncode == 0, result.stderr[-3000:]
    log = guard_log(two_runs["guard_dir"])
    installs = {line.split("pid=")[1] for line in log if line.startswith("installed")}
    jobs = len(list((workdir / "results" / "demo" / "benchmarks").rglob("*.tsv")))
    # the guard was live in Snakemake itself and in every rule script's interpreter
    assert jobs >= 10 and len(installs) > jobs, (len(installs), jobs)
    blocked = [line for line in log if line.startswith("BLOCKED")]
    assert blocked == [], f"the workflow tried to reach the network: {blocked}"


@pytest.mark.slow
def test_two_runs_give_identical_products(two_runs):
    (dir_a, res_a), (dir_b, res_b) = two_runs["plain"], two_runs["guarded"]
    assert res_a.returncode == 0, res_a.stderr[-3000:]
    assert res_b.returncode == 0, res_b.stderr[-3000:]
    run_a, run_b = dir_a / "results" / "demo", dir_b / "results" / "demo"
    assert_same_products(run_a, run_b)
    # every other file (demo input, shards, stage outputs, grids, statistics, plot sample,
    # plots) is byte-identical: fixed seeds and stable orders everywhere
    files_a, files_b = product_files(run_a), product_files(run_b)
    assert sorted(files_a) == sorted(files_b)
    assert len([f for f in files_a if f.startswith("shards/ingest/")]) == 2
    differ = [rel for rel in files_a if rel not in ("distances.parquet", "summary.json")
              and file_bytes(files_a[rel]) != file_bytes(files_b[rel])]
    assert differ == [], f"files differ between identical runs: {differ}"
    demo_a = dir_a / "results" / "demo-input" / "corvid_reach_survey.parquet"
    demo_b = dir_b / "results" / "demo-input" / "corvid_reach_survey.parquet"
    assert demo_a.read_bytes() == demo_b.read_bytes()


# --- no code from data ----------------------------------------------------------------

UNSAFE_CALLS = {"eval", "exec", "compile", "__import__"}
UNSAFE_ATTRS = {("yaml", "load"), ("yaml", "unsafe_load"), ("yaml", "full_load"), ("yaml", "load_all"),
                ("yaml", "unsafe_load_all"), ("pickle", "load"), ("pickle", "loads"), ("os", "system"),
                ("os", "popen"), ("marshal", "loads")}


def _unsafe_calls(tree: ast.AST) -> list[str]:
    found = []
    for node in ast.walk(tree):
        if not isinstance(node, ast.Call):
            continue
        f = node.func
        if isinstance(f, ast.Name) and f.id in UNSAFE_CALLS:
            found.append(f"{f.id}() line {node.lineno}")
        elif isinstance(f, ast.Attribute) and isinstance(f.value, ast.Name) and (f.value.id, f.attr) in UNSAFE_ATTRS:
            found.append(f"{f.value.id}.{f.attr}() line {node.lineno}")
        for kw in node.keywords:
            if kw.arg in ("allow_pickle", "shell") and isinstance(kw.value, ast.Constant) and kw.value.value is True:
                found.append(f"{kw.arg}=True line {node.lineno}")
    return found


def test_no_eval_exec_or_unsafe_loading_in_the_code():
    """Common practice: data (config, calibrations, catalogs) is parsed, never executed."""
    py_files = sorted((REPO / "workflow" / "galdist").rglob("*.py")) + sorted((REPO / "scripts").rglob("*.py"))
    assert len(py_files) > 20
    problems = {str(p.relative_to(REPO)): bad for p in py_files
                if (bad := _unsafe_calls(ast.parse(p.read_text(encoding="utf-8"))))}
    assert problems == {}
    # Snakemake files are not plain Python: a textual scan
    pattern = re.compile(r"\b(eval|exec)\s*\(|yaml\.(load|unsafe_load|full_load)\s*\(|allow_pickle\s*=\s*True")
    smk = [REPO / "Snakefile", *sorted((REPO / "workflow" / "rules").glob("*.smk"))]
    hits = [f"{p.name}:{i}" for p in smk for i, line in enumerate(p.read_text().splitlines(), 1)
            if pattern.search(line.split("#")[0])]
    assert hits == []


def test_the_scan_finds_what_it_looks_for():
    """The static scan above is not vacuous."""
    bad = "import yaml, numpy as np\nx = eval('1')\nyaml.load(s)\nnp.load(p, allow_pickle=True)\n"
    assert len(_unsafe_calls(ast.parse(bad))) == 3
    assert _unsafe_calls(ast.parse("import yaml\nyaml.safe_load(s)\n")) == []


PYTHON_TAG = '!!python/object/apply:os.system ["touch {marker}"]'


def test_yaml_tags_are_refused_by_config_and_calibration_loaders(tmp_path):
    marker = tmp_path / "PWNED"
    conf = tmp_path / "evil.yaml"
    conf.write_text(f"run: x\nshard_rows: {PYTHON_TAG.format(marker=marker)}\n")
    with pytest.raises(gconfig.ConfigError, match="evil.yaml is not valid YAML"):
        gconfig.load(conf)
    cal_text = (REPO / "workflow" / "galdist" / "data" / "calibrations" / "tf_i_tully_courtois_2012.yaml").read_text()
    cal = tmp_path / "evil_cal.yaml"
    cal.write_text(cal_text.replace("scatter: 0.41", f"scatter: {PYTHON_TAG.format(marker=marker)}"))
    assert cal.read_text() != cal_text
    with pytest.raises(gcal.CalibrationError, match="evil_cal.yaml: is not valid YAML"):
        gcal.load_calibration(cal)
    assert not marker.exists()


@pytest.mark.parametrize("override", [
    "catalog=$(touch PWNED).parquet",
    "catalog=`touch PWNED`.csv",
    "catalog=x.parquet; touch PWNED",
])
def test_paths_from_config_are_never_executed(workflow_copy, override):
    result = run_snakemake(workflow_copy, "-n", "--config", override)
    out = result.stdout + result.stderr
    assert result.returncode != 0
    assert "galdist cannot start" in out and "input file not found" in out, out[-2000:]
    assert not (workflow_copy / "PWNED").exists()
    assert "Traceback (most recent call last)" not in out


def test_calibration_paths_resolve_against_the_working_directory(tmp_path, monkeypatch):
    """README: paths are relative to the directory snakemake runs in (never searched, never run)."""
    src = REPO / "workflow" / "galdist" / "data" / "calibrations" / "sbf_tonry1997_cousins_i.yaml"
    (tmp_path / "cals").mkdir()
    (tmp_path / "cals" / "mine.yaml").write_text(src.read_text())
    monkeypatch.chdir(tmp_path)
    conf = gconfig.validate(gconfig.load(REPO / "config" / "config.yaml"))
    conf["methods"] = ["sbf"]
    conf["sbf"]["calibration"] = "cals/mine.yaml"
    conf["kcorr"]["colour_pair"] = ["V", "I"]
    cals = gconfig.check_stages(conf)
    assert Path(cals["sbf"].path) == Path("cals/mine.yaml")
    conf["sbf"]["calibration"] = "$(touch PWNED).yaml"
    with pytest.raises(gconfig.ConfigError, match=r"sbf.calibration': file not found: \$\(touch PWNED\)"):
        gconfig.check_stages(conf)
    assert not (tmp_path / "PWNED").exists()
