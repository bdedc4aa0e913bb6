"""Report figures: pure functions of arrays returning a matplotlib ``Figure``.

No pyplot and no global state: each function builds a :class:`matplotlib.figure.Figure`
(Agg canvas), so figures can be drawn in worker threads. Colour maps are perceptually uniform
and readable with colour-vision deficiencies: viridis/cividis for magnitudes, twilight for
angles (cyclic), and the Okabe-Ito palette for categories.

References
----------
.. [1] Crameri F, Shephard GE, Heron PJ (2020). The misuse of colour in science
   communication. Nat Commun 11:5444. doi:10.1038/s41467-020-19160-7
.. [2] Okabe M, Ito K (2008). Color Universal Design (CUD): how to make figures and
   presentations that are friendly to colorblind people. https://jfly.uni-koeln.de/color/
.. [3] Nuñez JR, Anderton CR, Renslow RS (2018). Optimizing colormaps with consideration for
   color vision deficiency to enable accurate interpretation of scientific data. PLoS ONE
   13:e0199239 (cividis). doi:10.1371/journal.pone.0199239
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

__all__ = [
    "OKABE_ITO", "save", "motion_figure", "projection_figure", "raster_figure",
    "plane_counts_figure", "sync_figure", "trajectory_figure", "density_figure",
    "split_angle_figure", "decode_lag_figure", "confusion_figure", "cell_map_figure",
    "bearing_map_figure", "tuning_curves_figure", "fraction_tuned_figure",
]

#: Okabe-Ito colour-blind-safe qualitative palette (black omitted).
OKABE_ITO = ("#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7")


def _fig(w_in: float = 7.0, h_in: float = 3.0) -> Figure:
    fig = Figure(figsize=(w_in, h_in), layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def save(fig: Figure, path: Path, *, dpi: int = 110) -> Path:
    """Write ``fig`` as PNG and return the path."""
    fig.savefig(path, dpi=dpi, format="png")
    return path


def motion_figure(t_s: np.ndarray, shift_um: np.ndarray, *, quality: np.ndarray | None = None,
                  flagged: np.ndarray | None = None) -> Figure:
    """Rigid shifts per axis (um) over time, the registration quality, flagged volumes."""
    fig = _fig(7.0, 3.6 if quality is not None else 2.4)
    axes = fig.subplots(2 if quality is not None else 1, 1, sharex=True, squeeze=False)[:, 0]
    for i, axis in enumerate("zyx"):
        axes[0].plot(t_s, shift_um[:, i], lw=1, color=OKABE_ITO[i], label=f"{axis}")
    axes[0].set_ylabel("shift (µm)")
    axes[0].legend(loc="upper right", ncol=3, fontsize=8, frameon=False)
    if quality is not None:
        axes[1].plot(t_s, quality, lw=1, color="0.2")
        axes[1].set_ylabel("quality")
    if flagged is not None and np.any(flagged):
        for ax in axes:
            for t in t_s[np.asarray(flagged, bool)]:
                ax.axvline(t, color=OKABE_ITO[5], lw=0.8, alpha=0.6)
    axes[-1].set_xlabel("time (s, imaging clock)")
    return fig


def projection_figure(image_zyx: np.ndarray, voxel_size_um: Sequence[float], *,
                      labels_zyx: np.ndarray | None = None, cmap: str = "gray") -> Figure:
    """Maximum projections (top: over z; side: over y) with cell outlines."""
    vz, vy, vx = (float(v) for v in voxel_size_um)
    nz, ny, nx = image_zyx.shape
    fig = _fig(7.0, 4.2)
    top, side = fig.subplots(2, 1, height_ratios=[ny * vy, max(nz * vz, 0.15 * ny * vy)])
    ext_top = (0, nx * vx, ny * vy, 0)
    ext_side = (0, nx * vx, nz * vz, 0)
    for ax, proj, ext in ((top, image_zyx.max(axis=0), ext_top),
                          (side, image_zyx.max(axis=1), ext_side)):
        lo, hi = np.percentile(proj, [1, 99.5])
        ax.imshow(proj, cmap=cmap, vmin=lo, vmax=hi, extent=ext, interpolation="nearest",
                  aspect="equal" if ax is top else "auto")
    if labels_zyx is not None:
        # thin contour lines at voxel resolution: filled boundary pixels hide small images
        mask = labels_zyx.max(axis=0) > 0
        ys = (np.arange(ny) + 0.5) * vy
        xs = (np.arange(nx) + 0.5) * vx
        top.contour(xs, ys, mask.astype(float), levels=[0.5], colors=["#F0E442"],
                    linewidths=0.6)
    top.set_ylabel("y (µm)")
    side.set_ylabel("z (µm)")
    side.set_xlabel("x (µm)")
    return fig


def raster_figure(values: np.ndarray, t_s: np.ndarray, *, label: str = "ΔF/F") -> Figure:
    """Cells x time raster (rows already ordered), colour limited to the 1-99th percentile."""
    fig = _fig(7.0, 3.4)
    ax = fig.subplots()
    lo, hi = np.nanpercentile(values, [1, 99]) if values.size else (0, 1)
    im = ax.imshow(values, aspect="auto", cmap="viridis", vmin=lo, vmax=hi,
                   extent=(float(t_s[0]), float(t_s[-1]), values.shape[0], 0),
                   interpolation="nearest")
    fig.colorbar(im, ax=ax, label=label, shrink=0.9)
    ax.set_xlabel("time (s, imaging clock)")
    ax.set_ylabel("cell (sorted)")
    return fig


def plane_counts_figure(planes: np.ndarray, counts: np.ndarray, *, plane_um: float) -> Figure:
    """Number of cells per imaging plane."""
    fig = _fig(7.0, 2.4)
    ax = fig.subplots()
    ax.bar(planes, counts, color=OKABE_ITO[4])
    ax.set_xlabel(f"plane (index; {plane_um:g} µm apart)")
    ax.set_ylabel("cells")
    return fig


def sync_figure(intervals_s: np.ndarray | None, residuals_ms: np.ndarray | None,
                counts: Mapping[str, int]) -> Figure:
    """Trigger intervals, clock-fit residuals and the matched/dropped/spurious pulse counts."""
    fig = _fig(7.0, 2.6)
    a, b, c = fig.subplots(1, 3, width_ratios=[2, 2, 1.2])
    if intervals_s is not None and len(intervals_s):
        a.plot(np.asarray(intervals_s) * 1e3, ".", ms=2, color=OKABE_ITO[4])
    a.set_xlabel("pulse index")
    a.set_ylabel("interval (ms)")
    if residuals_ms is not None and len(residuals_ms):
        b.plot(residuals_ms, ".", ms=2, color=OKABE_ITO[5])
        b.axhline(0, color="0.5", lw=0.8)
    b.set_xlabel("matched pulse")
    b.set_ylabel("clock-fit residual (ms)")
    names = list(counts)
    c.bar(names, [counts[n] for n in names], color=OKABE_ITO[: len(names)])
    c.set_ylabel("pulses")
    c.tick_params(axis="x", labelrotation=45)
    return fig


def trajectory_figure(trials: Sequence[tuple[np.ndarray, np.ndarray, str]],
                      splits_xy: np.ndarray | None, targets: Sequence[str],
                      targets_xy: Mapping[str, tuple[float, float]] | None = None) -> Figure:
    """Trajectories per trial ``(x_mm, y_mm, chosen)``, coloured by chosen target; splits."""
    fig = _fig(5.5, 4.2)
    ax = fig.subplots()
    colour = {t: OKABE_ITO[i % len(OKABE_ITO)] for i, t in enumerate(targets)}
    for x, y, chosen in trials:
        ax.plot(x, y, lw=0.8, alpha=0.8, color=colour.get(chosen, "0.5"))
    for t, c in colour.items():
        ax.plot([], [], color=c, label=f"chose {t}")
        if targets_xy and t in targets_xy:
            ax.plot(*targets_xy[t], marker="*", ms=12, color=c, mec="k", ls="none")
    if splits_xy is not None and len(splits_xy):
        ax.plot(splits_xy[:, 0], splits_xy[:, 1], "kx", ms=6, label="split point")
    ax.set_aspect("equal", adjustable="datalim")
    ax.set_xlabel("x (mm)")
    ax.set_ylabel("y (mm)")
    ax.legend(fontsize=8, frameon=False, loc="best")
    return fig


def density_figure(density: np.ndarray, *, x_edges_mm: np.ndarray | None = None,
                   y_edges_mm: np.ndarray | None = None, split_x_mm: float | None = None
                   ) -> Figure:
    """The folded trajectory density (rows y, columns x) with the split marked."""
    fig = _fig(5.5, 3.6)
    ax = fig.subplots()
    ny, nx = density.shape
    xe = np.asarray(x_edges_mm) if x_edges_mm is not None else np.arange(nx + 1)
    ye = np.asarray(y_edges_mm) if y_edges_mm is not None else np.arange(ny + 1)
    mesh = ax.pcolormesh(xe, ye, density, cmap="viridis", shading="flat")
    fig.colorbar(mesh, ax=ax, label="density (fraction of samples)")
    if split_x_mm is not None and np.isfinite(split_x_mm):
        ax.axvline(split_x_mm, color="w", ls="--", lw=1, label="median split")
        ax.legend(fontsize=8, loc="upper left")
    unit = "mm" if x_edges_mm is not None else "bin"
    ax.set_xlabel(f"lateral position |x|, folded ({unit})")
    ax.set_ylabel(f"forward position y, targets ahead ({unit})")
    return fig


def split_angle_figure(angles_rad: np.ndarray, *, critical_rad: float | None = None,
                       ci_rad: tuple[float, float] | None = None) -> Figure:
    """Histogram of the angle subtended by the outermost targets at each split."""
    fig = _fig(5.5, 2.8)
    ax = fig.subplots()
    deg = np.degrees(np.asarray(angles_rad, float))
    ax.hist(deg[np.isfinite(deg)], bins=max(5, min(30, deg.size)), color=OKABE_ITO[1])
    if ci_rad is not None and all(np.isfinite(ci_rad)):
        ax.axvspan(*np.degrees(ci_rad), color=OKABE_ITO[0], alpha=0.3, label="95% interval")
    if critical_rad is not None and np.isfinite(critical_rad):
        ax.axvline(np.degrees(critical_rad), color=OKABE_ITO[5], lw=2,
                   label=f"critical angle {np.degrees(critical_rad):.1f}°")
    ax.set_xlabel("subtended angle at split (degrees)")
    ax.set_ylabel("splits")
    if ax.get_legend_handles_labels()[0]:
        ax.legend(fontsize=8, frameon=False)
    return fig


def decode_lag_figure(lag_s: np.ndarray, score: np.ndarray, *,
                      folds: np.ndarray | None = None,
                      null_band: tuple[np.ndarray, np.ndarray] | None = None,
                      earliest_lag_s: float | None = None, metric: str = "score") -> Figure:
    """Cross-validated score against lag, per fold and mean, with the null band."""
    fig = _fig(6.0, 3.0)
    ax = fig.subplots()
    if null_band is not None:
        ax.fill_between(lag_s, null_band[0], null_band[1], color="0.8", label="null band")
    if folds is not None:
        for row in folds:
            ax.plot(lag_s, row, color=OKABE_ITO[1], lw=0.6, alpha=0.6)
    ax.plot(lag_s, score, color=OKABE_ITO[4], lw=2, marker="o", ms=3, label="mean over folds")
    if earliest_lag_s is not None and np.isfinite(earliest_lag_s):
        ax.axvline(earliest_lag_s, color=OKABE_ITO[5], ls="--",
                   label=f"earliest decodable {earliest_lag_s:+.2f} s")
    ax.axvline(0, color="0.4", lw=0.6)
    ax.set_xlabel("lag of activity relative to the turn (s; negative = before)")
    ax.set_ylabel(metric)
    ax.legend(fontsize=8, frameon=False)
    return fig


def confusion_figure(matrix: np.ndarray, classes: Sequence[str]) -> Figure:
    """Confusion matrix (rows true, columns predicted), counts written in the cells."""
    fig = _fig(3.6, 3.0)
    ax = fig.subplots()
    m = np.asarray(matrix, float)
    im = ax.imshow(m, cmap="cividis")
    for (i, j), v in np.ndenumerate(m):
        ax.text(j, i, f"{v:g}", ha="center", va="center",
                color="k" if v > 0.5 * m.max() else "w", fontsize=9)
    ax.set_xticks(range(len(classes)), classes)
    ax.set_yticks(range(len(classes)), classes)
    ax.set_xlabel("predicted")
    ax.set_ylabel("true")
    fig.colorbar(im, ax=ax, label="count")
    return fig


def cell_map_figure(x_um: np.ndarray, y_um: np.ndarray, z_um: np.ndarray, values: np.ndarray, *,
                    label: str, cmap: str = "cividis", symmetric: bool = False) -> Figure:
    """Cells at their positions (top and side views) coloured by a value."""
    fig = _fig(7.0, 4.0)
    top, side = fig.subplots(2, 1, height_ratios=[3, 1.3], sharex=True)
    lim = float(np.nanmax(np.abs(values))) if symmetric and values.size else None
    kw: dict[str, Any] = {"c": values, "cmap": cmap, "s": 8, "edgecolors": "none"}
    if lim:
        kw.update(vmin=-lim, vmax=lim)
    sc = top.scatter(x_um, y_um, **kw)
    side.scatter(x_um, z_um, **kw)
    top.invert_yaxis()
    side.invert_yaxis()
    top.set_ylabel("y (µm)")
    side.set_ylabel("z (µm)")
    side.set_xlabel("x (µm)")
    fig.colorbar(sc, ax=[top, side], label=label)
    return fig


def bearing_map_figure(panels: Sequence[tuple[str, np.ndarray, np.ndarray, np.ndarray,
                                              np.ndarray]]) -> Figure:
    """Cells at their positions (top view) coloured by preferred bearing, with a colour wheel.

    Parameters
    ----------
    panels : sequence of (title, x_um, y_um, preferred_rad, selectivity)
        One panel each (e.g. per target and epoch); marker size grows with selectivity.
    """
    n = max(1, len(panels))
    cols = min(n, 2)
    rows = int(np.ceil(n / cols))
    fig = _fig(7.0, 2.6 * rows + 0.4)
    grid = fig.add_gridspec(rows, cols + 1, width_ratios=[4] * cols + [1.3])
    for i, (title, x_um, y_um, pref, sel) in enumerate(panels):
        ax = fig.add_subplot(grid[i // cols, i % cols])
        size = 6 + 30 * np.clip(np.nan_to_num(np.asarray(sel, float)), 0, 1)
        ax.scatter(x_um, y_um, c=pref, cmap="twilight", vmin=-np.pi, vmax=np.pi, s=size,
                   edgecolors="k", linewidths=0.2)
        ax.invert_yaxis()
        ax.set_aspect("equal", adjustable="datalim")
        ax.set_xlabel("x (µm)", fontsize=8)
        ax.set_ylabel("y (µm)", fontsize=8)
        ax.set_title(title, fontsize=9)
    wheel = fig.add_subplot(grid[0, cols], projection="polar")
    theta = np.linspace(-np.pi, np.pi, 181)
    wheel.pcolormesh(theta, np.array([0.6, 1.0]), theta[None, :-1], cmap="twilight",
                     vmin=-np.pi, vmax=np.pi, shading="flat")
    wheel.set_yticks([])
    wheel.set_xticks(np.radians([0, 90, 180, 270]), ["0° ahead", "+90° left", "180°",
                                                      "-90° right"], fontsize=7)
    wheel.set_title("preferred bearing", fontsize=8)
    return fig


def tuning_curves_figure(centres_rad: np.ndarray, curves: Sequence[np.ndarray],
                         names: Sequence[str], *, series: Sequence[str] = (),
                         unit: str = "mean ΔF/F") -> Figure:
    """Tuning curves (activity against egocentric bearing) of a few cells.

    ``curves[i]`` is ``(n_series, n_bins)`` (or ``(n_bins,)``); ``series`` names the rows
    (e.g. the epochs) in a legend on the first panel.
    """
    n = len(curves)
    cols = min(n, 4)
    rows = int(np.ceil(n / cols)) if n else 1
    fig = _fig(7.0, 1.9 * rows)
    axes = np.atleast_1d(fig.subplots(rows, cols, squeeze=False).ravel())
    deg = np.degrees(centres_rad)
    for ax, curve, name in zip(axes, curves, names, strict=False):
        curve = np.asarray(curve, float)
        if curve.ndim == 1:
            curve = curve[None]
        for k, c in enumerate(curve):
            ax.plot(deg, c, marker=".", lw=1, color=OKABE_ITO[k % len(OKABE_ITO)],
                    label=series[k] if k < len(series) else None)
        ax.set_title(name, fontsize=8)
        ax.set_xlabel("bearing (°)", fontsize=8)
        ax.set_ylabel(unit, fontsize=8)
        ax.tick_params(labelsize=7)
    if n and len(series):
        axes[0].legend(fontsize=6, frameon=False)
    for ax in axes[n:]:
        ax.set_visible(False)
    return fig


def fraction_tuned_figure(labels: Sequence[str], fraction: np.ndarray, low: np.ndarray,
                          high: np.ndarray) -> Figure:
    """Fraction of cells tuned per (target, epoch) with its confidence interval."""
    fig = _fig(6.0, 2.8)
    ax = fig.subplots()
    x = np.arange(len(labels))
    f = np.asarray(fraction, float)
    err = np.vstack([f - np.asarray(low, float), np.asarray(high, float) - f])
    ax.bar(x, f, color=OKABE_ITO[2])
    ax.errorbar(x, f, yerr=np.clip(err, 0, None), fmt="none", ecolor="k", capsize=3)
    ax.set_xticks(x, labels, rotation=30, fontsize=8)
    ax.set_ylabel("fraction of cells tuned")
    ax.set_ylim(0, max(0.05, float(np.nanmax(high)) * 1.15) if len(high) else 1)
    return fig
