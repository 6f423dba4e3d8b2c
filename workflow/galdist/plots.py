"""Diagnostic plots of the final distance table (matplotlib, Agg backend, PNG).

Each function takes a pandas DataFrame with the columns of distances.parquet
(missing columns count as all-NaN), writes exactly one PNG to ``path`` and
returns the number of galaxies drawn (0 gives a figure saying "no data").
Usable points are filled; flagged points (any method flag other than
LOCAL_FLOW) are hollow grey so they stand out at a glance.
"""

from __future__ import annotations

import textwrap
from collections.abc import Sequence
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from .flags import Method  # noqa: E402
from .io import atomic_path  # noqa: E402
from .methods import REGISTRY, by_prefix, plot_names  # noqa: E402

DPI = 110
MAX_ERRORBARS = 3000  # above this, points only (error bars would hide the data)
_NOT_A_PROBLEM = int(Method.LOCAL_FLOW)
_DEFAULT_METHODS = tuple(s.prefix for s in REGISTRY.values())


#: Beyond this magnitude no plotted quantity (mag, km/s, deg, z) is physical: such
#: values are left out of the drawing (they stay in the product, flagged), so no
#: finite value can break an axis or a histogram.
OFF_SCALE = 1e6


def _col(df, name) -> np.ndarray:
    if name not in df.columns:
        return np.full(len(df), np.nan)
    values = np.asarray(df[name].to_numpy(dtype=float, na_value=np.nan), dtype=float)
    with np.errstate(invalid="ignore"):
        return np.where(np.abs(values) <= OFF_SCALE, values, np.nan)


def _flagged(df, method) -> np.ndarray:
    name = f"{method}_flags"
    if name not in df.columns:
        return np.zeros(len(df), dtype=bool)
    fl = np.asarray(df[name].to_numpy(dtype="int64", na_value=0), dtype=np.int64)
    return (fl & ~_NOT_A_PROBLEM) != 0


def _label(method) -> tuple[str, str]:
    """Title and colour of a method prefix (its registry entry's)."""
    spec = by_prefix(method)
    return (spec.title, spec.colour) if spec else (method.upper(), "tab:purple")


def _no_data(ax, text="no data"):
    ax.text(0.5, 0.5, text, transform=ax.transAxes, ha="center", va="center",
            fontsize=14, color="0.4")


def _save(fig, path) -> None:
    """Write the PNG atomically (temporary name, then rename) and free the figure."""
    try:
        with atomic_path(path) as tmp:
            fig.savefig(tmp, dpi=DPI)
    finally:
        plt.close(fig)


def _points(ax, x, y, yerr, good, bad, color, label, size=12):
    """Filled usable points (with error bars when few) and hollow grey flagged points."""
    if good.any():
        if good.sum() <= MAX_ERRORBARS and yerr is not None:
            e = np.where(np.isfinite(yerr[good]), yerr[good], 0.0)
            ax.errorbar(x[good], y[good], yerr=e, fmt="none", ecolor=color, alpha=0.3, lw=0.8)
        ax.scatter(x[good], y[good], s=size, color=color, label=f"{label} ({good.sum()})",
                   edgecolors="none", rasterized=True, zorder=3)
    if bad.any():
        ax.scatter(x[bad], y[bad], s=size, facecolors="none", edgecolors="0.55",
                   linewidths=0.8, label=f"{label} flagged ({bad.sum()})", rasterized=True, zorder=2)


def hubble_diagram(df, path, grid, methods: Sequence[str] = _DEFAULT_METHODS) -> int:
    """mu against z_cmb (log axis) for each method, with the grid's mu(z) curve."""
    z = _col(df, "z_cmb")
    fig, ax = plt.subplots(figsize=(7, 5))
    n = 0
    zmin, zmax = np.inf, -np.inf
    for m in methods:
        mu, err = _col(df, f"{m}_mu"), _col(df, f"{m}_mu_err")
        ok = np.isfinite(z) & (z > 0) & np.isfinite(mu)
        if not ok.any():
            continue
        bad = ok & _flagged(df, m)
        name, color = _label(m)
        _points(ax, z, mu, err, ok & ~bad, bad, color, name)
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
        ax.legend(loc="lower right", fontsize=8)
    ax.set_xlabel(r"$z_{\rm CMB}$")
    ax.set_ylabel(r"distance modulus $\mu$ (mag)")
    ax.set_title("Hubble diagram")
    ax.grid(alpha=0.3)
    fig.tight_layout()
    _save(fig, path)
    return n


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


def _relation(df, path, calibration, xcol, magcol, flagcol, xlabel, title, color) -> int:
    """Absolute magnitude implied by the redshift distance, magcol - mu_z, against xcol:
    the galaxies scatter about the calibration as they should, peculiar velocities included."""
    x, y = _col(df, xcol), _col(df, magcol) - _col(df, "mu_z")
    ok = np.isfinite(x) & np.isfinite(y)
    bad = ok & _flagged(df, flagcol)
    fig, ax = plt.subplots(figsize=(7, 5))
    n = int(ok.sum())
    if n:
        _points(ax, x, y, None, ok & ~bad, bad, color, "galaxies", size=10)
    if calibration is not None:
        lo, hi = calibration.valid_range
        curve = _calibration_curve(calibration, np.linspace(lo, hi, 200))
        if curve is not None and len(curve[0]):
            cx, cy = curve
            ax.plot(cx, cy, color="k", lw=1.5, label=f"calibration {calibration.name}")
            ax.fill_between(cx, cy - calibration.scatter, cy + calibration.scatter, color="k",
                            alpha=0.12, label=f"± scatter {calibration.scatter:g} mag")
        else:
            ax.text(0.02, 0.02, f"calibration form '{calibration.form}' not drawn",
                    transform=ax.transAxes, fontsize=8)
    if n == 0:
        _no_data(ax)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="best", fontsize=7)
    if ax.has_data() and not ax.yaxis_inverted():
        ax.invert_yaxis()  # brighter up
    ax.set_xlabel(xlabel)
    band = f" ({calibration.band}, {calibration.system})" if calibration is not None else ""
    ax.set_ylabel(f"absolute magnitude{band}, from $\\mu_z$ (mag)")
    ax.set_title(title)
    ax.grid(alpha=0.3)
    if calibration is not None:
        fig.text(0.01, 0.01, textwrap.fill(calibration.citation(), 120), fontsize=6, va="bottom",
                 color="0.3")
        fig.tight_layout(rect=(0, 0.06, 1, 1))
    else:
        fig.tight_layout()
    _save(fig, path)
    return n


def relation(df, path, prefix: str, calibration=None) -> int:
    """The calibration-relation plot of the method with ``prefix`` (its registry entry's
    ``relation_plot``): <prefix>_<y> - mu_z against <prefix>_<x>, with the calibration's
    line and scatter band."""
    spec = by_prefix(prefix)
    if spec is None or spec.relation_plot is None:
        raise ValueError(f"unknown plot '{prefix}_relation'; known: "
                         f"{', '.join(plot_names([s.prefix for s in REGISTRY.values()]))}")
    rp = spec.relation_plot
    colour = "-".join(calibration.color_bands) if calibration is not None and calibration.color_bands else \
        (calibration.predictor if calibration is not None else "colour")
    return _relation(df, path, calibration, f"{prefix}_{rp.x}", f"{prefix}_{rp.y}", prefix,
                     rp.xlabel.replace("{colour}", colour), rp.title, spec.colour)


def dmu_histograms(df, path, methods: Sequence[str] = _DEFAULT_METHODS, min_cz: float = 3000.0) -> int:
    """Histogram of dmu per method (usable rows with c z_cmb >= min_cz) against the
    Gaussian expected from the errors alone: mean 0, sigma the rms of
    sqrt(mu_err^2 + mu_z_err^2), scaled to the counts."""
    from .redshift import C_KMS

    cz = C_KMS * _col(df, "z_cmb")
    fig, axes = plt.subplots(1, len(methods), figsize=(4.2 * len(methods), 3.8), squeeze=False)
    total = 0
    for ax, m in zip(axes[0], methods):
        dmu = _col(df, f"{m}_dmu")
        err = np.sqrt(_col(df, f"{m}_mu_err") ** 2 + _col(df, "mu_z_err") ** 2)
        base = np.isfinite(dmu) & (np.nan_to_num(cz, nan=-np.inf) >= min_cz)
        bad = base & _flagged(df, m)
        good = base & ~bad
        name, color = _label(m)
        total += int(base.sum())
        if not base.any():
            _no_data(ax)
        else:
            lo, hi = np.clip(np.percentile(dmu[base], [0.5, 99.5]), -20.0, 20.0)
            span = max(hi - lo, 0.5)
            nbins = int(np.clip(2 * np.sqrt(base.sum()), 8, 60))
            bins = np.linspace(lo - 0.1 * span, hi + 0.1 * span, nbins + 1)
            ax.hist([dmu[good], dmu[bad]], bins=bins, stacked=True, color=[color, "0.7"],
                    label=[f"usable ({good.sum()})", f"flagged ({bad.sum()})"])
            sig = np.sqrt(np.nanmean(err[good] ** 2)) if good.any() and np.isfinite(err[good]).any() else np.nan
            if np.isfinite(sig) and sig > 0:
                xs = np.linspace(bins[0], bins[-1], 300)
                scale = good.sum() * (bins[1] - bins[0])
                ax.plot(xs, scale * np.exp(-0.5 * (xs / sig) ** 2) / (sig * np.sqrt(2 * np.pi)),
                        color="k", lw=1.2, label=rf"expected N(0, {sig:.2f})")
            if good.any():
                ax.axvline(np.median(dmu[good]), color="k", ls="--", lw=1,
                           label=f"median {np.median(dmu[good]):+.3f}")
            ax.legend(fontsize=7)
        ax.set_xlabel(rf"$\Delta\mu = \mu_{{\rm {m}}} - \mu_z$ (mag)")
        ax.set_ylabel("galaxies")
        ax.set_title(f"{name}: c z > {min_cz:g} km/s")
    fig.tight_layout()
    _save(fig, path)
    return total


def vpec_sky(df, path, methods: Sequence[str] = _DEFAULT_METHODS, column: str = "vpec") -> int:
    """Peculiar velocities on the sky: Mollweide, galactic coordinates, l = 0 at
    the centre increasing to the left; colour is v (km/s), flagged rows grey crosses."""
    lon, lat = _col(df, "gal_l"), _col(df, "gal_b")
    fig = plt.figure(figsize=(7.5, 3.6 * len(methods)))
    total = 0
    for i, m in enumerate(methods):
        ax = fig.add_subplot(len(methods), 1, i + 1, projection="mollweide")
        v = _col(df, f"{m}_{column}")
        ok = np.isfinite(v) & np.isfinite(lon) & np.isfinite(lat)
        bad = ok & _flagged(df, m)
        good = ok & ~bad
        x = -np.radians(((lon + 180.0) % 360.0) - 180.0)
        y = np.radians(lat)
        name, _ = _label(m)
        total += int(ok.sum())
        if bad.any():
            ax.scatter(x[bad], y[bad], s=8, marker="x", color="0.6", linewidths=0.7,
                       label=f"flagged ({bad.sum()})", rasterized=True)
        if good.any():
            vmax = float(np.nanpercentile(np.abs(v[good]), 98)) or 1.0
            sc = ax.scatter(x[good], y[good], c=v[good], s=12, cmap="RdBu_r", vmin=-vmax,
                            vmax=vmax, edgecolors="0.35", linewidths=0.3, rasterized=True)
            # legend proxy: a colour-mapped marker would show near-white
            ax.scatter([], [], s=12, color="0.5", edgecolors="0.35", linewidths=0.3,
                       label=f"usable ({good.sum()}), colour = v")
            fig.colorbar(sc, ax=ax, shrink=0.7, pad=0.02, label=r"$v_{\rm pec}$ (km/s)")
        if not ok.any():
            _no_data(ax)
        else:
            ax.legend(loc="lower right", fontsize=7, bbox_to_anchor=(1.05, -0.12))
        ticks = np.arange(-120, 121, 60)
        ax.set_xticks(np.radians(ticks))
        ax.set_xticklabels([f"{(-t) % 360:d}°" for t in ticks], fontsize=7)
        ax.set_xlabel("galactic longitude l")
        ax.set_ylabel("galactic latitude b")
        ax.grid(alpha=0.3)
        ax.set_title(f"{name}: peculiar velocity ({column})", fontsize=10)
    fig.tight_layout()
    _save(fig, path)
    return total


def draw(name: str, df, path, grid, *, methods: Sequence[str] = _DEFAULT_METHODS,
         calibrations: dict | None = None, min_cz: float = 3000.0) -> int:
    """Draw the plot called ``name`` (one of ``plot_names``) to ``path``; ``calibrations``
    maps a method prefix to its calibration. Returns the number of galaxies drawn."""
    if name == "hubble_diagram":
        return hubble_diagram(df, path, grid, methods)
    if name.endswith("_relation"):
        prefix = name.removesuffix("_relation")
        return relation(df, path, prefix, (calibrations or {}).get(prefix))
    if name == "dmu_histograms":
        return dmu_histograms(df, path, methods, min_cz)
    if name == "vpec_sky":
        return vpec_sky(df, path, methods)
    raise ValueError(f"unknown plot {name!r}; known: {', '.join(plot_names(_DEFAULT_METHODS))}")


def write_all(df, out_dir, grid, *, methods: Sequence[str] = _DEFAULT_METHODS, calibrations: dict | None = None,
              min_cz: float = 3000.0) -> dict[str, str]:
    """The plots of ``plot_names(methods)`` into ``out_dir``; returns {plot name: path}."""
    out = Path(out_dir)
    paths = {k: str(out / f"{k}.png") for k in plot_names(methods)}
    for name, path in paths.items():
        draw(name, df, path, grid, methods=methods, calibrations=calibrations, min_cz=min_cz)
    return paths
