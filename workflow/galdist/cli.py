"""The ``galdist`` command.

  galdist init CATALOG      propose a commented run config for a catalog
  galdist check run.yaml    every check that can run before a job
  galdist run run.yaml      run the workflow (Snakemake) with progress per stage
  galdist summary RUN_DIR   the key numbers of a finished run
  galdist flags VALUE       what the bits of a flag value mean
  galdist export RUN_DIR    the product as FITS, ECSV or CSV, with units and descriptions

Snakemake stays the engine: ``galdist run`` runs ``python -m snakemake`` on the
installed workflow in a subprocess, in the current folder.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import fcntl
import json
import os
import re
import signal
import socket
import subprocess
import sys
from collections import Counter
from pathlib import Path

from . import shipped
from .errors import STRUCTURAL as _ERRORS
from .errors import ConfigError

DEFAULT_OUTPUT_DIR = "galdist-results"
RUN_LOCK = ".galdist-run.lock"
RUN_LOG = "galdist-run.log"
#: rules with one job per shard (their progress is counted in shards)
PER_SHARD = ("extinction", "kcorr", "redshift")
#: the rule with one job per shard and distance method (workflow/rules/methods.smk)
METHOD_RULE = "distance"
DASH = "–"


class Refused(Exception):
    """galdist will not go on; the message says why and what to do. ``code`` is the exit status."""

    def __init__(self, message: str, code: int = 1):
        super().__init__(message)
        self.code = code


def _say(text: str = "") -> None:
    print(text, flush=True)


def _can_print(text: str) -> bool:
    try:
        text.encode(sys.stdout.encoding or "ascii")
        return True
    except (UnicodeEncodeError, LookupError):
        return False


# --- init ------------------------------------------------------------------------------

def cmd_init(args) -> int:
    """Write a commented config proposed from the catalog's header and first rows."""
    import yaml

    from . import config as gconfig
    from . import io as gio
    from . import preflight, propose

    out = Path(args.output)
    if out.exists() and not args.force:
        raise Refused(f"{out} exists; choose another name with -o, or add --force to replace it")
    if not Path(args.catalog).exists():
        raise Refused(f"catalog {args.catalog} not found (a local file or Parquet directory)")
    if args.run and not re.fullmatch(r"[A-Za-z0-9][A-Za-z0-9_.-]{0,99}", args.run):
        raise Refused(f"--run {args.run!r}: use letters, digits, '_', '.' and '-' (not first)")
    p = propose.propose(args.catalog, run=args.run)
    text = propose.render(p)
    try:
        gconfig.validate(preflight.resolve(yaml.safe_load(text)))
    except ConfigError as exc:  # a bug of init, not of the catalog
        raise Refused(f"the proposed config does not validate (please report this): {exc}") from exc
    with gio.atomic_path(out) as tmp:
        tmp.write_text(text, encoding="utf-8")
    _say(f"wrote {out} for catalog {args.catalog} ({p.fmt}, {p.n_sample} rows sampled)")
    _say(f"  run: {p.run}   methods: {', '.join(p.methods) or 'none'}   bands: {', '.join(p.bands) or 'none'}")
    for canonical, entry in p.columns.items():
        unit = p.units.get(canonical)
        tail = f"  [{unit.value}]" if unit and unit.value else ""
        _say(f"  {canonical:<16} <- {entry.value}{tail}")
    if p.todo:
        _say("TODO (also written in the file):")
        for t in p.todo:
            _say(f"  - {t}")
    _say(f"Read the comments in {out} (every guess says why), then: galdist check {out}")
    return 0


# --- check -----------------------------------------------------------------------------

def print_findings(findings) -> None:
    """Findings grouped by check, one mark per line: ok, warning, error."""
    marks = ({"ok": "✓", "warning": "!", "error": "✗"} if _can_print("✓✗")
             else {"ok": "ok", "warning": "WARNING", "error": "ERROR"})
    groups: dict[str, list] = {}
    for f in findings:
        groups.setdefault(f.check, []).append(f)
    for check, items in groups.items():
        _say(check)
        for f in items:
            _say(f"  {marks.get(f.level, f.level)} {f.message}")


def _preflight(path: str, output_dir: str | None = None):
    from . import config as gconfig
    from . import preflight

    user = gconfig.load(path)
    if output_dir is not None:
        user = {**user, "output_dir": output_dir}
    return preflight.check(user)


def cmd_check(args) -> int:
    """Run every pre-job check of ``preflight`` and list what it found."""
    result = _preflight(args.config)
    print_findings(result.findings)
    n = len(result.errors)
    if n:
        _say(f"{n} problem{'s' * (n != 1)}: fix {'them' if n != 1 else 'it'} and run galdist check again")
        return 1
    _say(f"ready: galdist run {args.config}")
    return 0


# --- run -------------------------------------------------------------------------------

def live_snakemake_in(directory: Path) -> list[int]:
    """Pids of live processes whose working directory is ``directory`` and whose command
    line names snakemake (Linux /proc; best effort: unreadable processes are skipped)."""
    directory = directory.resolve()
    found = []
    for entry in Path("/proc").glob("[0-9]*"):
        try:
            if int(entry.name) == os.getpid() or Path(os.readlink(entry / "cwd")) != directory:
                continue
            cmdline = (entry / "cmdline").read_bytes().replace(b"\0", b" ")
        except (OSError, ValueError):
            continue
        if b"snakemake" in cmdline:
            found.append(int(entry.name))
    return sorted(found)


def profile_dir(name: str) -> Path:
    shipped_profiles = shipped.WORKFLOW_ROOT / "profiles"
    if (shipped_profiles / name / "config.yaml").is_file():
        return shipped_profiles / name
    if (Path(name) / "config.yaml").is_file():
        return Path(name).resolve()
    names = sorted(p.name for p in shipped_profiles.iterdir() if (p / "config.yaml").is_file())
    raise Refused(f"--profile {name}: no such profile (shipped: {', '.join(names)}; or a folder with a config.yaml)")


def snakemake_command(config_path: Path, workdir: Path, profile: Path, *, cores=None, output_dir=None,
                      targets=(), extra=()) -> list[str]:
    """The Snakemake command line of a run (targets first: ``--config`` takes every word after it)."""
    cmd = [sys.executable, "-m", "snakemake", *targets, "-s", str(shipped.WORKFLOW_ROOT / "Snakefile"),
           "--configfile", str(config_path), "--directory", str(workdir), "--workflow-profile", str(profile)]
    if cores is not None:
        cmd += ["--cores", str(cores)]
    cmd += list(extra)
    if output_dir is not None:
        cmd += ["--config", f"output_dir={output_dir}"]
    return cmd


class Progress:
    """Turns Snakemake's output into one short line per finished job."""

    FINISHED = re.compile(r"Finished jobid: \d+ \(Rule: (?P<rule>\w+)\)")
    STEPS = re.compile(r"(?P<i>\d+) of (?P<n>\d+) steps \(\d+%\) done")
    STAT = re.compile(r"^(?P<rule>\w+)\s+(?P<count>\d+)$")
    FAILED = re.compile(r"Error in rule (?P<rule>\w+):")

    def __init__(self, run_dir: Path, n_methods: int = 1):
        self.run_dir, self.n_methods = run_dir, n_methods
        self.planned: dict[str, int] = {}
        self.done: Counter = Counter()
        self.in_stats = False
        self.pending: str | None = None
        self.nothing = False

    def shards(self) -> int:
        return len(list((self.run_dir / "shards" / "ingest").glob("part-*.parquet")))

    def feed(self, line: str) -> list[str]:
        s = line.strip()
        out = []
        if s.startswith("Job stats:"):
            self.in_stats, self.planned = True, {}
            return out
        if self.in_stats:
            m = self.STAT.match(s)
            if m and m["rule"] == "total":
                self.in_stats = False
            elif m:
                self.planned[m["rule"]] = int(m["count"])
            return out
        if "Nothing to be done" in s:
            self.nothing = True
            out.append("[galdist] nothing to do: every product is up to date")
        m = self.FAILED.search(s)
        if m:
            out.append(f"[{m['rule']}] FAILED (details below and in the log)")
        m = self.FINISHED.search(s)
        if m:
            if self.pending:
                out.append(self.message(self.pending))
            self.pending = m["rule"]
            self.done[m["rule"]] += 1
            return out
        m = self.STEPS.search(s)
        if m and self.pending:
            out.append(self.message(self.pending) + f"  ({m['i']}/{m['n']} jobs)")
            self.pending = None
        return out

    def flush(self) -> list[str]:
        out = [self.message(self.pending)] if self.pending else []
        self.pending = None
        return out

    def message(self, rule: str) -> str:
        if rule == "all":
            return "[all] every product is in place"
        if rule in PER_SHARD:
            total = self.planned.get(rule) or self.shards() or "?"
            return f"[{rule}] {self.done[rule]}/{total} shards"
        if rule == METHOD_RULE:  # the plan before ingest cannot know the shards
            total = self.planned.get(rule) or self.n_methods * self.shards() or "?"
            return f"[{rule}] {self.done[rule]}/{total} jobs (one per method and shard)"
        return f"[{rule}] done"


def _lock_run(run_dir: Path):
    """Hold the run's OS lock for the life of this process; Refused (exit 2) if another holds it."""
    run_dir.mkdir(parents=True, exist_ok=True)
    fh = open(run_dir / RUN_LOCK, "a+", encoding="utf-8")
    try:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        fh.seek(0)
        holder = fh.read().strip() or "another process"
        fh.close()
        raise Refused(f"another galdist run is working on {run_dir} ({holder}); wait for it to finish "
                      "(or stop it) and run this command again", code=2) from None
    fh.seek(0)
    fh.truncate()
    fh.write(f"pid {os.getpid()} on {socket.gethostname()}, since "
             f"{_dt.datetime.now().isoformat(timespec='seconds')}\n")
    fh.flush()
    return fh


def _clear_stale_snakemake_lock(workdir: Path, unlock_cmd: list[str], log) -> None:
    """A kill leaves Snakemake's lock behind: clear it only if no Snakemake works here."""
    locks = workdir / ".snakemake" / "locks"
    if not (locks.is_dir() and any(locks.iterdir())):
        return
    live = live_snakemake_in(workdir)
    if live:
        raise Refused(f"Snakemake (pid {', '.join(map(str, live))}) is working in {workdir}: wait for it "
                      "to finish or stop it; galdist will not remove the lock of a live run", code=2)
    _say(f"[galdist] an interrupted run left Snakemake's lock in {locks} and no Snakemake process works "
         "in this folder: clearing it (snakemake --unlock)")
    log.write(f"\n=== galdist: clearing a stale lock: {' '.join(unlock_cmd)}\n")
    log.flush()
    done = subprocess.run(unlock_cmd, stdout=log, stderr=subprocess.STDOUT)
    if done.returncode != 0:
        raise Refused(f"snakemake --unlock failed (exit {done.returncode}); see {log.name}")


def cmd_run(args) -> int:
    """Preflight, the run lock, then Snakemake with a line per finished job."""
    from . import config as gconfig

    config_path = Path(args.config).resolve()
    workdir = Path.cwd()
    profile = profile_dir(args.profile)
    user = gconfig.load(config_path)
    output_dir = user.get("output_dir") or DEFAULT_OUTPUT_DIR
    override = None if "output_dir" in user else DEFAULT_OUTPUT_DIR
    result = _preflight(str(config_path), output_dir)
    problems = [f for f in result.findings if f.level != "ok"]
    if result.errors:
        print_findings(problems)
        _say(f"galdist run: not started: fix the {len(result.errors)} problem(s) above "
             f"(galdist check {args.config} lists them)")
        return 1
    if problems:
        print_findings(problems)
    _say(f"[galdist] preflight passed ({sum(f.level == 'ok' for f in result.findings)} checks)")
    run_dir = workdir / output_dir / result.config["run"]
    cmd = snakemake_command(config_path, workdir, profile, cores=args.cores,
                            output_dir=override, targets=args.target or ())
    env = dict(os.environ)
    if args.dry_run:
        return subprocess.run(cmd + ["--dry-run"], env=env).returncode

    lock = _lock_run(run_dir)
    try:
        (run_dir / "logs").mkdir(parents=True, exist_ok=True)
        log_path = run_dir / "logs" / RUN_LOG
        with open(log_path, "a", encoding="utf-8") as log:
            log.write(f"\n=== galdist run {_dt.datetime.now().isoformat(timespec='seconds')}: {' '.join(cmd)}\n")
            log.flush()
            _clear_stale_snakemake_lock(workdir, cmd + ["--unlock"], log)
            rc, tail = _stream(cmd, env, log, Progress(run_dir, len(result.config["methods"])))
    finally:
        lock.close()
    shown = os.path.relpath(run_dir, workdir) if run_dir.is_relative_to(workdir) else str(run_dir)
    if rc != 0:
        _say(f"galdist run: Snakemake stopped (exit {rc}); its last lines:")
        for line in tail[-40:]:
            _say("  " + line.rstrip())
        _say(f"full log: {log_path}. Fix the cause and run the same command again: finished jobs are kept.")
        return 1
    _say(f"products in {shown}/:")
    for name, what in (("distances.parquet", "one row per input galaxy"),
                       ("distances/", "one row per input galaxy, in parts (a Parquet dataset: read the folder)"),
                       ("summary.json", f"counts and statistics (galdist summary {shown})"),
                       ("COLUMNS.md", "what each column means: unit, description, flag bits"),
                       ("report.html", "the run report: open it first"),
                       ("plots/", "Hubble diagram, each method's relation, dmu against cz and predictor, "
                                  "histograms, methods compared, sky"),
                       ("calibrate/", "the fitted calibration file and its fit report (--target calibrate)"),
                       (f"logs/{RUN_LOG}", "the full Snakemake log")):
        if (run_dir / name.rstrip("/")).exists():
            _say(f"  {name:<22} {what}")
    return 0


def _stream(cmd, env, log, progress: Progress) -> tuple[int, list[str]]:
    """Run ``cmd``, copy its output to ``log``, print progress; (exit code, last lines)."""
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
                            errors="replace", bufsize=1)

    def forward(signum, frame):
        proc.send_signal(signum)

    old = signal.signal(signal.SIGTERM, forward)
    tail: list[str] = []
    try:
        while True:
            try:
                for line in proc.stdout:
                    log.write(line)
                    log.flush()
                    tail = (tail + [line])[-200:]
                    for msg in progress.feed(line):
                        _say(msg)
                break
            except KeyboardInterrupt:  # Ctrl-C reached Snakemake too: let it stop its jobs
                continue
        for msg in progress.flush():
            _say(msg)
        return proc.wait(), tail
    finally:
        signal.signal(signal.SIGTERM, old)
        if proc.poll() is None:
            proc.kill()
            proc.wait()


# --- summary ---------------------------------------------------------------------------

def _get(d, *keys):
    for k in keys:
        if not isinstance(d, dict) or k not in d:
            return None
        d = d[k]
    return d


def _num(x, fmt: str = ".3f", sign: bool = False) -> str:
    if isinstance(x, bool) or not isinstance(x, (int, float)):
        return DASH
    return format(x, ("+" if sign else "") + fmt)


def _int(x) -> str:
    return str(x) if isinstance(x, int) and not isinstance(x, bool) else DASH


def _reference(ref) -> str:
    if isinstance(ref, str):
        return ref
    if not isinstance(ref, dict):
        return ""
    parts = [str(ref[k]) for k in ("authors", "year", "journal") if ref.get(k)]
    return ", ".join(parts)


def cmd_summary(args) -> int:
    """The key numbers of a finished run from its summary.json."""
    global DASH
    if not _can_print(DASH):
        DASH = "-"
    path = Path(args.run_dir)
    if path.is_dir():
        path = path / "summary.json"
    if not path.is_file():
        raise Refused(f"no summary.json in {args.run_dir}: give a finished run's folder "
                      f"(<output_dir>/<run>, e.g. {DEFAULT_OUTPUT_DIR}/mine); a run that has not finished has none")
    try:
        s = json.loads(path.read_text(encoding="utf-8"))
    except (ValueError, OSError) as exc:
        raise Refused(f"{path} cannot be read as JSON ({exc})") from exc
    pm = "±" if _can_print("±Δ") else "+-"
    _say(f"run {path.parent}")
    _say(f"  rows                {_int(s.get('rows_in'))} in, {_int(s.get('rows_out'))} out")
    if isinstance(s.get("methods"), list):
        _say(f"  methods             {', '.join(map(str, s['methods'])) or DASH}")
    best = s.get("best_method")
    if isinstance(best, dict) and best:
        _say("  best distance       " + ", ".join(f"{k} {v}" for k, v in best.items()))
    cosmo = s.get("cosmology")
    if isinstance(cosmo, dict):
        name = cosmo.get("name") or f"flat LCDM, H0 {_num(cosmo.get('H0'), 'g')}, Om0 {_num(cosmo.get('Om0'), 'g')}"
        _say(f"  mu_z cosmology      {name} (a convention, not a measurement)")
    lk = s.get("eta_likelihoods")
    if isinstance(lk, dict):
        _say(f"  eta likelihoods     {lk.get('file')}: {_num(lk.get('eta_min'), 'g')} to {_num(lk.get('eta_max'), 'g')} "
             f"dex in {_num(lk.get('eta_step'), 'g')} dex, per method and for mu_best")
        for name, kinds in (lk.get("kinds") or {}).items():
            if isinstance(kinds, dict):
                _say(f"    {name:<17} " + ", ".join(f"{k}: {v}" for k, v in kinds.items()))
    elif "eta_likelihoods" in s:
        _say("  eta likelihoods     not written (likelihoods.write false)")
    methods = _get(s, "statistics", "methods")
    if not isinstance(methods, dict) or not methods:
        _say(f"  methods             {DASH} (no statistics in summary.json)")
        methods = {}
    from .methods import REGISTRY
    method_of = {spec.prefix: name for name, spec in REGISTRY.items()}
    for m, st in methods.items():
        st = st if isinstance(st, dict) else {}
        method = method_of.get(m, m)
        ref = _reference(_get(s, "calibrations", method))
        _say(f"\n{method}" + (f" ({m}_* columns)" if method != m else ""))
        _say(f"  calibration         {ref or DASH}")
        _say(f"  galaxies used       {_int(st.get('n_used'))}  (of {_int(st.get('n_rows'))} rows: "
             f"{_int(st.get('n_measured'))} measured, {_int(st.get('n_usable'))} usable, "
             f"{_int(st.get('n_clipped'))} clipped, {_int(st.get('n_outliers'))} outliers)")
        _say(f"  zero-point offset   dmu = {_num(st.get('wmean'), sign=True)} {pm} {_num(st.get('wmean_err'))} (stat) "
             f"{pm} {_num(st.get('wmean_err_sys'))} (sys) mag "
             f"(weighted mean; median {_num(st.get('median'), sign=True)} {pm} {_num(st.get('median_err'))})")
        _say(f"  scatter             {_num(st.get('std'))} mag observed vs {_num(st.get('rms_expected_err'))} "
             f"expected; excess {_num(st.get('excess_scatter'))} mag; chi2/nu {_num(st.get('chi2_nu'), '.2f')}")
        _say(f"  implied H0          {_num(st.get('h0_implied'), '.2f')} {pm} {_num(st.get('h0_implied_err_stat'), '.2f')}"
             f" (stat) {pm} {_num(st.get('h0_implied_err_sys'), '.2f')} (sys) km/s/Mpc "
             f"(assumed {_num(st.get('h0_assumed'), 'g')})")
        if st.get("h0_implied_independent") is False:
            _say(f"                      {st.get('h0_implied_note', 'not independent')}")
    pairs = _get(s, "statistics", "pairs")
    for name, st in (pairs.items() if isinstance(pairs, dict) else []):
        st = st if isinstance(st, dict) else {}
        _say(f"\n{name}")
        _say(f"  galaxies            {_int(st.get('n_both'))} with both, {_int(st.get('n_used'))} used")
        _say(f"  offset              {_num(st.get('wmean'), sign=True)} {pm} {_num(st.get('wmean_err'))} mag; "
             f"scatter {_num(st.get('std'))} vs {_num(st.get('rms_expected_err'))} expected")
    zp = s.get("zero_point")
    if isinstance(zp, dict) and zp.get("offsets"):
        _say(f"\nzero-point tie      relative to {zp.get('reference')}, "
             f"{'applied' if zp.get('applied') else 'not applied'}; {_int(zp.get('n_overlap_objects'))} objects "
             f"({_int(zp.get('n_overlap_galaxies'))} galaxies) with two or more methods")
        for p, o in zp["offsets"].items():
            o = o if isinstance(o, dict) else {}
            if p != zp.get("reference"):
                _say(f"  {p:<19} {_num(o.get('offset'), sign=True)} {pm} {_num(o.get('err'))} mag "
                     f"({_int(o.get('n_overlap'))} objects in common)")
    g = s.get("groups")
    if isinstance(g, dict):
        _say(f"\ngroups              {_int(g.get('n_groups'))} ({_int(g.get('n_catalog_groups'))} from group_id, "
             f"{_int(g.get('n_singletons'))} of one), {_int(g.get('n_groups_measured'))} with a distance, "
             f"{_int(g.get('n_members_rejected'))} members rejected")
    counts = s.get("flag_counts")
    _say("\nflags (rows with the bit set; bits set on no row left out)")
    if isinstance(counts, dict) and counts:
        for column, bits in counts.items():
            set_bits = {k: v for k, v in bits.items() if v} if isinstance(bits, dict) else {}
            _say(f"  {column:<15} " + (", ".join(f"{k} {v}" for k, v in set_bits.items()) or "none"))
    else:
        _say(f"  {DASH}")
    cautions = s.get("cautions")
    if isinstance(cautions, list) and cautions:
        _say("\ncautions")
        for c in cautions:
            _say(f"  - {c}")
    return 0


# --- flags -----------------------------------------------------------------------------

def cmd_flags(args) -> int:
    """Decode a flag value bit by bit."""
    from . import flags

    try:
        value = int(args.value, 0)
    except ValueError:
        raise Refused(f"{args.value!r} is not an integer (decimal, or 0x... / 0b...)") from None
    if value < 0:
        raise Refused(f"{value}: flag values are never negative")
    if args.column and args.column not in flags.ALL:
        raise Refused(f"unknown flag column {args.column!r}; allowed: {', '.join(flags.ALL)}")
    columns = [args.column] if args.column else list(flags.ALL)
    bits = [k for k in range(value.bit_length()) if value >> k & 1]
    undefined = False
    for column in columns:
        defined = {d["name"]: d for d in flags.ALL[column].describe()}
        _say(f"{column} = {value}" + ("" if bits else ": no bit set, nothing flagged"))
        for k, name in zip(bits, flags.decode(column, value)):
            d = defined.get(name)
            if d is None:
                undefined = True
                _say(f"  bit {k:<2} ({1 << k}): not defined for {column}")
            else:
                _say(f"  bit {k:<2} ({1 << k}) {d['name']}: {d['meaning']}")
                _say(f"         what to do: {d['action']}")
    if not args.column:
        _say("(the same value means different things in each column: give --column to pick one)")
    return 1 if undefined and args.column else 0


# --- export ----------------------------------------------------------------------------

def cmd_export(args) -> int:
    """The product (some columns, if asked) as FITS, ECSV or CSV, streamed."""
    from . import export

    path = Path(args.run_dir)
    # a run's folder holds distances.parquet or (product_layout parts) the folder distances/
    candidates = [path / "distances.parquet", path / "distances"] if path.is_dir() and not any(
        path.glob("part-*.parquet")) else [path]
    product = next((p for p in candidates if p.is_file() or any(p.glob("part-*.parquet"))), None)
    if product is None:
        raise Refused(f"no distances.parquet or distances/ in {args.run_dir}: give a finished run's folder "
                      f"(<output_dir>/<run>, e.g. {DEFAULT_OUTPUT_DIR}/mine) or the product")
    columns = [c for item in args.columns or [] for c in item.split(",") if c]
    out = Path(args.output) if args.output else (
        product.with_suffix("." + args.format) if product.is_file() else product.parent / f"distances.{args.format}")
    if out.resolve() == product.resolve():
        raise Refused(f"-o {out}: that is the product itself; choose another file name")
    try:
        done = export.export(product, out, args.format, columns or None)
    except ValueError as exc:
        raise Refused(str(exc)) from None
    _say(f"wrote {done['rows']} rows x {done['columns']} columns to " + " and ".join(done["files"]))
    return 0


# --- the parser ------------------------------------------------------------------------

def parser() -> argparse.ArgumentParser:
    top = argparse.ArgumentParser(prog="galdist", description="Galaxy distances from local survey catalogs "
                                  "(runs the galdist Snakemake workflow).")
    sub = top.add_subparsers(dest="verb", required=True, metavar="VERB")

    p = sub.add_parser("init", help="propose a commented run config for a catalog")
    p.add_argument("catalog", help="the catalog: CSV, ECSV, FITS, Parquet file or directory, VOTable")
    p.add_argument("-o", "--output", default="run.yaml", help="config file to write (default: run.yaml)")
    p.add_argument("--run", help="run name (default: from the catalog's file name)")
    p.add_argument("--force", action="store_true", help="replace an existing config file")
    p.set_defaults(func=cmd_init)

    p = sub.add_parser("check", help="every check that can run before a job")
    p.add_argument("config", help="the run config (YAML)")
    p.set_defaults(func=cmd_check)

    p = sub.add_parser("run", help="run the workflow; the same command resumes an interrupted run")
    p.add_argument("config", help="the run config (YAML)")
    p.add_argument("--cores", help="cores to use (default: the profile's; all for the local profile)")
    p.add_argument("--profile", default="default", help="workflow profile: default (this machine), slurm, "
                   "or a folder with a config.yaml")
    p.add_argument("--dry-run", "-n", action="store_true", help="show the jobs Snakemake would run; run nothing")
    p.add_argument("--target", nargs="+", help="only these files or rules (default: every product)")
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("summary", help="the key numbers of a finished run")
    p.add_argument("run_dir", help="the run's folder, <output_dir>/<run>")
    p.set_defaults(func=cmd_summary)

    p = sub.add_parser("flags", help="what the bits of a flag value mean")
    p.add_argument("value", help="the flag value (decimal, 0x..., 0b...)")
    p.add_argument("--column", help="flag column: quality_flags, ext_flags, kcorr_flags, z_flags, tf_flags, "
                   "sbf_flags (default: all)")
    p.set_defaults(func=cmd_flags)

    p = sub.add_parser("export", help="the product as FITS, ECSV or CSV, with units and descriptions")
    p.add_argument("run_dir", help="the run's folder, <output_dir>/<run> (or its distances.parquet or distances/)")
    p.add_argument("--format", required=True, choices=("fits", "ecsv", "csv"),
                   help="fits (TUNIT/TCOMM), ecsv (astropy's header) or csv (plain, with a .columns.json beside it)")
    p.add_argument("--columns", nargs="+", help="only these columns, in this order (names or comma-separated lists; "
                   "COLUMNS.md lists them)")
    p.add_argument("-o", "--output", help="file to write (default: distances.<format> in the run's folder; "
                   "an existing file is replaced)")
    p.set_defaults(func=cmd_export)
    return top


def main(argv=None) -> int:
    args = parser().parse_args(argv)
    try:
        return args.func(args)
    except Refused as exc:
        print(f"galdist {args.verb}: {exc}", file=sys.stderr)
        return exc.code
    except _ERRORS as exc:
        print(f"galdist {args.verb}: {exc}", file=sys.stderr)
        return 1
    except BrokenPipeError:  # output piped into e.g. head
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 1


if __name__ == "__main__":
    sys.exit(main())
