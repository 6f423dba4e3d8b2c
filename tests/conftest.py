"""Shared test helpers: a tiny hand-made catalog and a way to run the workflow."""

from __future__ import annotations

import os
import signal
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO / "workflow"))

BANDS = ["V", "I", "Ks"]


def small_catalog(n: int = 40, seed: int = 1) -> dict:
    """A small canonical-column catalog with valid values (invented, for tests only)."""
    rng = np.random.default_rng(seed)
    cols = {
        "galaxy_id": np.array([f"T-{i:04d}" for i in range(n)], dtype=object),
        "ra": rng.uniform(0, 359, n), "dec": rng.uniform(-80, 80, n),
        "z_helio": rng.uniform(0.005, 0.05, n), "z_helio_err": np.full(n, 3e-5),
        "ebv": rng.uniform(0.01, 0.1, n), "ebv_err": np.full(n, 0.003),
        "w50": rng.uniform(150, 500, n), "w50_err": np.full(n, 6.0),
        "axis_ratio": rng.uniform(0.25, 0.7, n), "axis_ratio_err": np.full(n, 0.03),
        "sbf_mag": rng.uniform(29, 33, n), "sbf_mag_err": np.full(n, 0.07),
        "sbf_color": rng.uniform(1.05, 1.25, n), "sbf_color_err": np.full(n, 0.02),
        "galaxy_class": np.array(["disc"] * n, dtype=object),
    }
    for b in BANDS:
        cols[f"mag_{b}"] = rng.uniform(11, 16, n)
        cols[f"mag_{b}_err"] = np.full(n, 0.04)
    # Fundamental-Plane inputs (the default config runs fp): the shipped J-band plane's ranges, except
    # dispersions below ~110 km/s (log sigma_0 < 2.05), which that calibration leaves out
    cols |= {"fp_sigma": rng.uniform(90, 250, n), "fp_sigma_err": np.full(n, 8.0),
             "fp_aperture_arcsec": np.full(n, 1.5), "fp_re_arcsec": rng.uniform(2, 10, n),
             "fp_re_err": np.full(n, 0.3), "fp_mu_e": rng.uniform(16.5, 18.5, n), "fp_mu_e_err": np.full(n, 0.05)}
    return cols


def copy_workflow(dest: Path) -> Path:
    """A copy of the workflow (code and config, no results) to run in isolation."""
    for name in ("Snakefile", "workflow", "scripts", "config", "profiles"):
        src = REPO / name
        if src.is_dir():
            shutil.copytree(src, dest / name, ignore=shutil.ignore_patterns("__pycache__"))
        else:
            shutil.copy2(src, dest / name)
    return dest


def run_snakemake(workdir: Path, *args: str, timeout: int = 900) -> subprocess.CompletedProcess:
    env = dict(os.environ)
    env.pop("SNAKEMAKE_PROFILE", None)
    cmd = [sys.executable, "-m", "snakemake", "--cores", "2", *args]
    return subprocess.run(cmd, cwd=workdir, env=env, capture_output=True, text=True, timeout=timeout)


@pytest.fixture
def workflow_copy(tmp_path):
    return copy_workflow(tmp_path)


# --- comparing the products of two runs (determinism, recovery, SLURM vs local) ------------

# Fields that legitimately differ between two runs (wall-clock time, checkout state).
VOLATILE_KEYS = {"created_utc", "git_commit"}


def file_bytes(path: Path) -> bytes:
    """A product file's bytes for comparing two runs: the run report's line with the
    creation time and commit (VOLATILE_KEYS) is left out."""
    import re

    data = Path(path).read_bytes()
    if Path(path).name == "report.html":
        data = re.sub(rb'<p class="muted">created [^<]*</p>', b"", data)
    return data


def drop_volatile(obj):
    """``obj`` (parsed JSON) without the VOLATILE_KEYS, at any depth."""
    if isinstance(obj, dict):
        return {k: drop_volatile(v) for k, v in obj.items() if k not in VOLATILE_KEYS}
    if isinstance(obj, list):
        return [drop_volatile(v) for v in obj]
    return obj


def assert_same_table(a, b, what: str) -> None:
    """Same columns, types, units (field metadata) and values; NaN equals NaN, nothing else is tolerated."""
    import pyarrow as pa

    assert a.column_names == b.column_names, what
    assert a.num_rows == b.num_rows, what
    for fa, fb in zip(a.schema, b.schema):
        assert fa.type == fb.type, f"{what}: {fa.name} {fa.type} != {fb.type}"
        assert fa.metadata == fb.metadata, f"{what}: field metadata of {fa.name}"
    for name in a.column_names:
        ca, cb = a.column(name), b.column(name)
        if pa.types.is_floating(ca.type):
            np.testing.assert_array_equal(ca.to_numpy(), cb.to_numpy(), err_msg=f"{what}: {name}")
        else:
            assert ca.to_pylist() == cb.to_pylist(), f"{what}: {name}"


# --- killing a run at a chosen moment (recovery tests) --------------------------------------

def group_gone(pgid: int, timeout: float = 10.0) -> bool:
    """True once no process of group ``pgid`` is left."""
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        try:
            os.killpg(pgid, 0)
        except ProcessLookupError:
            return True
        time.sleep(0.05)
    return False


def start_and_kill(cmd: list[str], cwd: Path, env: dict, when, log: Path, timeout: float = 600,
                   poll: float = 0.002) -> tuple[bool, int | None]:
    """Run ``cmd`` in its own process group; SIGKILL the whole group as soon as ``when()`` holds.

    Returns (killed, return code if it ended by itself first); its output goes to ``log``.
    """
    with open(log, "w") as out:
        proc = subprocess.Popen(cmd, cwd=cwd, env=env, stdout=out, stderr=subprocess.STDOUT,
                                start_new_session=True)
        end = time.monotonic() + timeout
        try:
            while proc.poll() is None and time.monotonic() < end:
                if when():
                    os.killpg(proc.pid, signal.SIGKILL)
                    proc.wait()
                    assert group_gone(proc.pid), "processes of the killed run survived"
                    return True, None
                time.sleep(poll)
        finally:
            if proc.poll() is None:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait()
    return False, proc.returncode


# --- a page in a real browser (the run report) --------------------------------------------

def chromium_or_skip() -> str:
    """Debian's headless Chromium, installed here when missing (as the SLURM test installs
    its cluster); the test is skipped, with the reason, where that cannot be done."""
    for name in ("chromium", "chromium-browser"):
        if shutil.which(name):
            return shutil.which(name)
    env = {"DEBIAN_FRONTEND": "noninteractive", "PATH": "/usr/sbin:/usr/bin:/sbin:/bin"}
    try:
        subprocess.run(["apt-get", "update", "-qq"], check=True, capture_output=True, timeout=600, env=env)
        subprocess.run(["apt-get", "install", "-y", "-qq", "chromium"], check=True, capture_output=True,
                       timeout=900, env=env)
    except (OSError, subprocess.SubprocessError) as exc:
        pytest.skip(f"headless Chromium cannot be installed here: {exc}")
    return shutil.which("chromium") or pytest.skip("chromium not found after installing it")


def open_in_browser(page: Path, workdir: Path) -> tuple[str, Path]:
    """Render ``page`` in headless Chromium: (the DOM text it ends with, a screenshot of
    the first screen). A copy of the page gets a probe script (the page itself has none)
    that writes 'IMAGES LOADED' or 'IMAGES BROKEN' once every image has decoded or not."""
    chromium = chromium_or_skip()
    probe = ("<p id='probe'></p><script>window.onload = () => { const ok = [...document.images].every("
             "i => i.complete && i.naturalWidth > 0); document.getElementById('probe').textContent = "
             "'IMAGES ' + (ok ? 'LOADED' : 'BROKEN'); };</script></body>")
    copy = workdir / "probe.html"
    copy.write_text(page.read_text(encoding="utf-8").replace("</body>", probe), encoding="utf-8")
    args = [chromium, "--headless", "--no-sandbox", "--disable-gpu", "--virtual-time-budget=5000"]
    dom = subprocess.run([*args, "--dump-dom", copy.as_uri()], capture_output=True, text=True, timeout=180)
    shot = workdir / "first_screen.png"
    subprocess.run([*args, "--window-size=1280,1000", f"--screenshot={shot}", page.as_uri()],
                   capture_output=True, timeout=180, cwd=workdir)
    return dom.stdout, shot


def calibration_sample_file(tmp_path: Path, drop=()) -> str:
    """A small calibration sample (30 rows of ``small_catalog`` in 3 groups, one in three with a
    reference modulus) without the columns ``drop``, written as Parquet; returns its path."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    cols = small_catalog(30)
    cols["group_id"] = np.array([f"G{i % 3}" for i in range(30)], dtype=object)
    cols["mu_ref"] = np.where(np.arange(30) % 3 == 0, 32.0, np.nan)
    cols["mu_ref_err"] = np.where(np.arange(30) % 3 == 0, 0.1, np.nan)
    for k in drop:
        cols.pop(k)
    path = tmp_path / f"sample-{'-'.join(drop) or 'all'}.parquet"
    pq.write_table(pa.table(cols), path)
    return str(path)
