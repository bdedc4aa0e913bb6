"""The simulated animal in its virtual arena, on the rig's clock.

Each trial the animal starts at the origin heading forward (+y) with two or three targets ahead.
It heads for the average direction of the remaining targets until the angle subtended by the two
outermost ones exceeds the critical angle; then it drops one (three targets: split 0) or picks
one (split 1 with three targets, split 0 with two). Heading changes only through discrete swim
bouts whose turn corrects part of the error to the current goal direction plus noise.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from demo_volume._params import Scenario

__all__ = ["BehaviourTruth", "simulate_behaviour", "add_triggers", "rig_to_scope", "wrap"]

N_TARGET_SLOTS = 3


def wrap(angle_rad: np.ndarray | float) -> np.ndarray:
    """Wrap angles to (-pi, pi]."""
    return np.pi - np.mod(np.pi - np.asarray(angle_rad, dtype=float), 2.0 * np.pi)


def rig_to_scope(t_rig_s: np.ndarray | float, sc: Scenario) -> np.ndarray:
    """Invert the planted clock model ``t_rig = offset_s + (1 + drift_ppm*1e-6) * t_scope``."""
    return (np.asarray(t_rig_s, dtype=float) - sc.clock.offset_s) / (
        1.0 + sc.clock.drift_ppm * 1e-6)


def scope_to_rig(t_scope_s: np.ndarray | float, sc: Scenario) -> np.ndarray:
    """The planted clock model ``t_rig = offset_s + (1 + drift_ppm*1e-6) * t_scope``."""
    return sc.clock.offset_s + (1.0 + sc.clock.drift_ppm * 1e-6) * np.asarray(t_scope_s, float)


@dataclass
class BehaviourTruth:
    """What the behaviour simulation planted."""

    log: pd.DataFrame          # the rig log, columns as written to rig_log.csv (no trigger yet)
    heading_unwrapped_rad: np.ndarray
    bouts: pd.DataFrame
    splits: pd.DataFrame
    trials: pd.DataFrame       # trial, start_rig_s, end_rig_s, n_targets, chosen_target, ...


def _spread(tx: np.ndarray, ty: np.ndarray, x: np.ndarray, y: np.ndarray
            ) -> tuple[np.ndarray, np.ndarray]:
    """Angle subtended by the outermost targets, and the outer pair's column indices.

    ``tx, ty`` are (n_samples, n_active); returns spread (n_samples,) and pairs (n_samples, 2).
    """
    d = np.arctan2(ty - y[:, None], tx - x[:, None])
    n_act = d.shape[1]
    pairs = [(a, b) for a in range(n_act) for b in range(a + 1, n_act)]
    diffs = np.stack([np.abs(wrap(d[:, b] - d[:, a])) for a, b in pairs], axis=1)
    best = np.argmax(diffs, axis=1)
    return diffs[np.arange(len(best)), best], np.asarray(pairs)[best]


class _Trial:
    """State of one trial while it is being simulated."""

    def __init__(self, index: int, i0: int, ids: list[int], moving: int) -> None:
        self.index = index
        self.i0 = i0
        self.ids = ids
        self.active = list(ids)
        self.moving = moving
        self.chosen = -1
        self.splits: list[dict] = []


def _place_targets(sc: Scenario, rng: np.random.Generator, t: np.ndarray, i0: int, i1: int,
                   tpos: np.ndarray) -> tuple[list[int], int]:
    """Draw this trial's targets and fill their paths into ``tpos[:, :, i0:i1]``."""
    b = sc.behaviour
    n_t = 3 if rng.random() < b.three_target_fraction else 2
    centre = np.pi / 2 + np.deg2rad(rng.normal(0.0, b.start_heading_sd_deg))
    sep = np.deg2rad(rng.uniform(*b.separation_deg))
    dirs = [centre - sep / 2, centre + sep / 2]
    if n_t == 3:
        dirs.append(centre + rng.uniform(-0.3, 0.3) * sep)
    dist = rng.uniform(*b.target_distance_mm, size=n_t)
    ids = [int(v) for v in rng.permutation(n_t)]
    moving = int(rng.integers(n_t)) if rng.random() < b.moving_target_fraction else -1
    tt = t[i0:i1] - t[i0]
    for slot, target in enumerate(ids):
        px = np.full(tt.shape, dist[slot] * np.cos(dirs[slot]))
        py = np.full(tt.shape, dist[slot] * np.sin(dirs[slot]))
        if target == moving:
            per = rng.uniform(*b.moving_period_s, size=2)
            ph = rng.uniform(0.0, 2 * np.pi, size=2)
            amp = b.moving_amplitude_mm
            px += amp * (np.sin(2 * np.pi * tt / per[0] + ph[0]) - np.sin(ph[0]))
            py += amp * (np.sin(2 * np.pi * tt / per[1] + ph[1]) - np.sin(ph[1]))
        tpos[target, 0, i0:i1] = px
        tpos[target, 1, i0:i1] = py
    return ids, moving


def _scan_splits(tr: _Trial, s0: int, s1: int, arrays: dict[str, np.ndarray],
                 sc: Scenario, rng: np.random.Generator) -> None:
    """Apply the split rule to samples [s0, s1) (positions there are already filled)."""
    crit = np.deg2rad(sc.behaviour.critical_angle_deg)
    x, y, h, t, tpos = arrays["x"], arrays["y"], arrays["h"], arrays["t"], arrays["tpos"]
    s = s0
    while tr.chosen < 0 and s < s1:
        act = tr.active
        spread, pairs = _spread(tpos[act, 0, s:s1].T, tpos[act, 1, s:s1].T, x[s:s1], y[s:s1])
        hits = np.flatnonzero(spread > crit)
        if hits.size == 0:
            return
        k = s + int(hits[0])
        a, bb = (act[p] for p in pairs[hits[0]])
        row = {"trial": tr.index, "split_index": len(tr.splits), "sample": k,
               "t_split_rig_s": t[k], "x_mm": x[k], "y_mm": y[k],
               "subtended_deg": float(np.rad2deg(spread[hits[0]])),
               "n_targets": len(tr.ids), "has_moving_target": tr.moving >= 0}
        if len(act) == 3:
            dropped = a if rng.random() < 0.5 else bb
            tr.active = [v for v in act if v != dropped]
            row["dropped_target"] = dropped
        else:
            bear = [abs(float(wrap(np.arctan2(tpos[v, 1, k] - y[k], tpos[v, 0, k] - x[k])
                                   - h[k]))) for v in (a, bb)]
            p_a = 1.0 / (1.0 + np.exp(-sc.behaviour.choice_bias * (bear[1] - bear[0])))
            tr.chosen = a if rng.random() < p_a else bb
            row["dropped_target"] = -1
        tr.splits.append(row)
        s = k + 1


def _arrival(tr: _Trial, s0: int, s1: int, arrays: dict[str, np.ndarray],
             radius_mm: float) -> int | None:
    """First sample in [s0, s1) closer than ``radius_mm`` to a target still in play."""
    if s1 <= s0:
        return None
    ids = [tr.chosen] if tr.chosen >= 0 else tr.active
    tpos = arrays["tpos"][ids, :, s0:s1]
    dist = np.hypot(tpos[:, 0] - arrays["x"][s0:s1], tpos[:, 1] - arrays["y"][s0:s1])
    near = np.flatnonzero(np.any(dist < radius_mm, axis=0))
    return s0 + int(near[0]) if near.size else None


def _goal_direction(tr: _Trial, i: int, arrays: dict[str, np.ndarray]) -> float:
    x, y, tpos = arrays["x"][i], arrays["y"][i], arrays["tpos"]
    if tr.chosen >= 0:
        return float(np.arctan2(tpos[tr.chosen, 1, i] - y, tpos[tr.chosen, 0, i] - x))
    d = np.arctan2(tpos[tr.active, 1, i] - y, tpos[tr.active, 0, i] - x)
    return float(np.arctan2(np.sin(d).sum(), np.cos(d).sum()))


def _bout(tr: _Trial, o: int, cap: int, arrays: dict[str, np.ndarray], sc: Scenario,
          rng: np.random.Generator) -> tuple[int, dict]:
    """Draw and integrate one bout starting at sample ``o``; return its end sample.

    The bout covers samples [o, end); the state after it is at sample ``end <= cap``.
    """
    b = sc.behaviour
    t, x, y, h = arrays["t"], arrays["x"], arrays["y"], arrays["h"]
    err = float(wrap(_goal_direction(tr, o, arrays) - h[o]))
    max_turn = np.deg2rad(b.max_turn_deg)
    turn_rad = float(np.clip(b.turn_gain * err + np.deg2rad(rng.normal(0.0, b.turn_noise_deg)),
                             -max_turn, max_turn))
    vigor = float(np.exp(rng.normal(0.0, b.vigor_log_sd)))
    dur_s = rng.uniform(*b.bout_duration_s)
    end = min(max(int(np.searchsorted(t, t[o] + dur_s)), o + 2), cap)
    m = end - o
    w = np.sin(np.pi * (np.arange(m) + 0.5) / m) ** 2
    dt = np.diff(t[o:end + 1])
    norm = float(np.sum(w * dt))
    turn = turn_rad * w / norm
    speed = b.step_mm * vigor * w / norm
    h_after = h[o] + np.cumsum(turn * dt)
    h_before = np.concatenate([[h[o]], h_after[:-1]])
    x[o + 1:end + 1] = x[o] + np.cumsum(speed * dt * np.cos(h_before))
    y[o + 1:end + 1] = y[o] + np.cumsum(speed * dt * np.sin(h_before))
    h[o + 1:end + 1] = h_after
    arrays["turn"][o:end] = turn
    arrays["bout"][o:end] = 1
    arrays["vigor"][o:end] = vigor
    row = {"onset_rig_s": t[o], "offset_rig_s": t[end - 1], "turn_rad": turn_rad,
           "vigor": vigor, "trial": tr.index}
    return end, row


def _hold(arrays: dict[str, np.ndarray], j: int, k: int) -> None:
    """Keep the state of sample ``j`` for samples (j, k)."""
    for name in ("x", "y", "h"):
        arrays[name][j + 1:k] = arrays[name][j]


def _rig_times(sc: Scenario, rng: np.random.Generator) -> np.ndarray:
    """Rig sample times: intervals of 1/rig_rate_hz with jitter, accumulated (rig clock)."""
    b = sc.behaviour
    t_img_end_s = sc.imaging.n_volumes / sc.imaging.volume_rate_hz
    start = float(scope_to_rig(0.0, sc)) - b.lead_in_s
    stop = float(scope_to_rig(t_img_end_s, sc)) + b.lead_out_s
    n = int(np.ceil((stop - start) * b.rig_rate_hz))
    period_s = 1.0 / b.rig_rate_hz
    steps = np.clip(period_s + rng.normal(0.0, b.jitter_s, size=n - 1), 0.5 * period_s,
                    1.5 * period_s)
    return start + np.concatenate([[0.0], np.cumsum(steps)])


def simulate_behaviour(sc: Scenario, rng: np.random.Generator) -> BehaviourTruth:
    """Simulate trials, bouts and splits on the rig clock.

    Parameters
    ----------
    sc : Scenario
    rng : numpy.random.Generator

    Returns
    -------
    BehaviourTruth
        The rig log (without triggers), bouts, splits and trial table.
    """
    b = sc.behaviour
    t = _rig_times(sc, rng)
    n = t.size
    arrays: dict[str, np.ndarray] = {
        "t": t, "x": np.zeros(n), "y": np.zeros(n), "h": np.full(n, np.pi / 2),
        "turn": np.zeros(n), "bout": np.zeros(n, np.int8), "vigor": np.zeros(n),
        "trial": np.full(n, -1, np.int32),
        "tpos": np.full((N_TARGET_SLOTS, 2, n), np.nan),
    }
    bouts: list[dict] = []
    splits: list[dict] = []
    trials: list[dict] = []
    i = int(np.searchsorted(t, t[0] + b.first_trial_delay_s))
    while i < n - 2:
        limit = min(int(np.searchsorted(t, t[i] + b.timeout_s)), n)
        ids, moving = _place_targets(sc, rng, t, i, limit, arrays["tpos"])
        tr = _Trial(len(trials), i, ids, moving)
        arrays["x"][i] = arrays["y"][i] = 0.0
        arrays["h"][i] = np.pi / 2 + np.deg2rad(rng.normal(0.0, b.start_heading_sd_deg))
        j = i
        next_onset_s = t[i] + rng.uniform(*b.first_bout_delay_s)
        end = limit
        while True:
            o = min(int(np.searchsorted(t, next_onset_s)), limit)
            _hold(arrays, j, o + 1 if o < limit else limit)
            hit = _arrival(tr, j, o, arrays, b.arrival_mm)
            _scan_splits(tr, j, o if hit is None else hit, arrays, sc, rng)
            if hit is not None:
                end = hit + 1
                break
            if o >= limit - 2:
                break
            stop, row = _bout(tr, o, limit - 1, arrays, sc, rng)
            bouts.append(row)
            hit = _arrival(tr, o, stop + 1, arrays, b.arrival_mm)
            _scan_splits(tr, o, stop if hit is None else hit, arrays, sc, rng)
            j = stop
            if hit is not None:
                end = stop + 1
                break
            gap = b.bout_min_interval_s + rng.exponential(
                max(1.0 / b.bout_rate_hz - b.bout_min_interval_s, 1e-3))
            next_onset_s = max(t[o] + gap, t[stop] + 0.1)
        arrays["trial"][i:end] = tr.index
        arrays["tpos"][:, :, end:limit] = np.nan
        for row in tr.splits:
            row["chosen_target"] = tr.chosen
        splits.extend(tr.splits)
        trials.append({"trial": tr.index, "start_rig_s": t[i], "end_rig_s": t[end - 1],
                       "n_targets": len(ids), "moving_target": moving,
                       "chosen_target": tr.chosen, "arrived": end < limit})
        i_next = min(int(np.searchsorted(t, t[end - 1] + b.iti_s)), n)
        _hold(arrays, end - 1, i_next)
        i = i_next
    return _tables(sc, arrays, bouts, splits, trials)


def _tables(sc: Scenario, arrays: dict[str, np.ndarray], bouts: list[dict],
            splits: list[dict], trials: list[dict]) -> BehaviourTruth:
    t, tpos = arrays["t"], arrays["tpos"]
    log = pd.DataFrame({
        "time_s": t, "x_mm": arrays["x"], "y_mm": arrays["y"],
        "heading_rad": wrap(arrays["h"]), "turn": arrays["turn"], "bout": arrays["bout"],
        "vigor": arrays["vigor"], "trial": arrays["trial"],
    })
    for k in range(N_TARGET_SLOTS):
        log[f"t{k}_x_mm"] = tpos[k, 0]
        log[f"t{k}_y_mm"] = tpos[k, 1]
    bout_df = pd.DataFrame(bouts, columns=["onset_rig_s", "offset_rig_s", "turn_rad", "vigor",
                                           "trial"])
    bout_df.insert(2, "onset_scope_s", rig_to_scope(bout_df["onset_rig_s"].to_numpy(), sc))
    cols = ["trial", "split_index", "t_split_scope_s", "t_split_rig_s", "x_mm", "y_mm",
            "subtended_deg", "chosen_target", "n_targets", "has_moving_target",
            "dropped_target", "sample"]
    split_df = pd.DataFrame(splits, columns=[c for c in cols if c != "t_split_scope_s"])
    split_df.insert(2, "t_split_scope_s",
                    rig_to_scope(split_df["t_split_rig_s"].to_numpy(float), sc))
    split_df = split_df[cols].astype({"trial": "int64", "split_index": "int64",
                                      "chosen_target": "int64", "n_targets": "int64",
                                      "has_moving_target": "bool", "dropped_target": "int64",
                                      "sample": "int64"})
    bout_df = bout_df.astype({"trial": "int64"})
    return BehaviourTruth(log=log, heading_unwrapped_rad=arrays["h"].copy(), bouts=bout_df,
                          splits=split_df.drop(columns="sample"), trials=pd.DataFrame(trials))


def add_triggers(log: pd.DataFrame, sc: Scenario, rng: np.random.Generator) -> list[int]:
    """Add the ``trigger`` column: one high sample at each volume start (some dropped).

    The pulse goes high on the first rig sample at or after the volume start mapped through
    the clock model. Returns the indices of the volumes whose pulse was dropped.
    """
    n_vol = sc.imaging.n_volumes
    t_rig_s = scope_to_rig(np.arange(n_vol) / sc.imaging.volume_rate_hz, sc)
    idx = np.searchsorted(log["time_s"].to_numpy(), t_rig_s, side="left")
    n_drop = min(sc.clock.n_dropped, max(n_vol - 4, 0))
    dropped = sorted(int(v) for v in rng.choice(np.arange(2, n_vol - 2), n_drop, replace=False)) \
        if n_drop else []
    keep = np.setdiff1d(np.arange(n_vol), dropped)
    trig = np.zeros(len(log), np.int8)
    trig[idx[keep]] = 1
    log["trigger"] = trig
    return dropped
