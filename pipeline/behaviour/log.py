"""Read and validate a rig behaviour log (CSV or Parquet) into the canonical table.

The reader maps file columns to canonical names through a :class:`LogSpec`, converts units, and
checks the log once; nothing downstream re-checks it. Canonical output columns::

    t_rig_s, x_mm, y_mm, heading_rad, turn_rad_s, bout, vigor, trial, trigger,
    <target>_x_mm, <target>_y_mm   (one pair per target; NaN while the target is absent)

Row numbers in messages: for CSV, "file line N" counts the header as line 1 (the first data
row is line 2); for Parquet, "row N" counts data rows from 1.

Gap repair rule: a run of missing values (empty or NaN cells) in an animal column is repaired
only when the time between the last good sample before it and the first good sample after it
is at most ``max_gap_s``; continuous columns are linearly interpolated in time (heading on the
unwrapped angle), discrete columns (bout, trial, trigger) take the previous good value. A longer
run, or one at the very start or end of the log, is an error naming the rows. Target columns
are never repaired: NaN there means the target is absent.
"""

from __future__ import annotations

import difflib
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any, Literal

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from pipeline.behaviour.geometry import wrap_angle
from pipeline.errors import InputError

__all__ = ["LogSpec", "read_log", "CANONICAL_COLUMNS", "DEFAULT_COLUMNS"]

CANONICAL_COLUMNS = ("time", "x", "y", "heading", "turn", "bout", "vigor", "trial", "trigger")
_REQUIRED = ("time", "x", "y", "heading")
DEFAULT_COLUMNS: Mapping[str, str] = MappingProxyType({
    "time": "time_s", "x": "x_mm", "y": "y_mm", "heading": "heading_rad", "turn": "turn",
    "bout": "bout", "vigor": "vigor", "trial": "trial", "trigger": "trigger",
})
_OUT = {"time": "t_rig_s", "x": "x_mm", "y": "y_mm", "heading": "heading_rad",
        "turn": "turn_rad_s", "bout": "bout", "vigor": "vigor", "trial": "trial",
        "trigger": "trigger"}
_DISCRETE = ("bout", "trial", "trigger")
_TIME_FACTOR = {"s": 1.0, "ms": 1e-3, "us": 1e-6}
_POS_FACTOR = {"mm": 1.0, "um": 1e-3}
_TARGET_RE = re.compile(r"^(?P<name>.+)_x(?P<suffix>_.+)?$")


@dataclass(frozen=True)
class LogSpec:
    """How to read one rig log: column mapping, targets and units.

    Parameters
    ----------
    columns : mapping of str to str
        Canonical name (``time, x, y, heading, turn, bout, vigor, trial, trigger``) -> file
        column. ``time, x, y, heading`` are required; a canonical name left out is "not logged"
        (turn/vigor become NaN, bout/trigger 0, trial 0). Default: the demo rig's names.
    targets : tuple of (name, x_column, y_column), or None
        Targets and their position columns; static or moving (another animal's avatar is a
        moving target). None finds pairs ``<name>_x...`` / ``<name>_y...`` in the header.
    time_unit : {"s", "ms", "us"}
    position_unit : {"mm", "um", "virtual"}
        ``virtual`` positions are multiplied by ``position_scale_mm``.
    position_scale_mm : float
        mm per virtual unit.
    angle_unit : {"rad", "deg"}
        Unit of heading; the turn command is in this unit per second.
    max_gap_s : float
        Longest run of missing animal samples that is repaired (see module notes).
    rate_range_hz : (float, float)
        Plausible rig sampling rates; a median rate outside means a wrong ``time_unit``.
    chunk_rows : int
        CSV rows parsed per chunk (bounds the parser's memory on long logs).
    min_trial_rows : int
        A trial with fewer rows is an "empty trial" error.
    """

    columns: Mapping[str, str] = field(default_factory=lambda: DEFAULT_COLUMNS)
    targets: tuple[tuple[str, str, str], ...] | None = None
    time_unit: Literal["s", "ms", "us"] = "s"
    position_unit: Literal["mm", "um", "virtual"] = "mm"
    position_scale_mm: float = 1.0
    angle_unit: Literal["rad", "deg"] = "rad"
    max_gap_s: float = 0.05
    rate_range_hz: tuple[float, float] = (10.0, 10_000.0)
    chunk_rows: int = 200_000
    min_trial_rows: int = 2

    @classmethod
    def from_settings(cls, settings: Any) -> LogSpec:
        """Build from the ``[behaviour]`` config section (empty ``columns``/``targets`` =
        defaults / auto-detect)."""
        columns = dict(DEFAULT_COLUMNS)
        columns.update(dict(settings.columns))
        targets = tuple((t.name, t.x, t.y) for t in settings.targets) or None
        return cls(columns=MappingProxyType(columns), targets=targets,
                   time_unit=settings.time_unit, position_unit=settings.position_unit,
                   position_scale_mm=settings.position_scale_mm,
                   angle_unit=settings.angle_unit, max_gap_s=settings.max_gap_s)


# ------------------------------------------------------------------------------------------
class _Where:
    """Turns 0-based data row indices into the file's own row numbers for messages."""

    def __init__(self, path: Path, kind: str) -> None:
        self.path, self.kind = path, kind

    def row(self, i: int) -> str:
        return f"file line {i + 2}" if self.kind == "csv" else f"row {i + 1}"

    def rows(self, idx: NDArray[np.int64], limit: int = 5) -> str:
        shown = ", ".join(self.row(int(i)).split()[-1] for i in idx[:limit])
        more = f" and {len(idx) - limit} more" if len(idx) > limit else ""
        unit = "file lines" if self.kind == "csv" else "rows"
        return f"{unit} {shown}{more}"

    def fail(self, msg: str) -> InputError:
        return InputError(f"rig log {self.path}: {msg}")


def _header(path: Path, kind: str) -> list[str]:
    if kind == "csv":
        return [str(c) for c in pd.read_csv(path, nrows=0).columns]
    import pyarrow.parquet as pq

    return list(pq.ParquetFile(path).schema_arrow.names)


def _check_text(path: Path, where: _Where, *, n_bytes: int = 65_536) -> None:
    """Fail on a binary file given as CSV (a NUL byte in its first ``n_bytes`` bytes)."""
    with path.open("rb") as fh:
        head = fh.read(n_bytes)
    nul = head.find(b"\0")
    if nul >= 0:
        line = head.count(b"\n", 0, nul) + 1
        raise where.fail(f"file line {line} (byte {nul}) holds a NUL byte: not a text CSV file; "
                         "expected comma-separated text (set behaviour.format = 'parquet' for "
                         "a Parquet log)")


def _resolve(spec: LogSpec, header: list[str], where: _Where) -> tuple[dict[str, str],
                                                                       list[tuple[str, str, str]]]:
    unknown = [k for k in spec.columns if k not in CANONICAL_COLUMNS]
    if unknown:
        raise where.fail(f"unknown canonical column name(s) {unknown} in the column mapping; "
                         f"allowed: {', '.join(CANONICAL_COLUMNS)}")
    cols: dict[str, str] = {}
    for canon, col in spec.columns.items():
        if col in header:
            cols[canon] = col
        elif canon in _REQUIRED or col != DEFAULT_COLUMNS.get(canon):
            raise _missing(where, f"column {col!r} (for {canon})", col, header)
    if spec.targets is None:
        animal = set(cols.values())
        targets = []
        for c in header:
            m = _TARGET_RE.match(c)
            if m and c not in animal:
                ycol = f"{m['name']}_y{m['suffix'] or ''}"
                if ycol in header:
                    targets.append((m["name"], c, ycol))
    else:
        targets = list(spec.targets)
        for name, xc, yc in targets:
            for col in (xc, yc):
                if col not in header:
                    raise _missing(where, f"column {col!r} (target {name!r})", col, header)
    return cols, targets


def _missing(where: _Where, what: str, col: str, header: list[str]) -> InputError:
    near = difflib.get_close_matches(col, header, n=1, cutoff=0.5)
    hint = f"; did you mean {near[0]!r}?" if near else ""
    return where.fail(f"{what} not found; columns present: {', '.join(header)}{hint}")


def _numeric(frame: pd.DataFrame, offset: int, where: _Where) -> dict[str, NDArray[np.float64]]:
    out: dict[str, NDArray[np.float64]] = {}
    for col in frame.columns:
        s = frame[col]
        if s.dtype == bool:
            out[col] = s.to_numpy(dtype=np.float64)
            continue
        if pd.api.types.is_numeric_dtype(s.dtype):
            out[col] = s.to_numpy(dtype=np.float64, na_value=np.nan)
            continue
        conv = pd.to_numeric(s, errors="coerce")
        text = s.astype("string").str.strip()
        bad = np.flatnonzero((conv.isna() & s.notna() & (text != "")).to_numpy(dtype=bool))
        if bad.size:
            i = int(bad[0])
            raise where.fail(f"{where.row(offset + i)}, column {col!r}: value {s.iloc[i]!r} is "
                             f"not a number ({bad.size} such cell(s) in this column chunk)")
        out[col] = conv.to_numpy(dtype=np.float64, na_value=np.nan)
    return out


def _read_raw(path: Path, kind: str, usecols: list[str], spec: LogSpec, where: _Where
              ) -> dict[str, NDArray[np.float64]]:
    parts: dict[str, list[NDArray[np.float64]]] = {c: [] for c in usecols}
    offset = 0

    def take(frame: pd.DataFrame) -> None:
        nonlocal offset
        for col, arr in _numeric(frame, offset, where).items():
            parts[col].append(arr)
        offset += len(frame)

    if kind == "csv":
        with pd.read_csv(path, usecols=usecols, chunksize=spec.chunk_rows,
                         skip_blank_lines=False) as reader:
            for frame in reader:
                take(frame)
    else:
        import pyarrow.parquet as pq

        pf = pq.ParquetFile(path)
        for batch in pf.iter_batches(batch_size=spec.chunk_rows, columns=usecols):
            take(batch.to_pandas())
    return {c: (np.concatenate(p) if p else np.empty(0)) for c, p in parts.items()}


def _check_time(t_s: NDArray[np.float64], spec: LogSpec, where: _Where, col: str) -> None:
    n = t_s.size
    if n < 2:
        raise where.fail(f"{n} data row(s); a log needs at least 2")
    bad = np.flatnonzero(~np.isfinite(t_s))
    if bad.size:
        raise where.fail(f"column {col!r} (time) is missing or not finite at {where.rows(bad)}")
    dt = np.diff(t_s)
    back = np.flatnonzero(dt < 0) + 1
    if back.size >= 10 and back.size > 0.01 * n:
        raise where.fail(f"rows out of order: time (column {col!r}) steps backwards at "
                         f"{back.size} of {n - 1} steps (first at {where.rows(back, 3)}); "
                         "sort the file by time")
    if back.size:
        i = int(back[0])
        raise where.fail(f"time (column {col!r}) runs backwards at {where.rows(back)}: "
                         f"{float(t_s[i - 1])} s then {float(t_s[i])} s (a clock reset, or rows out of "
                         "order); expected increasing times")
    dup = np.flatnonzero(dt == 0) + 1
    if dup.size:
        raise where.fail(f"duplicated time stamps (column {col!r}) at {where.rows(dup)}; "
                         "expected strictly increasing times")
    lo, hi = spec.rate_range_hz
    med = float(np.median(dt))
    rate = 1.0 / med
    if not lo <= rate <= hi:
        raw_dt = med / _TIME_FACTOR[spec.time_unit]
        fits = [u for u, f in _TIME_FACTOR.items() if lo <= 1.0 / (raw_dt * f) <= hi]
        hint = ""
        if fits:
            alt_hz = 1.0 / (raw_dt * _TIME_FACTOR[fits[0]])
            hint = f"; with time_unit = {fits[0]!r} it would be {alt_hz:.4g} Hz"
        raise where.fail(f"column {col!r} read as time_unit = {spec.time_unit!r} implies a rig "
                         f"rate of {rate:.4g} Hz, outside the plausible range {lo:g}-{hi:g} Hz "
                         f"(wrong time unit?){hint}")


def _nan_runs(bad: NDArray[np.bool_]) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    edge = np.diff(np.concatenate(([0], bad.view(np.int8), [0])))
    return np.flatnonzero(edge == 1), np.flatnonzero(edge == -1)


def _repair(values: NDArray[np.float64], t_s: NDArray[np.float64], *, canon: str, col: str,
            spec: LogSpec, where: _Where) -> NDArray[np.bool_]:
    """Repair short NaN runs in place (see module notes); return the mask of repaired rows."""
    bad = ~np.isfinite(values)
    if not bad.any():
        return bad
    starts, stops = _nan_runs(bad)
    n = values.size
    edge_runs = (starts == 0) | (stops == n)
    span = np.full(starts.size, np.inf)
    inner = ~edge_runs
    span[inner] = t_s[stops[inner]] - t_s[starts[inner] - 1]
    too_long = np.flatnonzero(span > spec.max_gap_s)
    if too_long.size:
        j = int(too_long[0])
        first, last = int(starts[j]), int(stops[j]) - 1
        why = ("at the start of the log" if starts[j] == 0 else "at the end of the log"
               if stops[j] == n else f"spanning {span[j]:.4g} s")
        raise where.fail(f"column {col!r} ({canon}) is missing from {where.row(first)} to "
                         f"{where.row(last)} ({last - first + 1} rows, {why}); runs up to "
                         f"max_gap_s = {spec.max_gap_s:g} s between good samples are "
                         f"interpolated ({too_long.size} run(s) too long)")
    good = ~bad
    if canon in _DISCRETE:
        idx = np.where(good, np.arange(n), 0)
        np.maximum.accumulate(idx, out=idx)
        values[bad] = values[idx[bad]]
    elif canon == "heading":
        unwrapped = np.unwrap(values[good])
        values[:] = np.interp(t_s, t_s[good], unwrapped)
    else:
        values[bad] = np.interp(t_s[bad], t_s[good], values[good])
    return bad


def read_log(path: str | Path, spec: LogSpec | None = None, *,
             format: Literal["auto", "csv", "parquet"] = "auto"
             ) -> tuple[pd.DataFrame, dict[str, Any]]:
    """Read, convert and validate a rig log.

    Parameters
    ----------
    path : str or Path
        CSV or Parquet file (large CSVs are parsed ``spec.chunk_rows`` rows at a time).
    spec : LogSpec, optional
        Column mapping and units; default ``LogSpec()``.
    format : {"auto", "csv", "parquet"}, default="auto"
        ``auto`` decides by the file suffix (``.parquet``/``.pq`` or CSV otherwise).

    Returns
    -------
    table : pandas.DataFrame
        Canonical columns (module notes); ``table.attrs`` holds ``units``, ``targets``, ``source``.
    report : dict
        ``n_rows``, ``span_s``, ``median_rate_hz``, ``jitter_ms_p99`` (99th percentile of
        ``|dt - median dt|``), ``repaired_rows``, ``not_logged`` and ``targets``.

    Raises
    ------
    InputError
        Missing columns (with what exists and the closest name), non-numeric cells, long NaN
        runs, backwards / duplicated time stamps, rows out of order, an implausible rig rate
        (wrong time unit), an empty trial, a target never visible. The message names the file,
        the row and the column.
    """
    spec = LogSpec() if spec is None else spec
    path = Path(path)
    kind = format if format != "auto" else (
        "parquet" if path.suffix.lower() in (".parquet", ".pq") else "csv")
    where = _Where(path, kind)
    if not path.is_file():
        raise where.fail("file does not exist")
    if kind == "csv":
        _check_text(path, where)
    try:
        header = _header(path, kind)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, OSError, ValueError) as exc:
        raise where.fail(f"cannot read the header as {kind}: {exc}") from None
    cols, targets = _resolve(spec, header, where)
    usecols = list(dict.fromkeys([*cols.values(), *(c for _, x, y in targets for c in (x, y))]))
    try:
        raw = _read_raw(path, kind, usecols, spec, where)
    except (pd.errors.ParserError, UnicodeDecodeError) as exc:
        raise where.fail(f"cannot parse as {kind}: {exc}") from None

    t_s = raw[cols["time"]] * _TIME_FACTOR[spec.time_unit]
    _check_time(t_s, spec, where, cols["time"])
    n = t_s.size
    pos = spec.position_scale_mm if spec.position_unit == "virtual" else _POS_FACTOR[
        spec.position_unit]
    ang = np.pi / 180.0 if spec.angle_unit == "deg" else 1.0
    scale = {"x": pos, "y": pos, "heading": ang, "turn": ang}
    out: dict[str, NDArray[Any]] = {"t_rig_s": t_s}
    repaired = np.zeros(n, dtype=bool)
    for canon in CANONICAL_COLUMNS[1:]:
        if canon not in cols:
            fill = np.nan if canon in ("turn", "vigor") else 0.0
            out[_OUT[canon]] = np.full(n, fill)
            continue
        values = raw[cols[canon]] * scale.get(canon, 1.0)
        repaired |= _repair(values, t_s, canon=canon, col=cols[canon], spec=spec, where=where)
        out[_OUT[canon]] = values
    out["heading_rad"] = wrap_angle(out["heading_rad"])
    out["bout"] = (out["bout"] > 0.5).astype(np.int8)
    out["trigger"] = (out["trigger"] > 0.5).astype(np.int8)
    trial = out["trial"]
    frac = np.flatnonzero(trial != np.round(trial))
    if frac.size:
        raise where.fail(f"column {cols['trial']!r} (trial) holds non-integer ids at "
                         f"{where.rows(frac)} (e.g. {float(trial[frac[0]])}); expected whole numbers,"
                         " -1 between trials")
    out["trial"] = trial.astype(np.int32)
    for name, xc, yc in targets:
        tx, ty = raw[xc] * pos, raw[yc] * pos
        absent = ~(np.isfinite(tx) & np.isfinite(ty))
        if absent.all():
            raise where.fail(f"target {name!r} (columns {xc!r}, {yc!r}) is never visible (NaN "
                             "in every row); remove it from the targets or fix the export")
        tx[absent] = np.nan
        ty[absent] = np.nan
        out[f"{name}_x_mm"], out[f"{name}_y_mm"] = tx, ty
    _check_trials(out, [t[0] for t in targets], spec, where, cols.get("trial", "trial"))

    table = pd.DataFrame(out)
    dt = np.diff(t_s)
    med = float(np.median(dt))
    units = {"t_rig_s": "s", "x_mm": "mm", "y_mm": "mm", "heading_rad": "rad",
             "turn_rad_s": "rad/s", "bout": "1", "vigor": "rig units", "trial": "id",
             "trigger": "1"}
    units.update({f"{nm}_{a}_mm": "mm" for nm, _, _ in targets for a in "xy"})
    table.attrs = {"units": units, "targets": [t[0] for t in targets], "source": str(path)}
    report = {
        "n_rows": int(n), "span_s": float(t_s[-1] - t_s[0]), "median_rate_hz": 1.0 / med,
        "jitter_ms_p99": float(np.percentile(np.abs(dt - med), 99) * 1e3),
        "repaired_rows": int(repaired.sum()),
        "not_logged": [c for c in CANONICAL_COLUMNS if c not in cols],
        "targets": [t[0] for t in targets],
    }
    return table, report


def _check_trials(out: Mapping[str, NDArray[Any]], names: list[str], spec: LogSpec,
                  where: _Where, col: str) -> None:
    trial = out["trial"]
    ids, first, counts = np.unique(trial, return_index=True, return_counts=True)
    keep = ids >= 0
    if not keep.any():
        raise where.fail(f"column {col!r} (trial) has no trial (every row is -1)")
    visible = np.zeros(trial.size, dtype=bool)
    for nm in names:
        visible |= np.isfinite(out[f"{nm}_x_mm"])
    seen = np.zeros(ids.size, dtype=np.int64)
    np.add.at(seen, np.searchsorted(ids, trial), visible)
    for tid, i0, cnt, vis in zip(ids[keep], first[keep], counts[keep], seen[keep], strict=True):
        if cnt < spec.min_trial_rows:
            raise where.fail(f"trial {tid} (column {col!r}, {where.row(int(i0))}) is empty: "
                             f"{cnt} row(s), expected at least {spec.min_trial_rows}")
        if names and vis == 0:
            raise where.fail(f"trial {tid} (column {col!r}, from {where.row(int(i0))}) is empty:"
                             f" no target visible in any of its {cnt} rows")
