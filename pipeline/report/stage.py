"""The ``report`` stage: ``report/index.html`` with PNG figures beside it.

Each section is a small function ``(ctx) -> str`` that reads through :class:`Session`; a
section whose stage has not run shows "not run", one whose output is missing or cannot be drawn
shows a short notice, and neither stops the page. The report runs last and requires nothing.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import matplotlib
import numpy as np
import pandas as pd

from pipeline.errors import ForkmapError
from pipeline.report import figures as F
from pipeline.report.page import (
    Section,
    esc,
    facts_block,
    figure_block,
    not_run_block,
    problem_block,
    render_page,
    run_chromium,
    table_block,
)
from pipeline.session import Session
from pipeline.stages import stage

__all__ = ["build_report", "run_report", "SECTIONS"]

log = logging.getLogger("forkmap")
matplotlib.use("Agg")


@dataclass
class _Ctx:
    session: Session
    out_dir: Path
    n_raster_cells: int = 200
    n_figures: int = field(default=0)

    def figure(self, name: str, fig: Any, caption: str) -> str:
        self.n_figures += 1
        fname = f"{self.n_figures:02d}_{name}.png"
        F.save(fig, self.out_dir / fname)
        return figure_block(fname, caption)


def _pick(cols: Any, *names: str, contains: Sequence[str] = ()) -> str | None:
    """First of ``names`` present in ``cols``, else the first key containing all ``contains``."""
    keys = [str(c) for c in cols]
    for n in names:
        if n in keys:
            return n
    if contains:
        return next((k for k in keys if all(w in k for w in contains)), None)
    return None


# ---- sections -------------------------------------------------------------------------------
def _summary(ctx: _Ctx) -> str:
    s = ctx.session
    m = s.manifest
    cfg = m.get("config", {})
    facts: list[tuple[str, Any]] = [("output folder", str(s.root))]
    im = cfg.get("imaging", {})
    if s.has("volumes"):
        shape = s.volumes.shape
        facts.append(("volumes", f"{shape[0]} volumes of {shape[1]} × {shape[2]} × {shape[3]} "
                                 "voxels (z, y, x)"))
    if im:
        facts += [("volume rate (Hz)", im.get("volume_rate_hz", "")),
                  ("voxel size z, y, x (µm)", im.get("voxel_size_um", "")),
                  ("indicator", im.get("indicator", ""))]
    html = [facts_block(facts)]
    files = [{"group": g, "file": r.get("name", r.get("path", "")), "bytes": r.get("size", ""),
              "sha256": str(r.get("sha256", ""))[:12]}
             for g, recs in m.get("inputs", {}).items() for r in recs]
    if files:
        shown = files[:20]
        more = f" (first 20 of {len(files)})" if len(files) > 20 else ""
        html.append(table_block(shown, caption=f"input files{more}"))
    rows = [{"stage": n, "finished": r.get("finished", ""), "seconds": r.get("seconds", ""),
             "warnings": len(r.get("warnings", []))} for n, r in m.get("stages", {}).items()]
    html.append(table_block(rows, caption="stages: run time from manifest.json"))
    warns = s.store.warnings()
    if warns:
        items = "".join(f"<li><code>{esc(w['stage'])}</code>: {esc(w['message'])}</li>"
                        for w in warns)
        html.append(f'<h3>Warnings</h3><ul class="warn">{items}</ul>')
    else:
        html.append("<p>No stage recorded a warning.</p>")
    return "\n".join(html)


def _motion(ctx: _Ctx) -> str:
    s = ctx.session
    mo = s.motion
    shift_um = mo[[f"shift_{a}_um" for a in "zyx"]].to_numpy()
    flagged = mo["flagged"].to_numpy() if "flagged" in mo else None
    n_flag = int(flagged.sum()) if flagged is not None else 0
    quality = mo["quality"].to_numpy() if "quality" in mo else None
    out = [ctx.figure("motion", F.motion_figure(mo["t_s"].to_numpy(), shift_um,
                                                quality=quality, flagged=flagged),
                      "Rigid displacement of each volume relative to the reference, per axis "
                      "(µm; phase correlation with sub-voxel refinement), and the registration "
                      f"quality. Vertical lines: the {n_flag} flagged volumes.")]
    labels = s.labels if s.has("labels") else None
    for what, name in (("mean_image", "mean image"), ("corr_image", "local-correlation image")):
        if s.has(what):
            img = np.asarray(s.array(what).compute(), dtype=np.float32)
            out.append(ctx.figure(what, F.projection_figure(img, s.voxel_size_um,
                                                            labels_zyx=labels),
                                  f"Maximum projections of the registered {name} (top: over "
                                  "z; bottom: over y), each scaled to its own 1st-99.5th "
                                  "percentile; detected cells outlined in yellow."))
    return "\n".join(out)


def _traces(ctx: _Ctx) -> str:
    s = ctx.session
    dff = s.traces("dff")
    n = min(ctx.n_raster_cells, dff.shape[0])
    sd = np.asarray(dff.data.std(axis=1).compute())
    pick = np.sort(np.argsort(-np.nan_to_num(sd, nan=-1.0), kind="stable")[:n])
    rows = np.asarray(dff.data[pick].compute())
    order = np.argsort(np.nanargmax(np.nan_to_num(rows, nan=-np.inf), axis=1), kind="stable")
    out = [ctx.figure("raster", F.raster_figure(rows[order], dff.time_s),
                      f"dF/F of the {n} cells (of {dff.shape[0]}) with the largest dF/F "
                      "standard deviation, sorted by the time of their maximum; colour "
                      "limited to the 1st-99th percentile.")]
    if s.has("cells"):
        cells = s.cells
        plane = cells["plane"] if "plane" in cells else np.rint(cells["z_vox"]).astype(int)
        counts = plane.value_counts().sort_index()
        out.append(ctx.figure("plane_counts", F.plane_counts_figure(
            counts.index.to_numpy(), counts.to_numpy(), plane_um=s.voxel_size_um[0]),
            f"Detected cells per imaging plane ({len(cells)} cells in total)."))
    return "\n".join(out)


def _sync(ctx: _Ctx) -> str:
    info = ctx.session.clock
    iv_key = _pick(info, "trigger_intervals_s", "intervals_s", contains=("interval",))
    res_key = _pick(info, "residuals_ms", "residual_ms", contains=("residual",))
    counts = {}
    for name in ("matched", "dropped", "spurious"):
        key = _pick(info, name, f"n_{name}", f"{name}_pulses", contains=(name,))
        if key is not None:
            v = info[key]
            counts[name] = len(v) if isinstance(v, list) else int(v)
    res = np.asarray(info[res_key], float) if res_key else None
    facts: list[tuple[str, Any]] = [(k, info[k]) for k in ("offset_s", "drift_ppm") if k in info]
    if res is not None and res.size:
        facts.append(("residual RMS (ms)", float(np.sqrt(np.mean(res ** 2)))))
    facts += list(counts.items())
    fig = F.sync_figure(np.asarray(info[iv_key], float) if iv_key else None, res, counts)
    return facts_block(facts) + ctx.figure(
        "sync", fig, "Left: interval between successive trigger pulses in the rig log (ms). "
        "Middle: residual of each matched pulse after the linear clock fit t_rig = offset + "
        "(1 + drift) t_scope (ms). Right: pulses matched to volumes, volumes without a pulse "
        "(dropped) and pulses without a volume (spurious).")


def _behaviour(ctx: _Ctx) -> str:
    s = ctx.session
    beh = pd.read_parquet(s._need("behaviour"))
    targets = s.target_names()
    # positions and angles only: no clock conversion needed
    splits = pd.read_parquet(s._need("splits")) if s.has("splits") else pd.DataFrame()
    chosen = dict(zip(splits["trial"], splits["chosen"].astype(str), strict=False)) if {
        "trial", "chosen"} <= set(splits.columns) else {}
    groups = beh.groupby("trial") if "trial" in beh else [(0, beh)]
    trials = [(g["x_mm"].to_numpy(), g["y_mm"].to_numpy(), chosen.get(k, "")) for k, g in groups]
    sxy = splits[["x_mm", "y_mm"]].to_numpy() if {"x_mm", "y_mm"} <= set(splits.columns) else None
    txy = {t: (float(np.nanmedian(beh[f"{t}_x_mm"])), float(np.nanmedian(beh[f"{t}_y_mm"])))
           for t in targets}
    out = [ctx.figure("trajectories", F.trajectory_figure(trials, sxy, targets, txy),
                      f"Trajectories of the {len(trials)} trials in the virtual world, coloured "
                      "by the target chosen; crosses: split points; stars: median target "
                      "positions.")]
    if s.has("density"):
        import zarr

        arr = zarr.open_array(str(s.where("density")), mode="r")
        at: dict[str, Any] = dict(arr.attrs)
        split_x = float(np.nanmedian(sxy[:, 0])) if sxy is not None and len(sxy) else None
        out.append(ctx.figure("density", F.density_figure(
            np.asarray(arr[:]), x_edges_mm=at.get("x_edges_mm"), y_edges_mm=at.get("y_edges_mm"),
            split_x_mm=split_x), "Density of trajectory samples, folded so that the chosen "
            "target is on one side, with the median split position (dashed)."))
    ang_key = _pick(splits.columns, "subtended_rad", "angle_rad", contains=("subtended",))
    if ang_key is not None:
        crit: dict[str, Any] = s.critical_angle if s.has("critical_angle") else {}
        ck = _pick(crit, "critical_angle_rad", "critical_rad", contains=("critical",))
        lo = _pick(crit, "ci_low_rad", contains=("low",))
        hi = _pick(crit, "ci_high_rad", contains=("high",))
        ci = (float(crit[lo]), float(crit[hi])) if lo and hi else None
        out.append(ctx.figure("split_angle", F.split_angle_figure(
            splits[ang_key].to_numpy(), critical_rad=float(crit[ck]) if ck else None, ci_rad=ci),
            "Angle subtended at the animal by the two outermost targets at each split "
            "(degrees), with the critical-angle estimate and its 95% interval."))
    return "\n".join(out)


def _decoding(ctx: _Ctx) -> str:
    s = ctx.session
    dec = s.decoding
    out = []
    parts = dec.groupby("decoder") if "decoder" in dec else [("", dec)]
    name: Any
    for name, d in parts:
        attrs = dec.attrs.get(name, dec.attrs) if name else dec.attrs
        score = _pick(d.columns, "mean", "score", "score_mean", "r2", "accuracy")
        if score is None:
            continue
        folds = [c for c in d.columns if c.startswith((f"{score}_fold", "folds_"))]
        lo = _pick(d.columns, "null_low", "null_lo", "null_mean")
        hi = _pick(d.columns, "null_high", "null_hi", "null_p95")
        earliest = attrs.get("earliest_lag_s")
        fig = F.decode_lag_figure(
            d["lag_s"].to_numpy(), d[score].to_numpy(),
            folds=d[folds].to_numpy().T if folds else None,
            null_band=(d[lo].to_numpy(), d[hi].to_numpy()) if lo and hi else None,
            earliest_lag_s=float(earliest) if earliest is not None else None,
            metric=str(attrs.get("metric", score)))
        title = f"Decoder {name}: " if name else ""
        out.append(facts_block([(str(k), v) for k, v in attrs.items()
                                if not isinstance(v, list | dict)]))
        out.append(ctx.figure(f"decode_lag{name}", fig, f"{title}cross-validated score of the "
                              "turn decoder against the lag between activity and behaviour "
                              "(thin lines: folds; grey: null band from refits on shuffled "
                              "targets, mean to 95th percentile or as stored; dashed: earliest lag above the null band)."))
        if "confusion" in attrs:
            classes = attrs.get("classes") or [str(i) for i in range(len(attrs["confusion"]))]
            out.append(ctx.figure(f"confusion{name}", F.confusion_figure(
                np.asarray(attrs["confusion"]), classes), "Confusion matrix of the turn "
                "direction at the best lag, summed over test folds."))
    if s.has("decode_weights") and s.has("cells"):
        w = np.asarray(s.array("decode_weights").compute(), float)
        cells = s.cells
        if w.ndim == 2 and w.shape[0] == len(cells):
            w = w[:, int(np.argmax(np.abs(w).sum(axis=0)))]
        if w.shape == (len(cells),):
            out.append(ctx.figure("weights", F.cell_map_figure(
                cells["x_um"].to_numpy(), cells["y_um"].to_numpy(), cells["z_um"].to_numpy(),
                w, label="decoder weight", symmetric=True), "Decoder weight of each cell at "
                "its position (top view and side view)."))
    return "\n".join(out) or problem_block("decoding", "decode.json holds no score column")


def _tuning(ctx: _Ctx) -> str:
    from pipeline.analysis.stats import binomial_interval

    s = ctx.session
    tun = s.tuning
    cell = _pick(tun.columns, "cell", "cell_id", "id")
    pref = _pick(tun.columns, "preferred_rad", "preferred_bearing_rad", contains=("preferred",))
    if cell is None or pref is None or "tuned" not in tun:
        return problem_block("tuning", f"tuning.parquet lacks cell/preferred/tuned columns "
                             f"(has {', '.join(map(str, tun.columns))})")
    if "x_um" not in tun and s.has("cells"):
        tun = tun.merge(s.cells[["id", "x_um", "y_um", "z_um"]], left_on=cell, right_on="id")
    keys = [k for k in ("target", "epoch") if k in tun]
    groups = list(tun.groupby(keys)) if keys else [("all", tun)]
    labels, frac, los, his, out = [], [], [], [], []
    for key, g in groups:
        label = " / ".join(map(str, key if isinstance(key, tuple) else (key,)))
        k, n = int(g["tuned"].sum()), len(g)
        low, high = binomial_interval(k, n)
        labels.append(label)
        frac.append(k / n if n else np.nan)
        los.append(float(low))
        his.append(float(high))
    fig = F.fraction_tuned_figure(labels, np.asarray(frac), np.asarray(los), np.asarray(his))
    out.append(ctx.figure("fraction_tuned", fig,
                          "Fraction of cells tuned to each target's bearing before and after "
                          "the split (Benjamini-Hochberg q below the configured level), with "
                          "Wilson 95% intervals."))
    sel = _pick(tun.columns, "selectivity")
    panels = []
    for key, g in groups:
        t = g[g["tuned"].astype(bool)]
        if t.empty or "x_um" not in t:
            continue
        label = " / ".join(map(str, key if isinstance(key, tuple) else (key,)))
        panels.append((f"{label} ({len(t)} tuned)", t["x_um"].to_numpy(), t["y_um"].to_numpy(),
                       t[pref].to_numpy(), t[sel].to_numpy() if sel else np.ones(len(t))))
    if panels:
        out.append(ctx.figure("bearing_map", F.bearing_map_figure(panels),
                              "Tuned cells at their positions (top view), one panel per target "
                              "and epoch, coloured by preferred egocentric bearing (cyclic "
                              "colour map; 0 = ahead, positive = left) and sized by "
                              "selectivity."))
    curves_path = s.root / "session.zarr" / "tuning" / "curves"
    if curves_path.exists() and s.has("cells"):
        import zarr

        arr = zarr.open_array(str(curves_path), mode="r")
        centres = np.asarray(arr.attrs.get("bin_centres_rad", np.linspace(
            -np.pi, np.pi, arr.shape[-1], endpoint=False)))
        order = tun.sort_values([c for c in ("q", sel) if c], ascending=[True, False][
            : len([c for c in ("q", sel) if c])])
        top = list(dict.fromkeys(order[cell].tolist()))[:8]
        ids = s.cells["id"].to_numpy()
        rows = [int(np.flatnonzero(ids == c)[0]) for c in top if np.any(ids == c)]
        curves = [np.asarray(arr[r]).reshape(-1, arr.shape[-1]) for r in rows]
        out.append(ctx.figure("tuning_curves", F.tuning_curves_figure(
            centres, curves, [f"cell {c}" for c in top[: len(rows)]]),
            "Tuning curves (mean activity per egocentric-bearing bin) of the cells with the "
            "lowest q values; one line per target and epoch."))
    return "\n".join(out)


#: (anchor, title, stages it needs, builder)
SECTIONS: tuple[tuple[str, str, tuple[str, ...], Callable[[_Ctx], str]], ...] = (
    ("summary", "Session summary", (), _summary),
    ("motion", "Motion", ("motion",), _motion),
    ("traces", "Cells and traces", ("traces",), _traces),
    ("sync", "Clock alignment", ("align",), _sync),
    ("behaviour", "Behaviour", ("behaviour",), _behaviour),
    ("decoding", "Decoding turns", ("decode",), _decoding),
    ("tuning", "Bearing tuning", ("tuning",), _tuning),
)


def _section(ctx: _Ctx, key: str, title: str, needs: tuple[str, ...],
             fn: Callable[[_Ctx], str]) -> Section:
    missing = [n for n in needs if ctx.session.store.record(n) is None]
    if missing:
        return Section(key, title, not_run_block(missing[0]))
    try:
        return Section(key, title, fn(ctx))
    except ForkmapError as exc:
        return Section(key, title, problem_block(title, str(exc)))
    except Exception as exc:  # a broken section must not cost the whole page
        log.warning("report section %s failed: %s: %s", key, type(exc).__name__, exc,
                    exc_info=True)
        return Section(key, title, problem_block(title, f"{type(exc).__name__}: {exc}"))


def build_report(session: Session, out_dir: Path, *, n_raster_cells: int = 200,
                 title: str = "") -> Path:
    """Write ``out_dir/index.html`` and its figures from whatever the session holds."""
    out_dir.mkdir(parents=True, exist_ok=True)
    ctx = _Ctx(session, out_dir, n_raster_cells=n_raster_cells)
    sections = [_section(ctx, *spec) for spec in SECTIONS]
    name = title or session.manifest.get("config", {}).get("session", {}).get("name", "session")
    import datetime as _dt

    stamp = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    page = render_page(f"forkmap report: {name}", f"Written {stamp} from {session.root}",
                       sections)
    path = out_dir / "index.html"
    path.write_text(page, encoding="utf-8")
    return path


@stage("report", sections=("report",), enabled=lambda s: s.report.enabled, after_all=True)
def run_report(settings: Any, store: Any, compute: Any) -> None:
    """Stage function: write ``report/index.html`` (staged, moved into place on success)."""
    out = store.write_file("report")
    page = build_report(Session(store), out, n_raster_cells=settings.report.n_raster_cells,
                        title=settings.session.name)
    if settings.report.screenshot:
        run_chromium(page, f"--screenshot={out / 'screenshot.png'}", "--window-size=1100,4000")
