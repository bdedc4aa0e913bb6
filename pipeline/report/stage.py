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
                                  "percentile (µm); detected cells outlined in yellow on the top view."))
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


def _pulses(s: Session) -> tuple[np.ndarray, np.ndarray]:
    """Trigger pulse times (rig clock) and each one's residual against the clock model (ms).

    The pulses are found again in the behaviour log with the configured ``sync`` options;
    a pulse's residual is its time minus the model's rig time of the nearest volume start.
    """
    from pipeline.align import rising_edges

    sync = s.manifest.get("config", {}).get("sync", {})
    beh = pd.read_parquet(s._need("behaviour"))
    col = str(sync.get("trigger_column", "trigger"))
    if col not in beh or "t_rig_s" not in beh:
        return np.empty(0), np.empty(0)
    pulses = rising_edges(beh[col].to_numpy(np.float64), beh["t_rig_s"].to_numpy(np.float64),
                          min_interval_s=float(sync.get("debounce_s", 0.002)),
                          edge_time=sync.get("edge_time", "midpoint"))
    starts_rig = s.clock_model.scope_to_rig(s.time_s)
    near = np.clip(np.searchsorted(starts_rig, pulses), 1, max(starts_rig.size - 1, 1))
    left, right = starts_rig[near - 1], starts_rig[np.minimum(near, starts_rig.size - 1)]
    nearest = np.where(np.abs(pulses - left) <= np.abs(pulses - right), left, right)
    return pulses, (pulses - nearest) * 1e3


def _sync(ctx: _Ctx) -> str:
    s = ctx.session
    clock = s.clock
    pulses, res_ms = _pulses(s)
    dropped = list(clock.get("dropped_volume_indices", []))
    spurious = list(clock.get("spurious_pulse_indices", []))
    counts = {"matched": int(clock.get("matched", 0)), "dropped": len(dropped),
              "spurious": len(spurious)}
    segs = clock.get("segments", [])
    facts: list[tuple[str, Any]] = [
        ("clock model", "t_rig = offset + (1 + drift_ppm × 1e-6) × t_scope"),
        ("offset (s)", float(clock["offset_s"])), ("drift (ppm)", float(clock["drift_ppm"])),
        ("segments (between clock jumps)", len(segs)),
        ("residual RMS / max (ms)", f"{clock.get('residual_rms_ms', float('nan')):.3g} / "
                                    f"{clock.get('residual_max_ms', float('nan')):.3g}"),
        ("pulses matched / volumes", f"{counts['matched']} / {clock.get('n_events', '')}"),
        ("volumes without a pulse (index)", ", ".join(map(str, dropped)) or "none"),
        ("pulses without a volume (index)", ", ".join(map(str, spurious)) or "none")]
    fig = F.sync_figure(np.diff(pulses) if pulses.size > 1 else None, res_ms, counts)
    return facts_block(facts) + ctx.figure(
        "sync", fig, "Left: interval between successive trigger pulses in the rig log (ms; "
        "a dropped pulse shows as a doubled interval). Middle: each pulse's time minus the "
        "clock model's rig time of the nearest volume start (ms). Right: pulses matched to "
        "volumes, volumes without a pulse (dropped) and pulses without a volume (spurious).")


def _behaviour(ctx: _Ctx) -> str:
    s = ctx.session
    beh = pd.read_parquet(s._need("behaviour"))
    targets = s.target_names()
    # positions and angles only: no clock conversion needed
    splits = pd.read_parquet(s._need("splits")) if s.has("splits") else pd.DataFrame()
    final = (splits.sort_values("level").groupby("trial").last() if {
        "trial", "level", "chosen"} <= set(splits.columns) else pd.DataFrame())
    chosen: dict[Any, str] = ({k: str(v) for k, v in final["chosen"].items()} if len(final)
                              else {})
    in_trial = beh[beh["trial"] >= 0] if "trial" in beh else beh
    groups: Any = in_trial.groupby("trial") if "trial" in in_trial else [(0, in_trial)]
    trials = [(g["x_mm"].to_numpy(), g["y_mm"].to_numpy(), chosen.get(k, ""))
              for k, g in groups]
    sxy = splits[["x_mm", "y_mm"]].to_numpy() if {"x_mm", "y_mm"} <= set(splits.columns) else None
    txy = {t: (float(np.nanmedian(beh[f"{t}_x_mm"])), float(np.nanmedian(beh[f"{t}_y_mm"])))
           for t in targets if np.isfinite(beh[f"{t}_x_mm"]).any()}
    out = [ctx.figure("trajectories", F.trajectory_figure(trials, sxy, targets, txy),
                      f"Trajectories of the {len(trials)} trials in the virtual world (mm), "
                      "coloured by the target finally chosen (grey: no final choice); crosses: "
                      f"the {len(splits)} split points; stars: median target positions.")]
    if s.has("density") and s.has("density_x_edges_mm"):
        dens, xe, ye = s.density
        bin_mm = float(np.diff(xe)[0]) if xe.size > 1 else float("nan")
        out.append(ctx.figure("density", F.density_figure(
            dens, x_edges_mm=xe, y_edges_mm=ye), "Density of trajectory samples (fraction "
            f"of samples per {bin_mm:g} mm bin), each trial rotated so that its targets lie ahead (+y) "
            "and folded left onto right (x -> |x|)."))
    if "subtended_mid_rad" in splits or "subtended_rad" in splits:
        col = "subtended_mid_rad" if "subtended_mid_rad" in splits else "subtended_rad"
        crit = s.critical_angle if s.record("behaviour").get("info", {}).get(
            "critical_angle") else {}
        est = crit.get("estimate_rad")
        lo, hi = crit.get("ci_low_rad"), crit.get("ci_high_rad")
        ci = (float(lo), float(hi)) if lo is not None and hi is not None else None
        n_crit = crit.get("n", len(splits))
        out.append(facts_block([
            ("critical angle (°)", np.degrees(float(est)) if est is not None else "n/a"),
            ("95% bootstrap interval (°)", f"{np.degrees(ci[0]):.1f} - {np.degrees(ci[1]):.1f}"
             if ci else "n/a"), ("splits used", n_crit)]))
        out.append(ctx.figure("split_angle", F.split_angle_figure(
            splits[col].to_numpy(), critical_rad=float(est) if est is not None else None,
            ci_rad=ci), "Angle subtended at the animal by the two outermost remaining targets "
            "at each split (degrees; midway between the samples either side of the split), "
            "with the critical-angle estimate and its 95% bootstrap interval."))
    if len(splits):
        show = [c for c in ("trial", "level", "split_rig_s", "subtended_mid_rad", "dropped",
                            "chosen", "n_remaining") if c in splits]
        rows: list[dict[str, Any]] = [{str(k): v for k, v in r.items()}
                                      for r in splits[show].to_dict("records")]
        for r in rows:
            if "subtended_mid_rad" in r:
                r["subtended (°)"] = float(np.degrees(r.pop("subtended_mid_rad")))
        out.append(table_block(rows, caption="splits: times on the rig clock (s), angle in "
                                             "degrees"))
    return "\n".join(out)


_CURVES = (("turn_r2", "continuous turn command", "cross-validated R²"),
           ("bout_auc", "bout direction (left/right)", "ROC AUC"),
           ("bout_angle_r2", "bout turn angle", "cross-validated R²"))


def _too_few_nulls(n_null: int, key: str) -> str:
    """A caption warning when the null is too small for any lag to reach p < 0.05."""
    if not n_null or 1.0 / (n_null + 1) < 0.05:
        return ""
    option = "decode.n_null" if key == "turn_r2" else "decode.n_null_bouts"
    return (f" With {n_null} refits the smallest possible p is 1/{n_null + 1} = "
            f"{1.0 / (n_null + 1):.2f} (Phipson & Smyth 2010), so no lag can be called "
            f"decodable: raise {option} to at least 20.")


def _decoding(ctx: _Ctx) -> str:
    s = ctx.session
    doc = s.decoding_summary
    out = []
    facts: list[tuple[str, Any]] = [
        (k, doc[k]) for k in ("feature", "null_kind", "n_samples", "n_bouts", "n_left",
                              "window_s", "weights_lag_s", "weights_alpha") if k in doc]
    out.append(facts_block(facts))
    for key, what, metric in _CURVES:
        c = doc.get(key)
        if not isinstance(c, dict) or "lags_s" not in c:
            continue
        lag = np.asarray(c["lags_s"], float)
        mean = np.asarray(c["mean"], float)
        folds = np.asarray(c["folds"], float) if c.get("folds") else None
        band = None
        if c.get("null_mean") is not None and c.get("null_p95") is not None:
            band = (np.asarray(c["null_mean"], float), np.asarray(c["null_p95"], float))
        earliest = c.get("earliest_lag_s")
        fig = F.decode_lag_figure(lag, mean, folds=folds, null_band=band,
                                  earliest_lag_s=float(earliest) if earliest is not None
                                  else None, metric=metric)
        best = c.get("best_lag_s")
        peak = float(np.nanmax(mean)) if np.isfinite(mean).any() else float("nan")
        out.append(ctx.figure(f"decode_{key}", fig, f"Decoding the {what}: {metric} against "
                              "the lag of activity relative to behaviour (s; negative = activity "
                              f"before the turn). Thick: mean over {len(folds) if folds is not None else 0} "
                              "test folds; thin: each fold; grey band: null mean to 95th "
                              f"percentile ({c.get('n_null', 0)} refits on shuffled targets). "
                              f"Best lag {best if best is not None else 'n/a'} s, peak {peak:.3g}. "
                              "Dashed: earliest decodable lag, the start of the unbroken run of "
                              "lags up to the best one that beat the null's 95th percentile "
                              "(p < 0.05) with their 95% interval across folds above chance."
                              + _too_few_nulls(c.get("n_null", 0), key)))
    conf = doc.get("bout_confusion")
    if isinstance(conf, dict) and conf.get("confusion"):
        out.append(ctx.figure("confusion", F.confusion_figure(
            np.asarray(conf["confusion"]), conf.get("classes", ["left", "right"])),
            f"Confusion matrix of the bout-direction decoder at its best lag "
            f"({conf.get('lag_s', 0):+.1f} s), {conf.get('n_bouts', '')} test bouts summed "
            "over whole-trial folds (rows: true direction; columns: predicted)."))
    # the activation pattern is the map to read (Haufe et al. 2014); older stores have weights
    name = "decode_pattern" if s.has("decode_pattern") else "decode_weights"
    if s.has(name) and s.has("cells"):
        w = np.asarray(s.array(name).compute(), float)
        cells = s.cells
        if w.shape == (len(cells),):
            what = ("Activation pattern of the continuous turn decoder (Haufe et al. 2014): each "
                    "cell's covariance with the decoded turn per unit of decoded turn"
                    if name == "decode_pattern" else
                    "Weight of each cell in the continuous turn decoder")
            out.append(ctx.figure("weights", F.cell_map_figure(
                cells["x_um"].to_numpy(), cells["y_um"].to_numpy(), cells["z_um"].to_numpy(),
                w, label="pattern (ΔF/F per turn unit)" if name == "decode_pattern"
                else "decoder weight (turn units per ΔF/F)", symmetric=True),
                f"{what}, refitted on all samples at lag {doc.get('weights_lag_s', 'n/a')} s, "
                "at the cell's position (top: view from above; bottom: side view; µm); colour "
                "scale symmetric about zero, positive: the cell is more active before leftward "
                "turns. Raw weights of correlated cells trade off against each other and are "
                "not a map; they are in decode_weights.parquet."))
    return "\n".join(out)


_NULL_NAMES = {"aligned": "each trial's bearing terms swapped with another trial's showing "
                          "the same targets, aligned at the first split",
               "trial": "whole trials re-concatenated in a random order (anti-conservative "
                        "for sparse activity when trials differ in length)",
               "circular": "circular shifts of the bearing terms (drift can fool it)"}


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
    notes = ""
    if "ambiguous" in tun and "epoch" in tun:
        a = tun[tun["ambiguous"].astype(bool)].drop_duplicates([cell, "epoch"])
        counts = a.groupby("epoch").size()
        if len(counts):
            notes = (" Not shown: cells tuned to bearing whose target could not be named (the "
                     "target explaining most over the session and within trials differ): "
                     + ", ".join(f"{n} {e}" for e, n in counts.items()) + ".")
    info = s.record("tuning").get("info", {})
    between = info.get("between_epoch")
    null = _NULL_NAMES.get(info.get("null", ""), "")
    if null:
        notes += (f" Null: {null}, {info.get('n_permutations', '?')} permutations; it assumes "
                  "trials are exchangeable, which slow drift across the session or learning "
                  "can break.")
    shown = info.get("trials_per_target") or {}
    if shown:
        notes += (" Trials (with a split) showing each target: "
                  + ", ".join(f"{k} {v}" for k, v in shown.items()) + ".")
        few = [k for k, v in shown.items() if v < info.get("min_epoch_trials", 0)]
        if few:
            notes += (f" {', '.join(few)}: fewer than tuning.min_epoch_trials = "
                      f"{info['min_epoch_trials']} trials, tested with little power, so few "
                      "of its cells can be flagged.")
    if between == "merged into post":
        why = ("too few trials had two splits to test the stretch between them on its own"
               if info.get("between_setting") == "auto" else
               "tuning.between_epoch = 'merged'; 'separate' tests the few seconds between a "
               "three-target trial's splits as an epoch of their own")
        notes += (f" Epochs are cut at each trial's first split ({why}), so the stretch "
                  "between the splits is part of 'post'.")
    out.append(ctx.figure("fraction_tuned", fig,
                          "Fraction of cells tuned to each target's bearing before and after "
                          "the split (Benjamini-Hochberg q below the configured level), with "
                          "Wilson 95% intervals." + notes))
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
    if s.has("tuning_curves"):
        import zarr

        arr = zarr.open_array(str(s.where("tuning_curves")), mode="r")   # (target, epoch, bin, cell)
        centres = np.asarray(dict(arr.attrs)["bin_centres_rad"], float)
        attrs: dict[str, Any] = dict(arr.attrs)
        t_names = [str(t) for t in attrs.get("targets", [])]
        e_names = [str(e) for e in attrs.get("epochs", [])]
        best = tun[tun["tuned"].astype(bool)].sort_values(["q", "unique_r2"],
                                                          ascending=[True, False])
        best = best.drop_duplicates(cell).head(8)
        ids = s.cells["id"].to_numpy()
        curves, names = [], []
        for r in best.to_dict("records"):
            col = np.flatnonzero(ids == r[cell])
            if not col.size or r["target"] not in t_names:
                continue
            k = t_names.index(r["target"])
            curves.append(np.asarray(arr[k, :, :, int(col[0])], float))   # (epoch, bin)
            names.append(f"cell {r[cell]}: {r['target']}, tuned {r['epoch']}")
        if curves:
            out.append(ctx.figure("tuning_curves", F.tuning_curves_figure(
                centres, curves, names, series=e_names),
                "Tuning curves of the tuned cells with the lowest q values: mean ΔF/F per "
                "egocentric-bearing bin of the named target (degrees; 0 = ahead, positive = "
                "left), one line per epoch relative to the trial's first split."))
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
