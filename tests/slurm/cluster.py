"""A throw-away single-node SLURM cluster on localhost, for tests/test_slurm.py.

Debian's packages (munge, slurmctld, slurmd, slurm-client) are installed when missing;
the daemons are started in the foreground as children of this process, with every
file they write (key, sockets, state, spool, logs, slurm.conf) in one private
temporary directory and on free ports, so a machine's own munge or SLURM — if it has
one — is neither used nor disturbed. ``stop()`` ends exactly the processes that
``start()`` started, by PID, and removes the directory.

No systemd is needed or used. Accounting (slurmdbd) and cgroups are left out: see
``slurm.conf.template`` beside this file.
"""

from __future__ import annotations

import os
import pwd
import re
import shutil
import signal
import socket
import string
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
DEBIAN_PACKAGES = ("munge", "slurmctld", "slurmd", "slurm-client")
BINARIES = ("munged", "munge", "unmunge", "slurmctld", "slurmd", "scontrol", "sinfo", "squeue", "sbatch", "srun", "scancel")
PARTITION = "galdist"
# The executor plugin and the job-step plugin it runs inside each SLURM job, pinned to
# versions that work with Snakemake 9.27; their other requirements (numpy, pandas,
# snakemake-interface-*, throttler) are Snakemake's and galdist's own.
PLUGINS = ("snakemake-executor-plugin-slurm==2.8.0", "snakemake-executor-plugin-slurm-jobstep==0.6.1")
PLUGIN_DIR = Path(tempfile.gettempdir()) / ("galdist-test-" + "-".join(p.replace("snakemake-executor-plugin-", "")
                                                                       .replace("==", "-") for p in PLUGINS))


class ClusterUnavailable(Exception):
    """This machine cannot host the test cluster (not root, not Debian, no apt)."""


def _which_all() -> list[str]:
    path = os.environ.get("PATH", "") + ":/usr/sbin:/sbin"
    return [b for b in BINARIES if shutil.which(b, path=path) is None]


def ensure_packages(timeout: int = 600) -> float:
    """Install Debian's munge and SLURM packages when a binary is missing.

    Returns the seconds spent installing (0 when nothing was missing). Raises
    ClusterUnavailable where installing is impossible here, ``RuntimeError`` when
    apt-get itself fails.
    """
    missing = _which_all()
    if not missing:
        return 0.0
    if os.geteuid() != 0:
        raise ClusterUnavailable(f"SLURM binaries {missing} missing and not root, so cannot install them")
    if shutil.which("apt-get") is None or not Path("/etc/debian_version").exists():
        raise ClusterUnavailable(f"SLURM binaries {missing} missing and this is not a Debian system with apt-get")
    env = dict(os.environ, DEBIAN_FRONTEND="noninteractive")
    t0 = time.monotonic()
    for cmd in (["apt-get", "update", "-qq"],
                ["apt-get", "install", "-y", "-qq", "--no-install-recommends", *DEBIAN_PACKAGES]):
        proc = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=timeout)
        if proc.returncode != 0:
            raise RuntimeError(f"{' '.join(cmd)} failed ({proc.returncode}):\n{proc.stdout[-2000:]}\n{proc.stderr[-2000:]}")
    still = _which_all()
    if still:
        raise RuntimeError(f"after installing {DEBIAN_PACKAGES}, still missing: {still}")
    return time.monotonic() - t0


def ensure_executor_plugin(target: Path = PLUGIN_DIR, timeout: int = 300) -> Path:
    """Install the SLURM executor plugin into ``target`` (once; later runs reuse it).

    Only a subprocess whose PYTHONPATH holds ``target`` sees the plugin: once it is
    importable, every Snakemake start asks ``scontrol`` for the cluster's settings,
    which costs ~10 s wherever no controller answers. So it stays out of the main
    environment. ``--no-deps``: the rest is installed already, and a second copy of
    Snakemake's interface packages on PYTHONPATH would shadow the real ones.
    """
    if (target / "snakemake_executor_plugin_slurm").is_dir() and (target / "snakemake_executor_plugin_slurm_jobstep").is_dir():
        return target
    tmp = Path(tempfile.mkdtemp(prefix=target.name + "-", dir=target.parent))
    cmd = [sys.executable, "-m", "pip", "install", "--quiet", "--disable-pip-version-check", "--no-deps",
           "--target", str(tmp), *PLUGINS]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)
    if proc.returncode != 0:
        shutil.rmtree(tmp, ignore_errors=True)
        raise RuntimeError(f"{' '.join(cmd)} failed:\n{proc.stdout[-2000:]}\n{proc.stderr[-2000:]}")
    try:
        tmp.rename(target)  # atomic: a concurrent run either sees all of it or none
    except OSError:
        shutil.rmtree(tmp, ignore_errors=True)  # another run got there first
    return target


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def node_hardware() -> str:
    """This machine's CPUs and memory as a slurm.conf node description (from ``slurmd -C``).

    RealMemory is lowered by 5 % so slurmd, which compares it with what it measures,
    never drains the node for having less memory than configured.
    """
    out = subprocess.run(["slurmd", "-C"], capture_output=True, text=True, timeout=30).stdout
    fields = dict(re.findall(r"(\w+)=(\S+)", out.splitlines()[0] if out else ""))
    keys = ("CPUs", "Boards", "SocketsPerBoard", "CoresPerSocket", "ThreadsPerCore")
    if not all(k in fields for k in keys + ("RealMemory",)):
        cpus = os.cpu_count() or 1
        mem = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") // 2**20
        return f"CPUs={cpus} RealMemory={int(mem * 0.95)}"
    hw = " ".join(f"{k}={fields[k]}" for k in keys)
    return f"{hw} RealMemory={int(int(fields['RealMemory']) * 0.95)}"


class LocalSlurmCluster:
    """munged + slurmctld + slurmd on 127.0.0.1, configured from ``slurm.conf.template``.

    Use ``start()`` then ``env()`` for every client command (it carries SLURM_CONF),
    and ``stop()`` in a finalizer.
    """

    def __init__(self) -> None:
        self.root: Path | None = None
        self.procs: dict[str, subprocess.Popen] = {}
        self.conf: Path | None = None
        self.munge_socket: Path | None = None
        self.start_seconds: float | None = None

    # -- set-up -----------------------------------------------------------------
    def _write_files(self) -> None:
        # Under /tmp, not pytest's tmp_path: munged runs as the munge user and must be
        # able to reach its directory (pytest's base directory is private to root).
        self.root = Path(tempfile.mkdtemp(prefix="galdist-slurm-"))
        self.root.chmod(0o755)
        munge = pwd.getpwnam("munge")
        # munged insists: key private to its user, socket directory searchable by all.
        kdir, mdir = self.root / "munge-key", self.root / "munge"
        kdir.mkdir(mode=0o700)
        mdir.mkdir(mode=0o755)
        key = kdir / "munge.key"
        key.write_bytes(os.urandom(1024))
        key.chmod(0o600)
        for p in (kdir, mdir, key):
            os.chown(p, munge.pw_uid, munge.pw_gid)
        self.munge_key = key
        self.munge_socket = mdir / "munge.socket"
        dirs = {name: self.root / name for name in ("state", "spool", "run", "log")}
        for d in dirs.values():
            d.mkdir()
        text = string.Template((HERE / "slurm.conf.template").read_text()).substitute(
            ctld_port=_free_port(), slurmd_port=_free_port(), munge_socket=self.munge_socket,
            state_dir=dirs["state"], spool_dir=dirs["spool"], run_dir=dirs["run"], log_dir=dirs["log"],
            node_hardware=node_hardware(), partition=PARTITION,
        )
        self.conf = self.root / "slurm.conf"
        self.conf.write_text(text)
        # The job-step plugin (0.6.1) strips every SLURM_* variable, SLURM_CONF too, from
        # the environment of the `srun` it runs inside each job. Real clusters keep their
        # configuration where srun finds it without one (/etc/slurm, or configless
        # slurmd); this one lives here, so a shim first on PATH puts it back for srun.
        bindir = self.root / "bin"
        bindir.mkdir()
        srun = shutil.which("srun", path=os.environ.get("PATH", "") + ":/usr/bin")
        shim = bindir / "srun"
        shim.write_text(f'#!/bin/sh\nSLURM_CONF="{self.conf}" exec "{srun}" "$@"\n')
        shim.chmod(0o755)

    def env(self, base: dict | None = None) -> dict:
        env = dict(os.environ if base is None else base)
        env["SLURM_CONF"] = str(self.conf)
        env["PATH"] = f"{self.root / 'bin'}:{env.get('PATH', '')}:/usr/sbin:/sbin"
        return env

    def _spawn(self, name: str, cmd: list[str], **kw) -> None:
        log = open(self.root / "log" / f"{name}.stdout", "wb")
        self.procs[name] = subprocess.Popen(cmd, stdout=log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
                                            env=self.env(), **kw)
        log.close()

    def _run(self, cmd: list[str] | str, **kw) -> subprocess.CompletedProcess:
        return subprocess.run(cmd, capture_output=True, text=True, env=self.env(), timeout=30, **kw)

    def _wait(self, what: str, ok, timeout: float) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            for name, proc in self.procs.items():
                if proc.poll() is not None:
                    raise RuntimeError(f"{name} exited ({proc.returncode}) while waiting for {what}:\n{self.logs()}")
            if ok():
                return
            time.sleep(0.25)
        raise RuntimeError(f"timed out after {timeout} s waiting for {what}:\n{self.logs()}")

    def start(self, timeout: float = 60) -> float:
        """Write the configuration, start the three daemons, wait until the node is idle.

        Returns the seconds from the first daemon's start to an idle node.
        """
        self._write_files()
        t0 = time.monotonic()
        munge = pwd.getpwnam("munge")
        sock = str(self.munge_socket)
        mdir = self.munge_socket.parent
        self._spawn("munged", ["munged", "-F", "--socket", sock, "--key-file", str(self.munge_key),
                               "--pid-file", str(mdir / "munged.pid"), "--log-file", str(mdir / "munged.log"),
                               "--seed-file", str(mdir / "munged.seed")],
                    user=munge.pw_uid, group=munge.pw_gid, extra_groups=[])
        self._wait("munge", lambda: self._run(f"munge -n -S {sock} | unmunge -S {sock}", shell=True).returncode == 0,
                   timeout)
        conf = str(self.conf)
        self._spawn("slurmctld", ["slurmctld", "-D", "-c", "-i", "-f", conf])
        self._wait("slurmctld", lambda: "is UP" in self._run(["scontrol", "ping"]).stdout, timeout)
        self._spawn("slurmd", ["slurmd", "-D", "-N", "localhost", "-f", conf])
        self._wait("an idle node", lambda: self._run(["sinfo", "-h", "-N", "-o", "%t"]).stdout.strip() == "idle",
                   timeout)
        self.start_seconds = time.monotonic() - t0
        return self.start_seconds

    # -- inspection -------------------------------------------------------------
    def logs(self, tail: int = 3000) -> str:
        if self.root is None:
            return ""
        parts = []
        for f in sorted((self.root / "log").glob("*")) + sorted((self.root / "munge").glob("*.log")):
            try:
                parts.append(f"--- {f.name}\n{f.read_text(errors='replace')[-tail:]}")
            except OSError:
                pass
        return "\n".join(parts)

    def controller_log(self) -> str:
        return (self.root / "log" / "slurmctld.log").read_text(errors="replace")

    def jobs(self) -> list[dict]:
        """Every job the controller still remembers (MinJobAge keeps finished ones), via squeue."""
        out = self._run(["squeue", "--states=all", "--noheader", "--format=%i|%j|%T|%P|%C|%m|%l"]).stdout
        keys = ("id", "name", "state", "partition", "cpus", "min_memory", "time_limit")
        return [dict(zip(keys, line.split("|"))) for line in out.splitlines() if line.strip()]

    # -- tear-down --------------------------------------------------------------
    def stop(self) -> None:
        """End exactly the daemons this object started (by PID, children first), remove its files.

        Jobs still queued or running on this cluster (a failed or timed-out run) are
        cancelled first, so slurmd's job steps end with them.
        """
        ctld = self.procs.get("slurmctld")
        if ctld is not None and ctld.poll() is None:
            try:
                self._run(["scancel", f"--partition={PARTITION}"])
                deadline = time.monotonic() + 20
                while time.monotonic() < deadline and self._run(
                        ["squeue", "--noheader", "--states=PD,R,CG,S", "--format=%i"]).stdout.strip():
                    time.sleep(0.5)
            except (OSError, subprocess.SubprocessError):
                pass
        for name in ("slurmd", "slurmctld", "munged"):
            proc = self.procs.get(name)
            if proc is None or proc.poll() is not None:
                continue
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(timeout=20)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(timeout=10)
        if self.root is not None:
            shutil.rmtree(self.root, ignore_errors=True)

    def alive(self) -> list[int]:
        return [p.pid for p in self.procs.values() if p.poll() is None]
