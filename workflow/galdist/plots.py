"""Diagnostic plots of the final distance table (matplotlib, Agg backend, PNG).

Each function takes a pandas DataFrame with the columns of distances.parquet
(missing columns count as all-NaN), writes exactly one PNG to ``path`` and
returns the number of galaxies drawn (0 gives a figure saying "no data").
Usable points are filled; flagged points (any method flag other than
LOCAL_FLOW) are hollow, in the method's own marker, so methods stay apart when
flagged too. Every plot says in a footnote what it counts: usable and flagged
points drawn, and what was left out (no value, below the local-flow cut,
off-scale). Multi-panel plots have a panel per method of the run that has
columns in the table (a method that did not run gets no empty panel).
"""

from __future__ import annotations

import itertools
import textwrap
from collections.abc import Sequence
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib import ticker  # noqa: E402

from .flags import Method  # noqa: E402
from .io import atomic_path  # noqa: E402
from .methods import REGISTRY, by_prefix, plot_names  # noqa: E402

DPI = 110
MAX_ERRORBARS = 3000  # above this, points only (error bars would hide the data)
_NOT_A_PROBLEM = int(Method.LOCAL_FLOW)
_DEFAULT_METHODS = tuple(s.prefix for s in REGISTRY.values())
C_KMS = 299792.458


#: Beyond this magnitude no plotted quantity (mag, km/s, deg, z) is physical: such
#: values are left out of the drawing (they stay in the product, flagged), so no
#: finite value can break an axis or a histogram. Footnotes count them as off-scale.
OFF_SCALE = 1e6


def _raw(df, name) -> np.ndarray:
    if name not in df.columns:
        return np.full(len(df), np.nan)
    return np.asarray(df[name].to_numpy(dtype=float, na_value=np.nan), dtype=float)


def _col(df, name) -> np.ndarray:
    values = _raw(df, name)
    with np.errstate(invalid="ignore"):
        return np.where(np.abs(values) <= OFF_SCALE, values, np.nan)


def _off_scale(df, *names) -> np.ndarray:
    """Rows where any of the columns holds a finite value beyond ``OFF_SCALE``."""
    out = np.zeros(len(df), dtype=bool)
    for name in names:
        v = _raw(df, name)
        with np.errstate(invalid="ignore"):
            out |= np.isfinite(v) & (np.abs(v) > OFF_SCALE)
    return out


def _flagged(df, method) -> np.ndarray:
    name = f"{method}_flags"
    if name not in df.columns:
        return np.zeros(len(df), dtype=bool)
    fl = np.asarray(df[name].to_numpy(dtype="int64", na_value=0), dtype=np.int64)
    return (fl & ~_NOT_A_PROBLEM) != 0


def _label(method) -> tuple[str, str, str]:
    """Title, colour and marker of a method prefix (its registry entry's)."""
    spec = by_prefix(method)
    return (spec.title, spec.colour, spec.marker) if spec else (method.upper(), "tab:purple", "D")


def _present(df, methods: Sequence[str]) -> list[str]:
    """The methods of ``methods`` whose distance column is in the table: one panel each."""
    return [m for m in methods if f"{m}_mu" in df.columns]


def _no_data(ax, text="no data"):
    ax.text(0.5, 0.5, text, transform=ax.transAxes, ha="center", va="center",
            fontsize=14, color="0.4")


def _save(fig, path) -> None:
    """Write the PNG atomically (temporary name, then rename) and free the figure.
    (``tight_layout`` in ``_finish`` makes room for legends placed outside the axes.)"""
    try:
        with atomic_path(path) as tmp:
            fig.savefig(tmp, dpi=DPI)
    finally:
        plt.close(fig)


def _finish(fig, notes: Sequence[str]) -> None:
    """Lay the figure out and write ``notes`` (what the plot counts) under it."""
    width, height = fig.get_size_inches()
    text = "\n".join(textwrap.fill(n, int(22 * width), subsequent_indent="    ") for n in notes if n)
    lines = text.count("\n") + 1 if text else 0
    bottom = min(0.45, (0.06 + 0.115 * lines) / height) if lines else 0.0
    fig.tight_layout(rect=(0, bottom, 1, 1))
    if text:
        fig.text(0.01, 0.01, text, fontsize=6.5, va="bottom", ha="left", color="0.25")


def _count_note(name: str, good: int, bad: int, extra: str = "") -> str:
    return f"{name}: {good} usable (filled) + {bad} flagged (hollow){extra}"


def _points(ax, x, y, yerr, good, bad, color, marker, label, size=12):
    """Filled usable points (with error bars when few) and hollow flagged points in the
    method's marker and colour (markers of one line each: ``size`` is the area in pt^2, as
    ``scatter``'s, and far quicker to draw than a scatter collection)."""
    if good.any():
        if good.sum() <= MAX_ERRORBARS and yerr is not None:
            e = np.where(np.isfinite(yerr[good]), yerr[good], 0.0)
            ax.errorbar(x[good], y[good], yerr=e, fmt="none", ecolor=color, alpha=0.3, lw=0.8)
        ax.plot(x[good], y[good], ls="none", marker=marker, ms=np.sqrt(size), color=color, mec="none",
                label=f"{label} usable ({good.sum()})", rasterized=True, zorder=3)
    if bad.any():
        ax.plot(x[bad], y[bad], ls="none", marker=marker, ms=np.sqrt(size), mfc="none", mec=color, alpha=0.6,
                mew=0.8, label=f"{label} flagged ({bad.sum()})", rasterized=True, zorder=2)


def _plain_log_axis(axis) -> None:
    """Plain numbers (0.01, 0.02, 0.05) on a log axis, not 10^-2 or 2x10^-2."""
    axis.set_major_locator(ticker.LogLocator(base=10.0, subs=(1.0, 2.0, 5.0)))
    axis.set_major_formatter(ticker.FuncFormatter(lambda v, _: f"{v:g}"))
    axis.set_minor_formatter(ticker.NullFormatter())


def _running_median(ax, x, y, color) -> None:
    """Median of y in bins of x holding equal numbers of points (at least 15 each)."""
    ok = np.isfinite(x) & np.isfinite(y)
    n = int(ok.sum())
    if n < 30:
        return
    nbins = int(np.clip(n // 15, 2, 12))
    edges = np.quantile(x[ok], np.linspace(0.0, 1.0, nbins + 1))
    idx = np.clip(np.searchsorted(edges, x[ok], side="right") - 1, 0, nbins - 1)
    xm = np.array([np.median(x[ok][idx == k]) for k in range(nbins) if np.any(idx == k)])
    ym = np.array([np.median(y[ok][idx == k]) for k in range(nbins) if np.any(idx == k)])
    ax.plot(xm, ym, color="k", lw=1.4, marker="o", ms=3, zorder=5,
            label=f"running median of usable ({n // nbins}+ per bin)")


# ----------------------------------------------------------------------- Hubble diagram

def hubble_diagram(df, path, grid, methods: Sequence[str] = _DEFAULT_METHODS, min_cz: float = 3000.0) -> int:
    """mu against z_cmb (log axis, plain numbers; cz in km/s on top) for each method,
    with the grid's mu(z) curve and the local-flow cut."""
    z = _col(df, "z_cmb")
    fig, ax = plt.subplots(figsize=(7, 5.2))
    n = 0
    zmin, zmax = np.inf, -np.inf
    notes = []
    for m in _present(df, methods):
        mu, err = _col(df, f"{m}_mu"), _col(df, f"{m}_mu_err")
        ok = np.isfinite(z) & (z > 0) & np.isfinite(mu)
        name, color, marker = _label(m)
        off = int(_off_scale(df, "z_cmb", f"{m}_mu").sum())
        no_z = int((np.isfinite(mu) & ~(np.isfinite(z) & (z > 0))).sum())
        bad = ok & _flagged(df, m)
        notes.append(_count_note(name, int((ok & ~bad).sum()), int(bad.sum()),
                                 f"; not drawn: {no_z} without z_CMB > 0, {off} off-scale"))
        if not ok.any():
            continue
        _points(ax, z, mu, err, ok & ~bad, bad, color, marker, name)
        n += int(ok.sum())
        zmin, zmax = min(zmin, z[ok].min()), max(zmax, z[ok].max())
    if n == 0:
        _no_data(ax)
    else:
        zz = np.geomspace(zmin / 1.3, min(zmax * 1.3, grid.z_max), 200)
        c = grid.cosmology
        ax.plot(zz, grid.mu(zz), color="k", lw=1.2, zorder=4,
                label=f"{c.get('name') or c.get('class', '')} H0={grid.h0:g}, Om0={c.get('Om0', np.nan):.3g}")
        ax.set_xscale("log")
        ax.axvline(min_cz / C_KMS, color="0.3", ls=":", lw=1.2, zorder=1,
                   label=f"local-flow cut, c z = {min_cz:g} km/s")
        _plain_log_axis(ax.xaxis)
        top = ax.secondary_xaxis("top", functions=(lambda v: v * C_KMS, lambda v: v / C_KMS))
        _plain_log_axis(top.xaxis)
        top.set_xlabel(r"$c\,z_{\rm CMB}$ (km/s)")
        ax.legend(loc="lower right", fontsize=7)
    ax.set_xlabel(r"$z_{\rm CMB}$")
    ax.set_ylabel(r"distance modulus $\mu$ (mag)")
    ax.set_title("Hubble diagram")
    ax.grid(alpha=0.3)
    _finish(fig, ["Points drawn, per method:", *notes] if notes else [])
    _save(fig, path)
    return n


# ---------------------------------------------------------------------- relation plots

def _calibration_curve(calibration, x):
    """Absolute magnitude of the calibration along predictor x (luminosity,
    colour_polynomial and inverse forms; None for the baryonic form)."""
    if calibration.form in ("luminosity", "colour_polynomial"):
        return x, calibration.relation(x)
    if calibration.form == "inverse" and calibration.magnitude_pivot is not None:
        # x - pivot = sum a_k (M - M_pivot)^k: trace it along M
        mags = np.linspace(-25.0, -12.0, 400)
        xs = calibration.pivot + np.polynomial.polynomial.polyval(
            mags - calibration.magnitude_pivot, calibration.coefficients)
        inside = calibration.in_range(xs)
        return xs[inside], mags[inside]
    return None


def band_text(spec, calibration=None, bands: dict | None = None, section: dict | None = None) -> str:
    """The run's band of a method for axis labels: the user's label, filter curve and the
    magnitudes' system (the calibration's, which the method converts to), and the
    calibration's passband where it is another; the calibration's band without config."""
    from . import passbands

    if not section or not bands or "band" not in spec.bands:
        return calibration.band if calibration is not None else "the method's band"
    label = spec.band_labels(section)["band"]
    band = bands.get(label, {})
    system = calibration.system if calibration is not None else band.get("system", "")
    text = f"{label} ({band.get('filter', '?')}, {system})"
    if calibration is not None:
        have = passbands.of_band(band) if band else None
        if have is None or passbands.canonical(have) != passbands.canonical(calibration.band):
            text += f"; calibration's band {calibration.band}"
    return text


def _labels(rp, calibration, band: str) -> tuple[str, str]:
    colour = "-".join(calibration.color_bands) if calibration is not None and calibration.color_bands else \
        (calibration.predictor if calibration is not None else "colour")
    return (rp.xlabel.replace("{colour}", colour).replace("{band}", band),
            rp.ylabel.replace("{colour}", colour).replace("{band}", band))


def relation(df, path, prefix: str, calibration=None, bands: dict | None = None,
             section: dict | None = None) -> int:
    """The calibration-relation plot of the method with ``prefix`` (its registry entry's
    ``relation_plot``). ``absolute`` view: <prefix>_<y> - mu_z against <prefix>_<x> with
    the calibration's curve; ``identity`` view: <prefix>_<y> against <prefix>_<x> with the
    1:1 line; both with the calibration's scatter as a band. ``bands`` and ``section``
    (the run's bands config and the method's section) name the user's band."""
    spec = by_prefix(prefix)
    if spec is None or spec.relation_plot is None:
        raise ValueError(f"unknown plot '{prefix}_relation'; known: "
                         f"{', '.join(plot_names([s.prefix for s in REGISTRY.values()]))}")
    rp = spec.relation_plot
    xlabel, ylabel = _labels(rp, calibration, band_text(spec, calibration, bands, section))
    xcol, ycol = f"{prefix}_{rp.x}", f"{prefix}_{rp.y}"
    x = _col(df, xcol)
    y = _col(df, ycol) - (_col(df, "mu_z") if rp.view == "absolute" else 0.0)
    ok = np.isfinite(x) & np.isfinite(y)
    bad = ok & _flagged(df, prefix)
    _, color, marker = _label(prefix)
    fig, ax = plt.subplots(figsize=(7, 5.4))
    n = int(ok.sum())
    if n:
        _points(ax, x, y, None, ok & ~bad, bad, color, marker, "galaxies", size=10)
    if calibration is not None:
        scatter = calibration.scatter
        if rp.view == "identity":
            span = [np.nanmin(np.r_[x[ok], y[ok]]), np.nanmax(np.r_[x[ok], y[ok]])] if n else [0.0, 1.0]
            cx = np.linspace(span[0] - 0.05, span[1] + 0.05, 50)
            cy = cx
            line_label = f"1:1 (on the plane of {calibration.name})"
        else:
            lo, hi = calibration.valid_range
            curve = _calibration_curve(calibration, np.linspace(lo, hi, 200))
            cx, cy = curve if curve is not None and len(curve[0]) else (None, None)
            line_label = f"calibration {calibration.name}"
        if cx is not None:
            ax.plot(cx, cy, color="k", lw=1.5, label=line_label)
            ax.fill_between(cx, cy - scatter, cy + scatter, color="k", alpha=0.12,
                            label=f"± the calibration's scatter, {scatter:g} {rp.scatter_unit}")
        else:
            ax.text(0.02, 0.02, f"calibration form '{calibration.form}' not drawn",
                    transform=ax.transAxes, fontsize=8)
    if n == 0:
        _no_data(ax)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="best", fontsize=7)
    if rp.view == "absolute" and ax.has_data() and not ax.yaxis_inverted():
        ax.invert_yaxis()  # brighter up
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel, fontsize=9)
    ax.set_title(rp.title)
    ax.grid(alpha=0.3)
    off = int((_off_scale(df, xcol, ycol) | (rp.view == "absolute") & _off_scale(df, "mu_z")).sum())
    notes = [_count_note("Galaxies drawn", int((ok & ~bad).sum()), int(bad.sum()),
                         f" with both values; {off} off-scale not drawn")]
    if calibration is not None:
        notes.append(calibration.citation())
    _finish(fig, notes)
    _save(fig, path)
    return n


# ------------------------------------------------------------------------- dmu plots

def _panels(n_panels: int, width: float = 4.4, height: float = 3.9):
    fig, axes = plt.subplots(1, max(n_panels, 1), figsize=(width * max(n_panels, 1), height), squeeze=False)
    return fig, axes[0]


def dmu_histograms(df, path, methods: Sequence[str] = _DEFAULT_METHODS, min_cz: float = 3000.0) -> int:
    """Histogram of dmu per method (rows with c z_cmb >= min_cz) against the Gaussian
    expected from the errors alone, centred on the median of the usable rows: sigma the
    rms of sqrt(mu_err^2 + mu_z_err^2), scaled to their count."""
    cz = C_KMS * _col(df, "z_cmb")
    present = _present(df, methods)
    fig, axes = _panels(len(present))
    total = 0
    notes = []
    for ax, m in zip(axes, present):
        dmu = _col(df, f"{m}_dmu")
        err = np.sqrt(_col(df, f"{m}_mu_err") ** 2 + _col(df, "mu_z_err") ** 2)
        above = np.nan_to_num(cz, nan=-np.inf) >= min_cz
        base = np.isfinite(dmu) & above
        bad = base & _flagged(df, m)
        good = base & ~bad
        name, color, _ = _label(m)
        total += int(base.sum())
        below = int((np.isfinite(dmu) & ~above).sum())
        notes.append(_count_note(name, int(good.sum()), int(bad.sum()),
                                 f" (stacked); left out: {below} below the cut or without z_CMB, "
                                 f"{int(_off_scale(df, f'{m}_dmu').sum())} off-scale"))
        if not base.any():
            _no_data(ax)
        else:
            lo, hi = np.clip(np.percentile(dmu[base], [0.5, 99.5]), -20.0, 20.0)
            span = max(hi - lo, 0.5)
            nbins = int(np.clip(2 * np.sqrt(base.sum()), 8, 60))
            bins = np.linspace(lo - 0.1 * span, hi + 0.1 * span, nbins + 1)
            ax.hist([dmu[good], dmu[bad]], bins=bins, stacked=True, color=[color, "0.75"],
                    histtype="stepfilled",  # one patch per set, not one per bar: quicker to draw
                    label=[f"usable ({good.sum()})", f"flagged ({bad.sum()})"])
            sig = np.sqrt(np.nanmean(err[good] ** 2)) if good.any() and np.isfinite(err[good]).any() else np.nan
            med = float(np.median(dmu[good])) if good.any() else np.nan
            if np.isfinite(sig) and sig > 0:
                xs = np.linspace(bins[0], bins[-1], 300)
                scale = good.sum() * (bins[1] - bins[0])
                ax.plot(xs, scale * np.exp(-0.5 * ((xs - med) / sig) ** 2) / (sig * np.sqrt(2 * np.pi)),
                        color="k", lw=1.2, label=f"expected from the errors,\ncentred on the median: "
                                                 f"N({med:+.2f}, {sig:.2f})")
            if good.any():
                ax.axvline(med, color="k", ls="--", lw=1, label=f"median {med:+.3f}")
            ax.legend(fontsize=6.5)
        ax.set_xlabel(rf"$\Delta\mu = \mu_{{\rm {m}}} - \mu_z$ (mag)")
        ax.set_ylabel("galaxies")
        ax.set_title(f"{name}: c z ≥ {min_cz:g} km/s")
    if not present:
        _no_data(axes[0])
    _finish(fig, ["Points drawn, per method:", *notes] if notes else [])
    _save(fig, path)
    return total


def _dmu_against(df, path, present, axis) -> int:
    """dmu against a per-method x, one panel per method in ``present``, with the running
    median of the usable rows. ``axis(m)`` gives (x values, the product column they come
    from, x label, title, extra(ax) drawing what the panel adds)."""
    fig, axes = _panels(len(present))
    total = 0
    notes = []
    for ax, m in zip(axes, present):
        x, xcol, xlabel, title, extra = axis(m)
        dmu = _col(df, f"{m}_dmu")
        ok = np.isfinite(x) & np.isfinite(dmu)
        bad = ok & _flagged(df, m)
        good = ok & ~bad
        name, color, marker = _label(m)
        total += int(ok.sum())
        notes.append(_count_note(name, int(good.sum()), int(bad.sum()),
                                 f"; {int(_off_scale(df, f'{m}_dmu', xcol).sum())} off-scale not drawn"))
        if not ok.any():
            _no_data(ax)
        else:
            _points(ax, x, dmu, None, good, bad, color, marker, name, size=8)
            _running_median(ax, np.where(good, x, np.nan), dmu, color)
            ax.axhline(0.0, color="0.3", lw=0.8)
            extra(ax)
            ax.legend(fontsize=6.5, loc="upper right")  # "best" scans every point: slow at 10^5
        ax.set_xlabel(xlabel, fontsize=8)
        ax.set_ylabel(rf"$\Delta\mu = \mu_{{\rm {m}}} - \mu_z$ (mag)")
        ax.set_title(f"{name}: {title}", fontsize=10)
        ax.grid(alpha=0.3)
    if not present:
        _no_data(axes[0])
    _finish(fig, ["Points drawn, per method:", *notes] if notes else [])
    _save(fig, path)
    return total


def dmu_cz(df, path, methods: Sequence[str] = _DEFAULT_METHODS, min_cz: float = 3000.0) -> int:
    """dmu against c z_cmb per method, with the running median of the usable rows and
    the local-flow cut: a trend with distance is the first sign of selection bias."""
    cz = C_KMS * _col(df, "z_cmb")

    def axis(m):
        def cut(ax):
            ax.axvline(min_cz, color="0.3", ls=":", lw=1.2, label=f"local-flow cut, {min_cz:g} km/s")
        return cz, "z_cmb", r"$c\,z_{\rm CMB}$ (km/s)", "Δμ against redshift", cut

    return _dmu_against(df, path, _present(df, methods), axis)


def dmu_predictor(df, path, methods: Sequence[str] = _DEFAULT_METHODS, calibrations: dict | None = None) -> int:
    """dmu against each method's predictor (the x of its relation plot: log W^i, the
    colour, the plane's predicted size), with the running median of the usable rows
    and the calibration's valid range of the predictor where it is that quantity."""
    present = [m for m in _present(df, methods) if (s := by_prefix(m)) and s.relation_plot]

    def axis(m):
        spec = by_prefix(m)
        rp = spec.relation_plot
        cal = (calibrations or {}).get(m)
        xlabel, _ = _labels(rp, cal, band_text(spec, cal))

        def edges(ax):
            if cal is not None and rp.view == "absolute":
                for edge in cal.valid_range:
                    ax.axvline(edge, color="0.5", ls="--", lw=0.8)
        return _col(df, f"{m}_{rp.x}"), f"{m}_{rp.x}", xlabel, "Δμ against the predictor", edges

    return _dmu_against(df, path, present, axis)


def method_comparison(df, path, methods: Sequence[str] = _DEFAULT_METHODS) -> int:
    """mu of one method against another for galaxies measured by both (a panel per
    pair), with the 1:1 line and the median offset of the rows usable in both."""
    present = _present(df, methods)
    pairs = list(itertools.combinations(present, 2))
    fig, axes = _panels(len(pairs), width=4.4, height=4.3)
    total = 0
    notes = []
    for ax, (a, b) in zip(axes, pairs):
        mu_a, mu_b = _col(df, f"{a}_mu"), _col(df, f"{b}_mu")
        ok = np.isfinite(mu_a) & np.isfinite(mu_b)
        bad = ok & (_flagged(df, a) | _flagged(df, b))
        good = ok & ~bad
        (na, _, _), (nb, color, marker) = _label(a), _label(b)
        total += int(ok.sum())
        notes.append(_count_note(f"{na} and {nb}", int(good.sum()), int(bad.sum()),
                                 " (flagged by either)"))
        if not ok.any():
            _no_data(ax, "no galaxy\nmeasured by both")
        else:
            lo, hi = np.min(np.r_[mu_a[ok], mu_b[ok]]), np.max(np.r_[mu_a[ok], mu_b[ok]])
            line = np.array([lo - 0.3, hi + 0.3])
            ax.plot(line, line, color="k", lw=1.0, label="1:1")
            _points(ax, mu_a, mu_b, _col(df, f"{b}_mu_err"), good, bad, color, marker, "galaxies", size=10)
            if good.any():
                off = float(np.median(mu_b[good] - mu_a[good]))
                ax.plot(line, line + off, color="k", ls="--", lw=1.0,
                        label=rf"median $\mu_{{\rm {b}}} - \mu_{{\rm {a}}}$ = {off:+.3f} mag ({good.sum()})")
            ax.legend(fontsize=6.5, loc="upper left")
        ax.set_xlabel(rf"$\mu_{{\rm {a}}}$ ({na}, mag)")
        ax.set_ylabel(rf"$\mu_{{\rm {b}}}$ ({nb}, mag)")
        ax.set_title(f"{nb} against {na}", fontsize=10)
        ax.grid(alpha=0.3)
    if not pairs:
        _no_data(axes[0], "fewer than two methods")
    _finish(fig, ["Galaxies with both distances, per pair:", *notes] if notes else [])
    _save(fig, path)
    return total


# ------------------------------------------------------------------------------ sky map

def vpec_sky(df, path, methods: Sequence[str] = _DEFAULT_METHODS, column: str = "vpec") -> int:
    """Peculiar velocities on the sky: Mollweide, galactic coordinates, l = 0 at the
    centre increasing to the left; a colour bar in km/s; flagged rows hollow in the
    method's marker; the legend below the map, not on it."""
    lon, lat = _col(df, "gal_l"), _col(df, "gal_b")
    present = _present(df, methods)
    rows = max(len(present), 1)
    fig = plt.figure(figsize=(7.5, 4.1 * rows))
    total = 0
    notes = []
    for i, m in enumerate(present or [None]):
        ax = fig.add_subplot(rows, 1, i + 1, projection="mollweide")
        if m is None:
            _no_data(ax)
            continue
        v = _col(df, f"{m}_{column}")
        ok = np.isfinite(v) & np.isfinite(lon) & np.isfinite(lat)
        bad = ok & _flagged(df, m)
        good = ok & ~bad
        x = -np.radians(((lon + 180.0) % 360.0) - 180.0)
        y = np.radians(lat)
        name, color, marker = _label(m)
        total += int(ok.sum())
        notes.append(_count_note(name, int(good.sum()), int(bad.sum()),
                                 f"; {int((np.isfinite(_col(df, f'{m}_mu')) & ~ok).sum())} with a distance "
                                 f"but no {column} or position, "
                                 f"{int(_off_scale(df, f'{m}_{column}').sum())} off-scale"))
        if bad.any():
            ax.scatter(x[bad], y[bad], s=9, marker=marker, facecolors="none", edgecolors="0.45",
                       linewidths=0.6, label=f"flagged ({bad.sum()})", rasterized=True)
        if good.any():
            vmax = float(np.nanpercentile(np.abs(v[good]), 98)) or 1.0
            sc = ax.scatter(x[good], y[good], c=v[good], s=12, marker=marker, cmap="RdBu_r", vmin=-vmax,
                            vmax=vmax, edgecolors="0.35", linewidths=0.3, rasterized=True)
            # legend proxy in grey: the colour bar gives the values
            ax.scatter([], [], s=12, marker=marker, color="0.6", edgecolors="0.35", linewidths=0.3,
                       label=f"usable ({good.sum()})")
            fig.colorbar(sc, ax=ax, shrink=0.7, pad=0.03, label=r"peculiar velocity $v_{\rm pec}$ (km/s)")
        if not ok.any():
            _no_data(ax)
        else:
            ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.1), ncol=2, fontsize=7, frameon=False)
        ticks = np.arange(-120, 121, 60)
        ax.set_xticks(np.radians(ticks))
        ax.set_xticklabels([f"{(-t) % 360:d}°" for t in ticks], fontsize=7)
        ax.set_xlabel("galactic longitude l", labelpad=2)
        ax.set_ylabel("galactic latitude b")
        ax.grid(alpha=0.3)
        ax.set_title(f"{name}: peculiar velocity ({column})", fontsize=10)
    _finish(fig, ["Points drawn, per method:", *notes] if notes else [])
    _save(fig, path)
    return total


# --------------------------------------------------------------------------- dispatch

def draw(name: str, df, path, grid, *, methods: Sequence[str] = _DEFAULT_METHODS,
         calibrations: dict | None = None, min_cz: float = 3000.0, bands: dict | None = None,
         sections: dict | None = None) -> int:
    """Draw the plot called ``name`` (one of ``plot_names``) to ``path``; ``calibrations``
    maps a method prefix to its calibration, ``bands`` is the run's bands config and
    ``sections`` maps a method prefix to its config section (the user's band in labels).
    Returns the number of galaxies drawn."""
    if name == "hubble_diagram":
        return hubble_diagram(df, path, grid, methods, min_cz)
    if name.endswith("_relation"):
        prefix = name.removesuffix("_relation")
        return relation(df, path, prefix, (calibrations or {}).get(prefix), bands, (sections or {}).get(prefix))
    if name == "dmu_histograms":
        return dmu_histograms(df, path, methods, min_cz)
    if name == "dmu_cz":
        return dmu_cz(df, path, methods, min_cz)
    if name == "dmu_predictor":
        return dmu_predictor(df, path, methods, calibrations)
    if name == "method_comparison":
        return method_comparison(df, path, methods)
    if name == "vpec_sky":
        return vpec_sky(df, path, methods)
    raise ValueError(f"unknown plot {name!r}; known: {', '.join(plot_names(_DEFAULT_METHODS))}")


def write_all(df, out_dir, grid, *, methods: Sequence[str] = _DEFAULT_METHODS, calibrations: dict | None = None,
              min_cz: float = 3000.0, bands: dict | None = None, sections: dict | None = None) -> dict[str, str]:
    """The plots of ``plot_names(methods)`` into ``out_dir``; returns {plot name: path}."""
    out = Path(out_dir)
    paths = {k: str(out / f"{k}.png") for k in plot_names(methods)}
    for name, path in paths.items():
        draw(name, df, path, grid, methods=methods, calibrations=calibrations, min_cz=min_cz, bands=bands,
             sections=sections)
    return paths
