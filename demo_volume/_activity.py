"""Planted activity: cell classes, latent drives and the indicator's calcium response.

Latent drives live on a fine grid of the imaging clock (``cells.grid_dt_s``); the calcium signal
(noise-free dF/F) is the drive filtered by a double-exponential indicator kernel, then sampled
at each plane's acquisition time.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.signal import lfilter

from demo_volume._behaviour import N_TARGET_SLOTS, BehaviourTruth, scope_to_rig, wrap
from demo_volume._params import Scenario

__all__ = ["Activity", "plant_activity", "indicator_filter", "BehaviourGrid"]

WARMUP_S = 20.0


def indicator_filter(drive: np.ndarray, *, dt_s: float, rise_s: float, decay_s: float,
                     unit: str = "area") -> np.ndarray:
    """Filter drives (n, t) with the kernel ``exp(-t/decay_s) - exp(-t/rise_s)``.

    The kernel is applied as two first-order recursions (exact for sampled exponentials and
    O(t) per row, where an FFT convolution would be O(t log t)).

    Parameters
    ----------
    drive : ndarray of shape (n, t)
    dt_s : float
        Grid step.
    rise_s, decay_s : float
        Time constants of the indicator.
    unit : {"area", "peak"}, default="area"
        "area": the kernel integrates to 1 (a sustained drive of 1 gives 1); "peak": a single
        sample of value 1 gives a transient peaking at 1.

    Returns
    -------
    ndarray of shape (n, t), float64

    References
    ----------
    Chen T-W, Wardill TJ, Sun Y, et al. (2013) Ultrasensitive fluorescent proteins for imaging
    neuronal activity. Nature 499:295-300. doi:10.1038/nature12354
    """
    a_d = np.exp(-dt_s / decay_s)
    a_r = np.exp(-dt_s / rise_s)
    out = lfilter([1.0], [1.0, -a_d], drive, axis=-1) - lfilter([1.0], [1.0, -a_r], drive,
                                                                axis=-1)
    if unit == "area":
        scale = 1.0 / (1.0 - a_d) - 1.0 / (1.0 - a_r)
    else:
        n = np.arange(int(10 * decay_s / dt_s) + 2)
        scale = float(np.max(a_d ** n - a_r ** n))
    return out / scale


@dataclass
class BehaviourGrid:
    """Behaviour resampled on the fine imaging-clock grid."""

    t_s: np.ndarray               # (n_grid,) imaging clock
    bearing_rad: np.ndarray       # (3, n_grid) egocentric bearing of each target, NaN if absent
    trial: np.ndarray             # (n_grid,) int, -1 outside trials
    post: np.ndarray              # (n_grid,) bool, after the trial's first split


def behaviour_grid(sc: Scenario, bt: BehaviourTruth) -> BehaviourGrid:
    """Resample the rig log onto the fine grid of the imaging clock."""
    dt = sc.cells.grid_dt_s
    t_end_s = sc.imaging.n_volumes / sc.imaging.volume_rate_hz + 1.0
    t_s = np.arange(-WARMUP_S, t_end_s, dt)
    t_rig = scope_to_rig(t_s, sc)
    log = bt.log
    t_log = log["time_s"].to_numpy()

    def interp(values: np.ndarray) -> np.ndarray:
        return np.interp(t_rig, t_log, values, left=np.nan, right=np.nan)

    x, y = interp(log["x_mm"].to_numpy()), interp(log["y_mm"].to_numpy())
    heading = interp(bt.heading_unwrapped_rad)
    bearing = np.full((N_TARGET_SLOTS, t_s.size), np.nan)
    for k in range(N_TARGET_SLOTS):
        tx, ty = interp(log[f"t{k}_x_mm"].to_numpy()), interp(log[f"t{k}_y_mm"].to_numpy())
        bearing[k] = wrap(np.arctan2(ty - y, tx - x) - heading)
    idx = np.searchsorted(t_log, t_rig, side="right") - 1
    inside = (idx >= 0) & (t_rig <= t_log[-1])
    trial = np.where(inside, log["trial"].to_numpy()[np.clip(idx, 0, None)], -1)
    first = bt.splits[bt.splits["split_index"] == 0].set_index("trial")["t_split_rig_s"]
    split_rig = np.full(int(trial.max()) + 2, np.inf)
    split_rig[first.index.to_numpy()] = first.to_numpy()
    post = (trial >= 0) & (t_rig >= split_rig[trial])
    return BehaviourGrid(t_s, bearing, trial, post)


@dataclass
class Activity:
    """Planted calcium signals and the table of cell classes."""

    classes: pd.DataFrame     # cell_class, target, epoch, pref_bearing_rad, kappa, side, lead_s
    grid_t_s: np.ndarray      # (n_grid,)
    calcium: np.ndarray       # (n_cells, n_grid) noise-free dF/F
    turn_ref_rad: float       # median |turn| used to scale premotor transients

    def at_times(self, t_s: np.ndarray) -> np.ndarray:
        """Calcium at times ``t_s`` (n,) by linear interpolation: (n_cells, n)."""
        dt = self.grid_t_s[1] - self.grid_t_s[0]
        f = (np.asarray(t_s) - self.grid_t_s[0]) / dt
        i0 = np.clip(np.floor(f).astype(np.int64), 0, self.grid_t_s.size - 2)
        w = (f - i0).astype(np.float32)
        return self.calcium[:, i0] * (1 - w) + self.calcium[:, i0 + 1] * w


def _assign_classes(sc: Scenario, cells: pd.DataFrame, grid: BehaviourGrid,
                    rng: np.random.Generator) -> pd.DataFrame:
    c = sc.cells
    n = len(cells)
    n_bear = int(round(c.fraction_bearing * n))
    n_pm = int(round(c.fraction_premotor * n))
    n_vig = int(round(c.fraction_vigor * n))
    labels = np.array(["bearing"] * n_bear + ["premotor"] * n_pm + ["vigor"] * n_vig
                      + ["untuned"] * (n - n_bear - n_pm - n_vig), dtype=object)
    labels = labels[rng.permutation(n)]
    target = np.full(n, -1, np.int64)
    epoch = np.full(n, "", dtype=object)
    side = np.full(n, "", dtype=object)
    pref, kappa, lead, amp = (np.full(n, np.nan) for _ in range(4))
    present = np.isfinite(grid.bearing_rad)
    tw = np.asarray(c.bearing_target_weights, float)
    tw = np.where(present.any(axis=1), tw, 0.0)
    ew = np.asarray(c.bearing_epoch_weights, float)
    for i in np.flatnonzero(labels == "bearing"):
        k = int(rng.choice(N_TARGET_SLOTS, p=tw / tw.sum()))
        ep = str(rng.choice(["pre", "post", "both"], p=ew / ew.sum()))
        # "both" draws its preference before the split too: bearings before the split span a
        # narrow range around the options' average, bearings after it nearly the whole circle,
        # so a preference drawn after the split would leave the cell silent (not tuned)
        # before it
        ok = present[k] & (grid.post if ep == "post" else ~grid.post)
        if not ok.any():
            ok = present[k]
        target[i], epoch[i] = k, ep
        pref[i] = grid.bearing_rad[k, rng.choice(np.flatnonzero(ok))]
        kappa[i] = rng.uniform(*c.kappa)
        amp[i] = rng.uniform(*c.bearing_amplitude)
    centre_x = (sc.imaging.shape_zyx[2] - 1) / 2
    x_vox = cells["x_vox"].to_numpy(float)
    for i in np.flatnonzero(labels == "premotor"):
        left_lobe = bool(x_vox[i] < centre_x)
        side_left = left_lobe if rng.random() < 0.8 else not left_lobe
        side[i], lead[i] = ("left" if side_left else "right"), c.lead_s
        amp[i] = rng.uniform(*c.premotor_amplitude)
    for i in np.flatnonzero(labels == "vigor"):
        amp[i] = rng.uniform(*c.vigor_amplitude)
    tab = pd.DataFrame({"cell_class": labels, "target": target, "epoch": epoch,
                        "pref_bearing_rad": pref, "kappa": kappa, "side": side,
                        "lead_s": lead, "amplitude": amp})
    return tab


def _impulses(drive: np.ndarray, rows: np.ndarray, t_s: np.ndarray, peaks: np.ndarray,
              grid_t0_s: float, dt_s: float) -> None:
    """Add peak-normalised impulses (row, time, peak) into ``drive`` in place."""
    idx = np.round((t_s - grid_t0_s) / dt_s).astype(np.int64)
    ok = (idx >= 0) & (idx < drive.shape[1])
    np.add.at(drive, (rows[ok], idx[ok]), peaks[ok])


def plant_activity(sc: Scenario, cells: pd.DataFrame, bt: BehaviourTruth,
                   rng: np.random.Generator) -> Activity:
    """Assign classes and compute every cell's noise-free calcium signal on the fine grid."""
    c, ind = sc.cells, sc.indicator
    grid = behaviour_grid(sc, bt)
    tab = _assign_classes(sc, cells, grid, rng)
    n, n_t, dt = len(cells), grid.t_s.size, c.grid_dt_s
    t0 = float(grid.t_s[0])
    cls = tab["cell_class"].to_numpy()
    target, epochs = tab["target"].to_numpy(np.int64), tab["epoch"].to_numpy()
    kappa, pref = tab["kappa"].to_numpy(float), tab["pref_bearing_rad"].to_numpy(float)
    amp, lead = tab["amplitude"].to_numpy(float), tab["lead_s"].to_numpy(float)
    side = tab["side"].to_numpy()

    sustained = np.zeros((n, n_t))
    for i in np.flatnonzero(cls == "bearing"):
        b = grid.bearing_rad[target[i]]
        on = np.isfinite(b) & (grid.trial >= 0)
        if epochs[i] != "both":
            on &= grid.post if epochs[i] == "post" else ~grid.post
        tuning = np.exp(kappa[i] * (np.cos(np.where(on, b, 0.0) - pref[i]) - 1.0))
        sustained[i] = np.where(on, amp[i] * tuning, 0.0)
    calcium = indicator_filter(sustained, dt_s=dt, rise_s=ind.rise_s, decay_s=ind.decay_s)
    del sustained

    events = np.zeros((n, n_t))
    onset = bt.bouts["onset_scope_s"].to_numpy(float)
    turn = bt.bouts["turn_rad"].to_numpy(float)
    vigor = bt.bouts["vigor"].to_numpy(float)
    turn_ref = float(np.median(np.abs(turn))) if turn.size else 1.0
    gain = np.minimum(np.abs(turn) / turn_ref, c.premotor_max_gain)
    for i in np.flatnonzero(cls == "premotor"):
        sel = turn > 0 if side[i] == "left" else turn < 0
        _impulses(events, np.full(int(sel.sum()), i), onset[sel] - lead[i], amp[i] * gain[sel],
                  t0, dt)
    for i in np.flatnonzero(cls == "vigor"):
        _impulses(events, np.full(onset.size, i), onset, amp[i] * vigor, t0, dt)
    rate = np.where(cls == "untuned", c.spont_rate_hz, c.tuned_spont_rate_hz)
    counts = rng.poisson(rate * (n_t * dt))
    rows = np.repeat(np.arange(n), counts)
    t_ev = rng.uniform(t0, t0 + n_t * dt, size=rows.size)
    peaks = c.spont_amplitude * np.exp(rng.normal(0.0, c.spont_log_sd, size=rows.size))
    _impulses(events, rows, t_ev, peaks, t0, dt)
    calcium += indicator_filter(events, dt_s=dt, rise_s=ind.rise_s, decay_s=ind.decay_s,
                                unit="peak")
    return Activity(tab, grid.t_s, calcium.astype(np.float32), turn_ref)
