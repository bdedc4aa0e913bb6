"""Regressors of the tuning model: what a calcium indicator would report of the behaviour.

Activity sampled at a plane's time is the indicator's response to everything the cell did in
the seconds before, so the tuning model is written in the same currency: every behavioural
term is built on the rig's fine time grid, filtered with the indicator kernel
``exp(-t / decay) - exp(-t / rise)`` (causal, peak 1) and only then sampled at each plane's
times. Three kinds of columns:

* bearing terms ``cos(h b_k)``, ``sin(h b_k)`` of every target ``k``, gated by epoch (before the
  first split, between splits, after the last split) and by the target's presence, plus the
  gate itself (the epoch's mean level). Gating *before* filtering lets activity that started
  in one epoch and is still decaying in the next be explained by its own epoch's terms;
* motor terms: impulses at every bout onset, per side weighted by ``|turn|`` and ``turn^2``
  (premotor activity grows with the turn), and for all bouts by vigor, each shifted to a set of
  leads and lags (an FIR basis), so activity that precedes or follows movements is absorbed by
  nuisance terms instead of passing as bearing tuning (turns depend on bearing);
* baseline terms (optional, :func:`baseline_columns`): the running-percentile baseline of the
  motor terms, sampled like the activity. A dF/F trace is divided by, and has subtracted, a
  baseline estimated on the cell's *own* fluorescence; a cell driven at every bout never
  returns to rest while bouts are frequent, so its baseline follows the bout rate over the
  baseline window (tens of seconds), a slow term no FIR basis of a few seconds can span;
* nothing else: intercepts are added by the test.

All functions are pure NumPy/SciPy functions of arrays.
"""

from __future__ import annotations

import numpy as np
from scipy.signal import lfilter

from pipeline.errors import InputError
from pipeline.volumes.traces import running_percentile

__all__ = [
    "indicator_filter",
    "fine_epoch_gates",
    "bearing_columns",
    "motor_columns",
    "sample_columns",
    "trial_anchors",
    "uniform_grid",
    "window_epochs",
    "tuning_regressors",
    "baseline_columns",
]

EPOCH_NAMES = ("pre", "between", "post")


def indicator_filter(x, *, dt_s, rise_s, decay_s):
    """Causal convolution with ``exp(-t/decay) - exp(-t/rise)`` normalised to a peak of 1.

    Each exponential is a first-order recursive filter (``scipy.signal.lfilter``), so the cost
    is linear in the number of samples whatever the kernel length. An impulse of height 1 gives
    a response whose peak is ``1 / dt_s`` times the kernel's peak of 1, i.e. the filter
    integrates the input over time.

    Parameters
    ----------
    x : ndarray of shape (n_samples, ...)
        Input on a uniform grid (filtered along axis 0).
    dt_s, rise_s, decay_s : float
        Grid step, indicator rise and decay time constants (seconds); ``rise_s < decay_s``.

    Returns
    -------
    ndarray
        Same shape as ``x``.

    References
    ----------
    Chen T-W et al. (2013). Ultrasensitive fluorescent proteins for imaging neuronal activity.
    Nature 499:295-300 (GCaMP6 kinetics). doi:10.1038/nature12354
    """
    if not 0 < rise_s < decay_s:
        raise InputError(f"indicator kernel: expected 0 < rise_s < decay_s, got rise_s = "
                         f"{rise_s}, decay_s = {decay_s}")
    x = np.asarray(x, dtype=np.float64)
    a_decay, a_rise = np.exp(-dt_s / decay_s), np.exp(-dt_s / rise_s)
    slow = lfilter([1.0], [1.0, -a_decay], x, axis=0)
    fast = lfilter([1.0], [1.0, -a_rise], x, axis=0)
    t_peak = np.log(decay_s / rise_s) * decay_s * rise_s / (decay_s - rise_s)
    peak = np.exp(-t_peak / decay_s) - np.exp(-t_peak / rise_s)
    return (slow - fast) * dt_s / peak


def fine_epoch_gates(t_s, trial, split_s):
    """Epoch of every fine-grid sample from its trial's split times.

    Parameters
    ----------
    t_s : ndarray of shape (n,)
        Sample times (imaging clock).
    trial : ndarray of int, shape (n,)
        Trial of each sample; negative outside trials.
    split_s : dict of int to array_like
        Split times (imaging clock) of each trial that has at least one.

    Returns
    -------
    dict of str to ndarray of bool
        ``pre`` (in a trial, before its first split; a trial without a split is ``pre``
        throughout), ``between`` (first to last split) and ``post`` (after the last split).
    """
    t_s = np.asarray(t_s, dtype=np.float64)
    trial = np.asarray(trial)
    first = np.full(t_s.size, np.inf)
    last = np.full(t_s.size, np.inf)
    for tr, times in split_s.items():
        times = np.asarray(times, dtype=np.float64)
        times = times[np.isfinite(times)]
        if times.size:
            m = trial == tr
            first[m], last[m] = times.min(), times.max()
    inside = trial >= 0
    return {"pre": inside & (t_s < first), "between": inside & (t_s >= first) & (t_s < last),
            "post": inside & (t_s >= last) & np.isfinite(last)}


def bearing_columns(bearing_rad, gates, *, n_harmonics=1):
    """Epoch- and presence-gated bearing terms and gates, before filtering.

    Parameters
    ----------
    bearing_rad : ndarray of shape (n, n_targets)
        Egocentric bearings (NaN where a target is absent).
    gates : dict of str to ndarray of bool
        From :func:`fine_epoch_gates`.
    n_harmonics : int, default=1

    Returns
    -------
    terms : ndarray of shape (n, n_epochs, n_targets, 2 * n_harmonics)
        ``cos(h b)``, ``sin(h b)`` for h = 1..n_harmonics inside the gate, 0 outside.
    levels : ndarray of shape (n, n_epochs, n_targets)
        The gate times the target's presence.
    """
    b = np.asarray(bearing_rad, dtype=np.float64)
    present = np.isfinite(b)
    b0 = np.where(present, b, 0.0)
    n, n_t = b.shape
    g = np.stack([np.asarray(gates[e], bool) for e in gates], axis=1)        # (n, E)
    levels = (g[:, :, None] & present[:, None, :]).astype(np.float64)         # (n, E, K)
    harm = []
    for h in range(1, int(n_harmonics) + 1):
        harm += [np.cos(h * b0), np.sin(h * b0)]
    h_cols = np.stack(harm, axis=-1)                                          # (n, K, 2h)
    return levels[..., None] * h_cols[:, None], levels


def motor_columns(t_s, onset_s, turn_rad, vigor, *, leads_s):
    """Impulses at bout onsets shifted to each lead, before filtering.

    Parameters
    ----------
    t_s : ndarray of shape (n,)
        Uniform fine grid (imaging clock).
    onset_s, turn_rad, vigor : ndarray of shape (n_bouts,)
        Bout onsets (imaging clock), signed turn angles (+ = left) and vigor (NaN = unknown,
        skipped).
    leads_s : sequence of float
        Impulses are placed at ``onset - lead``: positive leads model activity before the bout.

    Returns
    -------
    ndarray of shape (n, 5 * len(leads_s))
        Per lead: left ``|turn|``, left ``turn^2``, right ``|turn|``, right ``turn^2``, vigor.
        Columns with no impulse are all zero (the test drops them).
    """
    t_s = np.asarray(t_s, dtype=np.float64)
    turn = np.nan_to_num(np.asarray(turn_rad, dtype=np.float64))
    vig = np.nan_to_num(np.asarray(vigor, dtype=np.float64))
    left, right = turn > 0, turn < 0
    weights = np.stack([np.where(left, np.abs(turn), 0.0), np.where(left, turn**2, 0.0),
                        np.where(right, np.abs(turn), 0.0), np.where(right, turn**2, 0.0),
                        vig], axis=1)
    out = np.zeros((t_s.size, len(leads_s), weights.shape[1]))
    onset = np.asarray(onset_s, dtype=np.float64)
    for j, lead in enumerate(leads_s):
        at = onset - float(lead)
        ok = (at >= t_s[0]) & (at <= t_s[-1])
        idx = np.clip(np.searchsorted(t_s, at[ok]), 0, t_s.size - 1)
        for c in range(weights.shape[1]):
            np.add.at(out[:, j, c], idx, weights[ok, c])
    return out.reshape(t_s.size, -1)


def sample_columns(t_fine_s, columns, t_s):
    """Linear interpolation of every fine-grid column at the times ``t_s``.

    Returns
    -------
    ndarray of shape (len(t_s), ...) matching ``columns.shape[1:]``.
    """
    cols = np.asarray(columns, dtype=np.float64)
    flat = cols.reshape(cols.shape[0], -1)
    out = np.empty((np.size(t_s), flat.shape[1]))
    for j in range(flat.shape[1]):
        out[:, j] = np.interp(t_s, t_fine_s, flat[:, j])
    return out.reshape(np.size(t_s), *cols.shape[1:])


def uniform_grid(t_s, values, *, dt_s=None):
    """Resample irregular samples onto a uniform grid by zero-order hold (last sample before).

    Returns
    -------
    grid_s : ndarray of shape (n_grid,)
    held : ndarray of shape (n_grid, ...)
    """
    t_s = np.asarray(t_s, dtype=np.float64)
    if t_s.size < 2 or np.any(np.diff(t_s) <= 0):
        raise InputError(f"behaviour times: expected at least 2 increasing samples, got "
                         f"{t_s.size} samples (first non-increasing step at "
                         f"{int(np.argmax(np.diff(t_s) <= 0)) if t_s.size > 1 else 0})")
    dt = float(np.median(np.diff(t_s))) if dt_s is None else float(dt_s)
    grid = t_s[0] + dt * np.arange(int(np.floor((t_s[-1] - t_s[0]) / dt)) + 1)
    # a sample exactly on a grid point holds from that point on (no rounding to the previous)
    idx = np.clip(np.searchsorted(t_s, grid + 1e-6 * dt, side="right") - 1, 0, t_s.size - 1)
    return grid, np.asarray(values)[idx]


def window_epochs(t_s, trial, split_s, *, pre_s, post_s, guard_s=0.0):
    """Epoch label of each sample inside the analysis windows around its trial's splits.

    ``pre``: up to ``pre_s`` before the first split; ``between``: first to last split;
    ``post``: up to ``post_s`` after the last split; ``""`` elsewhere (and in trials without a
    split). Samples less than ``guard_s`` after a split are left out of the epoch that split
    opens (the indicator still carries the previous epoch's activity there). Within a trial
    the labelled samples are contiguous apart from the guards.
    """
    t_s = np.asarray(t_s, dtype=np.float64)
    trial = np.asarray(trial)
    out = np.full(t_s.size, "", dtype=object)
    for tr, times in split_s.items():
        times = np.asarray(times, dtype=np.float64)
        times = times[np.isfinite(times)]
        if not times.size:
            continue
        m = trial == tr
        first, last = times.min(), times.max()
        out[m & (t_s >= first - pre_s) & (t_s < first)] = "pre"
        out[m & (t_s >= first) & (t_s < last)] = "between"
        out[m & (t_s >= last) & (t_s < last + post_s)] = "post"
        for split in times:
            out[m & (t_s >= split) & (t_s < split + guard_s)] = ""
    return out


def tuning_regressors(t_s, bearing_rad, trial, split_s, *, rise_s, decay_s, n_harmonics=1,
                      bouts=None, leads_s=()):
    """Every fine-grid regressor of the tuning model, filtered with the indicator kernel.

    Parameters
    ----------
    t_s : ndarray of shape (n,)
        Uniform fine grid (imaging clock).
    bearing_rad : ndarray of shape (n, n_targets)
    trial : ndarray of int, shape (n,)
    split_s : dict of int to array_like
        Split times of each trial (imaging clock).
    rise_s, decay_s : float
        Indicator kernel.
    n_harmonics : int, default=1
    bouts : tuple of (onset_s, turn_rad, vigor), optional
        Bout onsets (imaging clock), signed turns and vigor; no motor terms when None.
    leads_s : sequence of float
        Leads of the motor terms (see :func:`motor_columns`).

    Returns
    -------
    dict
        ``terms`` (n, n_epochs, n_targets, 2 * n_harmonics), ``levels`` (n, n_epochs,
        n_targets), ``motor`` (n, n_motor) and ``epochs`` (names, in the order of axis 1).
    """
    t_s = np.asarray(t_s, dtype=np.float64)
    dt = float(t_s[1] - t_s[0])
    gates = fine_epoch_gates(t_s, trial, split_s)
    terms, levels = bearing_columns(bearing_rad, gates, n_harmonics=n_harmonics)
    kw = {"dt_s": dt, "rise_s": rise_s, "decay_s": decay_s}
    motor = np.zeros((t_s.size, 0))
    if bouts is not None and len(leads_s):
        motor = indicator_filter(motor_columns(t_s, *bouts, leads_s=leads_s), **kw)
    return {"terms": indicator_filter(terms, **kw), "levels": indicator_filter(levels, **kw),
            "motor": motor, "epochs": list(gates)}


def baseline_columns(motor, leads_s, *, percentile, window):
    """Running-percentile baselines of the motor terms at the lead nearest 0.

    A dF/F trace ``(F - F0) / F0`` with ``F0`` a running percentile of the cell's own ``F``
    is, for a cell whose activity is ``a m(t)`` (``m`` one motor term), to first order
    ``a m(t) - a P[m](t)``, ``P`` the running percentile: since ``P[a m] = a P[m]`` for
    ``a > 0``, ``P[m]`` is the column that spans what the baseline took away. The baselines of
    terms at neighbouring leads differ by a shift of a fraction of a second over a window of
    tens of seconds, so only the lead nearest 0 is kept (one column per weight: left
    ``|turn|``, left ``turn^2``, right ``|turn|``, right ``turn^2``, vigor).

    Parameters
    ----------
    motor : ndarray of shape (n_samples, 5 * len(leads_s))
        Motor terms (:func:`motor_columns`, filtered and sampled) at *every* sample of a
        plane, in time order: the window must see what the dF/F baseline saw.
    leads_s : sequence of float
        The leads of ``motor``'s columns.
    percentile : float
        Baseline percentile (0-100), as in the dF/F.
    window : int
        Window in samples, as in the dF/F.

    Returns
    -------
    ndarray of shape (n_samples, 5)
        Columns without any impulse stay 0.

    References
    ----------
    Jia H, Rochefort NL, Chen X, Konnerth A (2011). In vivo two-photon imaging of
    sensory-evoked dendritic calcium signals in cortical neurons. Nat Protoc 6:28-35
    (running-percentile dF/F baseline). doi:10.1038/nprot.2010.169
    """
    motor = np.asarray(motor, dtype=np.float64)
    leads = np.asarray(leads_s, dtype=np.float64)
    if leads.size == 0 or motor.shape[1] != 5 * leads.size:
        raise InputError(f"motor terms: expected 5 columns per lead ({leads.size} leads), got "
                         f"{motor.shape[1]} columns")
    j = int(np.argmin(np.abs(leads)))
    cols = motor[:, 5 * j: 5 * (j + 1)]
    return running_percentile(cols.T, percentile, int(window)).T


def trial_anchors(t_s, trial, bearing_rad, split_s):
    """Each trial's first split and span, and which targets it shows (the swap null's anchors).

    Parameters
    ----------
    t_s : ndarray of shape (n,)
        Fine grid (imaging clock).
    trial : ndarray of int, shape (n,)
        Trial of each sample; negative outside trials.
    bearing_rad : ndarray of shape (n, n_targets)
        Bearings, NaN where a target is absent.
    split_s : dict of int to array_like
        Split times of each trial.

    Returns
    -------
    anchors : dict of int to (first split, trial start, trial end), in seconds
        Trials with a finite split and samples on the grid only.
    kinds : dict of int to int
        Bit ``k`` set when target ``k`` is shown in the trial.
    """
    t_s = np.asarray(t_s, dtype=np.float64)
    trial = np.asarray(trial)
    shown = np.isfinite(np.asarray(bearing_rad, dtype=np.float64).reshape(t_s.size, -1))
    anchors, kinds = {}, {}
    for tr, times in split_s.items():
        times = np.asarray(times, dtype=np.float64)
        on = trial == tr
        if not (np.isfinite(times).any() and on.any()):
            continue
        at = t_s[on]
        anchors[int(tr)] = (float(np.nanmin(times)), float(at[0]), float(at[-1]))
        kinds[int(tr)] = int(sum(1 << k for k in np.flatnonzero(shown[on].any(axis=0))))
    return anchors, kinds
