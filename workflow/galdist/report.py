"""The run report: one static, self-contained HTML page people open first.

Built from what the run wrote (``summary.json``, the product's provenance, the plots
and their captions): the run, the key numbers per method, the method comparison,
flag counts with their meanings, the cautions, then the plots with their captions in
view. No JavaScript; images are embedded (base64 PNG), so the file can be mailed,
archived or printed on its own.
"""

from __future__ import annotations

import base64
import html
import math
from pathlib import Path

from . import flags as F
from .io import atomic_path
from .methods import REGISTRY

#: column prefix -> the method's title (its registry entry's)
METHOD_NAMES = {spec.prefix: spec.title for spec in REGISTRY.values()}

_CSS = """
body { font: 15px/1.45 system-ui, sans-serif; margin: 0 auto; max-width: 1100px; padding: 1.5em; color: #222; }
h1 { font-size: 1.6em; margin-bottom: .2em; } h2 { border-bottom: 1px solid #ccc; margin-top: 1.8em; }
table { border-collapse: collapse; margin: .6em 0; } td, th { border: 1px solid #ddd; padding: .25em .6em; }
th { background: #f3f3f3; text-align: left; } td.num { text-align: right; font-variant-numeric: tabular-nums; }
.key { display: flex; flex-wrap: wrap; gap: 1em; } .card { border: 1px solid #ccc; border-radius: 6px;
  padding: .6em 1em; min-width: 15em; } .card b { font-size: 1.25em; }
.caution { background: #fff6e0; border-left: 4px solid #e0a000; padding: .4em .8em; margin: .4em 0; }
figure { margin: 1.2em 0; page-break-inside: avoid; } figure img { max-width: 100%; border: 1px solid #eee; }
figcaption { color: #333; margin-top: .4em; } .muted { color: #666; font-size: .9em; }
@media print { body { max-width: none; } h2 { page-break-after: avoid; } }
"""


def _e(text) -> str:
    return html.escape(str(text))


def _num(value, fmt: str = ".3f", missing: str = "–") -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return missing
    return format(value, fmt)


def _pm(value, err, fmt: str = "+.3f", err_fmt: str = ".3f") -> str:
    if value is None:
        return "–"
    return f"{_num(value, fmt)} ± {_num(err, err_fmt)}"


def _method_cards(stats: dict) -> str:
    cards = []
    for prefix, s in stats.get("methods", {}).items():
        name = METHOD_NAMES.get(prefix, prefix)
        sys_err = s.get("wmean_err_sys")
        zp = _pm(s.get("wmean"), s.get("wmean_err")) + (f" (stat) ± {_num(sys_err)} (sys)" if sys_err is not None else "")
        h0 = _pm(s.get("h0_implied"), s.get("h0_implied_err_stat"), ".1f", ".1f") + (
            f" (stat) ± {_num(s.get('h0_implied_err_sys'), '.1f')} (sys)" if s.get("h0_implied") is not None else "")
        note = ("" if s.get("h0_implied_independent", True)
                else f" <span class='muted'>({_e(s.get('h0_implied_note', 'not independent'))})</span>")
        cards.append(f"""<div class="card"><div>{_e(name)}</div>
<div><b>{_e(s.get('n_used', 0))}</b> galaxies used <span class="muted">of {_e(s.get('n_measured', 0))} measured</span></div>
<div>zero-point offset ⟨Δμ⟩ = {zp} mag</div>
<div>median Δμ = {_pm(s.get('median'), s.get('median_err'))} mag</div>
<div>scatter {_num(s.get('std'))} mag, expected {_num(s.get('rms_expected_err'))} (χ²/ν = {_num(s.get('chi2_nu'), '.2f')})</div>
<div>implied H0 = {h0} km/s/Mpc{note}</div></div>""")
    return "<div class='key'>" + "".join(cards) + "</div>" if cards else "<p>No distance method ran.</p>"


def _pairs(stats: dict) -> str:
    pairs = stats.get("pairs") or {}
    if not pairs:
        return "<p>Only one method ran: no comparison between methods.</p>"
    rows = "".join(
        f"<tr><td>{_e(' − '.join(METHOD_NAMES.get(p, p) for p in name.split('-')))}</td>"
        f"<td class='num'>{_e(s.get('n_used', 0))}</td><td class='num'>{_pm(s.get('wmean'), s.get('wmean_err'))}</td>"
        f"<td class='num'>{_pm(s.get('median'), s.get('median_err'))}</td><td class='num'>{_num(s.get('std'))}</td>"
        f"<td class='num'>{_num(s.get('chi2_nu'), '.2f')}</td></tr>"
        for name, s in pairs.items())
    return ("<table><tr><th>pair (μ difference)</th><th>galaxies</th><th>weighted mean (mag)</th>"
            "<th>median (mag)</th><th>scatter (mag)</th><th>χ²/ν</th></tr>" + rows + "</table>")


def _eta(lk: dict | None) -> str:
    """Where the per-galaxy η likelihoods are and on which grid (summary.json "eta_likelihoods")."""
    if not lk:
        return "–"
    return (f"<code>{_e(lk.get('file'))}</code>: per method and for mu_best, η = log10(d_z/d) from "
            f"{_num(lk.get('eta_min'), 'g')} to {_num(lk.get('eta_max'), 'g')} dex in {_num(lk.get('eta_step'), 'g')} "
            f"dex ({_num((lk.get('bytes') or 0) / 2**20, '.1f')} MB)")


def _zero_point(zp: dict | None) -> str:
    """The zero-point tie between methods (summary.json "zero_point", galdist.groups)."""
    if not zp or not zp.get("offsets"):
        return "<p>Only one method ran: no zero-point tie.</p>"
    ref = METHOD_NAMES.get(zp.get("reference"), zp.get("reference"))
    rows = "".join(
        f"<tr><td>{_e(METHOD_NAMES.get(p, p))}</td><td class='num'>"
        f"{'reference' if p == zp.get('reference') else _pm(o.get('offset'), o.get('err'))}</td>"
        f"<td class='num'>{_e(o.get('n_overlap', 0))}</td></tr>" for p, o in zp["offsets"].items())
    applied = ("applied: mu_best and group_mu carry them, their errors in the systematic errors"
               if zp.get("applied") else "not applied (config zero_point.apply)")
    return (f"<p class='muted'>Offsets of each method's μ relative to {_e(ref)}, fitted by maximum likelihood "
            f"(random errors only) on {_e(zp.get('n_overlap_objects', 0))} groups and galaxies measured by two or "
            f"more methods ({_e(zp.get('n_overlap_galaxies', 0))} galaxies); {_e(applied)}.</p>"
            "<table><tr><th>method</th><th>offset (mag)</th><th>objects in common</th></tr>" + rows + "</table>")


def _groups(g: dict | None) -> str:
    """Group counts (summary.json "groups")."""
    if not g:
        return "<p>No group statistics.</p>"
    return (f"<table><tr><th>groups</th><td class='num'>{_e(g.get('n_groups'))} ({_e(g.get('n_catalog_groups'))} from "
            f"group_id, {_e(g.get('n_singletons'))} of one member)</td></tr>"
            f"<tr><th>with a distance</th><td class='num'>{_e(g.get('n_groups_measured'))}</td></tr>"
            f"<tr><th>largest group</th><td class='num'>{_e(g.get('largest_group'))}</td></tr>"
            f"<tr><th>members rejected as outliers</th><td class='num'>{_e(g.get('n_members_rejected'))} "
            f"(at {_num(g.get('clip_sigma'), 'g')} σ; flagged group_rejected, kept)</td></tr></table>")


def _flag_tables(flag_counts: dict) -> str:
    out = []
    for column, counts in flag_counts.items():
        enum = F.ALL.get(column)
        if enum is None:
            continue
        rows = "".join(f"<tr><td>{_e(m.name)}</td><td class='num'>{_e(counts.get(m.name, 0))}</td>"
                       f"<td>{_e(m.meaning)}</td><td>{_e(m.action)}</td></tr>"
                       for m in enum if counts.get(m.name, 0))
        body = rows or "<tr><td colspan='4' class='muted'>no bit set in any row</td></tr>"
        out.append(f"<h3><code>{_e(column)}</code></h3><table><tr><th>flag</th><th>rows</th><th>meaning</th>"
                   f"<th>what to do</th></tr>{body}</table>")
    return "".join(out)


def _figure(name: str, png: Path, caption: str) -> str:
    data = base64.b64encode(Path(png).read_bytes()).decode("ascii")
    return (f"<figure id='{_e(name)}'><img alt='{_e(name)}' src='data:image/png;base64,{data}'>"
            f"<figcaption>{_e(caption)}</figcaption></figure>")


def _fits(fits) -> str:
    """The calibration fits of the ``calibrate`` target: (fit summary, figure PNG) each."""
    out = []
    for fit, png in fits:
        def coeffs(key):
            f = fit.get(key, {})
            return ", ".join(_pm(c, e, "+.3f", ".3f") for c, e in zip(f.get("coefficients", []), f.get("errors", []))) + \
                f"; scatter {_pm(f.get('scatter'), f.get('scatter_err'), '.3f', '.3f')}"
        boot = fit.get("bootstrap", {})
        out.append(f"""<h3><code>{_e(fit.get('calibration'))}</code> ({_e(fit.get('form'))} form)</h3>
<table><tr><th>galaxies / groups (with reference distances)</th><td class="num">{_e(fit.get('galaxies_fitted'))} /
{_e(fit.get('groups'))} ({_e(fit.get('groups_with_reference'))})</td></tr>
<tr><th>selection-aware fit</th><td>{coeffs('selection_aware')}</td></tr>
<tr><th>naive fit (selection ignored)</th><td>{coeffs('naive')}</td></tr>
<tr><th>bootstrap errors over groups</th><td>{_e(', '.join(_num(e) for e in boot.get('errors', [])) or '–')}</td></tr>
</table>{_figure('fit-' + str(fit.get('calibration')), png, 'The fitted relation with its sample, residuals against the predictor and against distance (the signature of selection bias), and the group offsets.')}""")
    return "".join(out)


def render(run: str, summary: dict, provenance: dict, plots: list[tuple[str, Path, str]], fits=(),
           config_files=()) -> str:
    """The report page. ``plots``: (name, PNG path, caption text) in display order;
    ``fits``: (fit summary, figure PNG) of the calibrate target, where it ran;
    ``config_files``: the user's configuration files, laid over the defaults."""
    stats = summary.get("statistics", {})
    inputs = "".join(f"<li><code>{_e(i.get('path'))}</code> <span class='muted'>({_e(i.get('format'))}, "
                     f"SHA-256 {_e(str(i.get('sha256'))[:16])}…)</span></li>" for i in summary.get("inputs", []))
    cals = "".join(f"<li><b>{_e(c.get('name'))}</b> — {_e(c.get('reference'))}</li>"
                   for c in provenance.get("calibrations", {}).values())
    best = ", ".join(f"{_e(k)}: {_e(v)}" for k, v in sorted(summary.get("best_method", {}).items()))
    cautions = "".join(f"<div class='caution'>{_e(c)}</div>" for c in summary.get("cautions", []))
    figures = "".join(_figure(*p) for p in plots)
    cosmo = summary.get("cosmology", {})
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><meta name="viewport" content="width=device-width, initial-scale=1">
<title>galdist run report: {_e(run)}</title><style>{_CSS}</style></head><body>
<h1>galdist run report: {_e(run)}</h1>
<p class="muted">created {_e(provenance.get('created_utc', '–'))} · code {_e(provenance.get('git_commit') or 'not a git checkout')}</p>
<h2>The run</h2>
<table>
<tr><th>configuration</th><td>{_e(' + '.join(['config/config.yaml (defaults)', *map(str, config_files)]))}</td></tr>
<tr><th>rows in / out</th><td class="num">{_e(summary.get('rows_in'))} / {_e(summary.get('rows_out'))}</td></tr>
<tr><th>methods</th><td>{_e(', '.join(METHOD_NAMES.get(m, m) for m in stats.get('methods', {})) or 'none')}</td></tr>
<tr><th>best distance per galaxy</th><td>{best}</td></tr>
<tr><th>η likelihoods</th><td>{_eta(summary.get('eta_likelihoods'))}</td></tr>
<tr><th>redshift distances</th><td>{_e(cosmo.get('name') or 'flat ΛCDM')} H0 = {_e(cosmo.get('H0'))}, Ωm = {_e(cosmo.get('Om0'))} (a convention for the comparison, not a claim)</td></tr>
</table>
<p>Catalog:</p><ul>{inputs}</ul>
<p>Calibrations (reference and how sure we are of the numbers):</p><ul>{cals or '<li>none</li>'}</ul>
<h2>Key numbers</h2>
<p class="muted">Δμ = μ(method) − μ(redshift) over unflagged galaxies above the local-flow cut, clipped;
a positive offset means larger distances, hence a smaller implied H0.</p>
{_method_cards(stats)}
<h2>Methods compared</h2>
{_pairs(stats)}
<h2>Zero point tie between methods</h2>
{_zero_point(summary.get('zero_point'))}
<h2>Groups</h2>
{_groups(summary.get('groups'))}
{'<h2>Calibration fits</h2>' + _fits(fits) if fits else ''}
<h2>Cautions: what these values are not good for</h2>
{cautions}
<h2>Plots</h2>
{figures or '<p>No plots (no method ran).</p>'}
<h2>Flags</h2>
<p class="muted">Counts of rows with each bit set. A flagged value is still computed where it can be; the flag says how far to trust it.</p>
{_flag_tables(summary.get('flag_counts', {}))}
</body></html>
"""


def read_provenance(product_path: str | Path) -> dict:
    """The provenance the assembly wrote into the product's schema metadata."""
    import json

    import pyarrow.parquet as pq

    meta = pq.read_schema(product_path).metadata or {}
    return json.loads(meta.get(b"galdist.provenance", b"{}"))


def caption_text(rst_path: str | Path) -> str:
    """A report caption file (reStructuredText) as plain text."""
    text = Path(rst_path).read_text(encoding="utf-8")
    return " ".join(text.replace("``", "").split())


def write(path: str | Path, run: str, summary: dict, provenance: dict, plots, fits=(), config_files=()) -> None:
    """Write the page atomically."""
    with atomic_path(path) as tmp:
        Path(tmp).write_text(render(run, summary, provenance, plots, fits, config_files), encoding="utf-8")
