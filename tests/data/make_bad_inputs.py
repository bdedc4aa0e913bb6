"""Generate the bad-input corpus: one folder per case, each a tiny session with one fault.

Every case starts from one small generated demo session (the *base*, 40 volumes of
4 x 24 x 32 voxels and its rig log) and corrupts exactly one thing: a TIFF file, a rig log
cell or column, the trigger pulses, or the config. The corpus is built at test time into a
temporary folder (``tests/test_bad_inputs.py``); to look at it, write it out with::

    python tests/data/make_bad_inputs.py OUT

which creates ``OUT/base/`` and ``OUT/<case>/forkmap.toml`` (plus the case's corrupted files)
for every case in :data:`CASES`. Cases never modify the base: a case that corrupts an input
copies it into its own folder first. Everything is deterministic (fixed seeds, no clock).

Each :class:`Case` says what the right outcome is: most faults must stop forkmap with exit
code 2 and one line naming the file and the page / row / column or config key; a few are
repaired with a warning (extra trigger pulses, a rig clock jump) and must exit 0.
"""

from __future__ import annotations

import re
import shutil
import sys
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import tifffile

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
for _p in (str(ROOT), str(ROOT / "tests")):
    if _p not in sys.path:
        sys.path.insert(0, _p)

from demo_session import demo_config  # noqa: E402

__all__ = ["Case", "CASES", "BASE_OVERRIDES", "make_base", "build_case", "main"]

#: The base session: the "small" demo preset cut down so that one run takes a few seconds.
BASE_OVERRIDES = {"imaging": {"n_volumes": 40, "shape_zyx": [4, 24, 32]},
                  "cells": {"n_cells": 20}}
_FAST = {"decode": "enabled = false", "tuning": "enabled = false", "report": "enabled = false"}


def make_base(folder: Path) -> Path:
    """Generate the base session into ``folder`` (both TIFF layouts; ~2 s)."""
    from demo_volume.generate import generate

    generate(folder, preset="small", seed=0, layout="both", preset_overrides=BASE_OVERRIDES)
    return folder


# ------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Case:
    """One bad input and the outcome forkmap must give.

    Attributes
    ----------
    name : str
        Folder name of the case.
    group : str
        ``"tiff"``, ``"log"``, ``"sync"`` or ``"config"``.
    match : str
        Regex the one stderr line must match (exit 2), or the warning recorded (exit 0).
    build : callable
        ``build(base, case_dir) -> config path``; writes the corrupted inputs and the config.
    stage : str or None
        The stage that must fail (and leave no record); None when the config itself fails.
    commands : tuple of str
        How the test runs it: ``"check"`` (``forkmap check``), ``"run"`` (``forkmap run``).
    exit_code : int
        2 for a clean failure; 0 for a fault forkmap repairs with a warning.
    needs_prebuilt : bool
        ``forkmap run`` starts from a copy of the base's finished output, so only the stages
        reading the changed input run again (behaviour, align) and the earlier stages' own
        warnings do not reach stderr.
    """

    name: str
    group: str
    match: str
    build: Callable[[Path, Path], Path]
    stage: str | None
    commands: tuple[str, ...] = ("check",)
    exit_code: int = 2
    needs_prebuilt: bool = False


def _config(base: Path, case: Path, *, raw: str | None = None, log: Path | None = None,
            layout: str = "per-volume", edit: Callable[[str], str] | None = None) -> Path:
    """Write ``case/forkmap.toml``: the demo config for the base, with the case's inputs."""
    case.mkdir(parents=True, exist_ok=True)
    path = demo_config(base, case / "out", case, layout=layout)
    text = path.read_text()
    for section, line in _FAST.items():
        text, n = re.subn(rf"^\[{section}\]$", f"[{section}]\n{line}", text, flags=re.M)
        if n == 0:
            text += f"\n[{section}]\n{line}\n"
    if raw is not None:
        text = re.sub(r"^raw = .*$", f'raw = "{raw}"', text, count=1, flags=re.M)
    if log is not None:
        text = re.sub(r"^log = .*$", f'log = "{log.as_posix()}"', text, count=1, flags=re.M)
    if edit is not None:
        text = edit(text)
    path.write_text(text)
    return path


def _set(text: str, section: str, key: str, value: str) -> str:
    """Set ``key = value`` in ``[section]`` (replacing it, or adding it after the header)."""
    body = re.search(rf"^\[{section}\]$(.*?)(?=^\[|\Z)", text, flags=re.M | re.S)
    assert body is not None, section
    block = body.group(1)
    new, n = re.subn(rf"^{key} = .*$", f"{key} = {value}", block, count=1, flags=re.M)
    if n == 0:
        new = f"\n{key} = {value}" + block
    return text[:body.start(1)] + new + text[body.end(1):]


# --- TIFF cases -----------------------------------------------------------------------------
def _copy_raw(base: Path, case: Path) -> Path:
    raw = case / "raw"
    shutil.copytree(base / "raw", raw)
    return raw


def _tiff(build_raw: Callable[[Path], None]) -> Callable[[Path, Path], Path]:
    def build(base: Path, case: Path) -> Path:
        raw = _copy_raw(base, case)
        build_raw(raw)
        return _config(base, case, raw=f"{raw.as_posix()}/vol_*.tif")
    return build


def _vol(raw: Path, i: int) -> Path:
    return raw / f"vol_{i:05d}.tif"


def _truncate(raw: Path) -> None:
    p = _vol(raw, 7)
    data = p.read_bytes()
    p.write_bytes(data[: len(data) // 2])


def _zero_bytes(raw: Path) -> None:
    _vol(raw, 3).write_bytes(b"")


def _write_planes(path: Path, vol: np.ndarray) -> None:
    """One page per plane, as the rig (and the demo generator) writes a volume."""
    tifffile.imwrite(path, vol, photometric="minisblack", metadata=None)


def _retype(dtype: str, index: int) -> Callable[[Path], None]:
    def build(raw: Path) -> None:
        p = _vol(raw, index)
        _write_planes(p, tifffile.imread(p).astype(dtype))
    return build


def _mixed_shape(raw: Path) -> None:
    p = _vol(raw, 12)
    _write_planes(p, tifffile.imread(p)[:, :20, :])


def _one_page_volume(raw: Path) -> None:
    p = _vol(raw, 2)
    tifffile.imwrite(p, tifffile.imread(p), photometric="minisblack", planarconfig="separate",
                     metadata=None)   # the 4 planes as the samples of one page


def _mixed_pages(raw: Path) -> None:
    p = _vol(raw, 9)
    vol = tifffile.imread(p)
    with tifffile.TiffWriter(p) as tw:
        tw.write(vol[0])
        tw.write(vol[1, :, :16])   # page 1 is narrower than page 0
        tw.write(vol[2])
        tw.write(vol[3])


def _missing_index(raw: Path) -> None:
    _vol(raw, 17).unlink()


def _duplicate_index(raw: Path) -> None:
    shutil.copyfile(_vol(raw, 5), raw / "vol_5.tif")


def _wrong_page_count(raw: Path) -> None:
    p = _vol(raw, 20)
    _write_planes(p, tifffile.imread(p)[:3])


def _not_a_tiff(raw: Path) -> None:
    (raw / "vol_00040.tif").write_text("time_s,x_mm\n0.0,1.0\n")


def _stack(build_stack: Callable[[Path], None]) -> Callable[[Path, Path], Path]:
    def build(base: Path, case: Path) -> Path:
        stack = case / "raw_stack"
        shutil.copytree(base / "raw_stack", stack)
        build_stack(stack / "stack.tif")
        return _config(base, case, raw=f"{stack.as_posix()}/stack.tif", layout="stack")
    return build


def _short_last_volume(p: Path) -> None:
    with tifffile.TiffFile(p) as tif:
        pages = [pg.asarray() for pg in tif.pages]  # type: ignore[union-attr]
    tifffile.imwrite(p, np.stack(pages[:-1]), bigtiff=True)  # 159 of 160 pages


def _truncate_stack(p: Path) -> None:
    data = p.read_bytes()
    p.write_bytes(data[: int(len(data) * 0.6)])


# --- rig log cases ----------------------------------------------------------------------------
def _log(edit: Callable[[pd.DataFrame], pd.DataFrame | None], *,
         cfg: Callable[[str], str] | None = None) -> Callable[[Path, Path], Path]:
    def build(base: Path, case: Path) -> Path:
        case.mkdir(parents=True, exist_ok=True)
        df = pd.read_csv(base / "rig_log.csv")
        out = edit(df)
        df = df if out is None else out
        log = case / "rig_log.csv"
        df.to_csv(log, index=False, float_format="%.6f")
        return _config(base, case, log=log, edit=cfg)
    return build


def _drop_column(df: pd.DataFrame) -> pd.DataFrame:
    return df.drop(columns=["heading_rad"])


def _text_cell(df: pd.DataFrame) -> pd.DataFrame:
    df["x_mm"] = df["x_mm"].astype(object)
    df.loc[1234, "x_mm"] = "n/a?"   # file line 1236
    return df


def _long_nan_run(df: pd.DataFrame) -> None:
    df.loc[2000:2039, "y_mm"] = np.nan   # 40 rows = 0.2 s at 200 Hz, limit 0.05 s


def _nan_at_start(df: pd.DataFrame) -> None:
    df.loc[0:2, "heading_rad"] = np.nan


def _time_backwards(df: pd.DataFrame) -> None:
    df.loc[3000, "time_s"] = df.loc[2990, "time_s"]


def _duplicate_stamp(df: pd.DataFrame) -> None:
    df.loc[2500, "time_s"] = df.loc[2499, "time_s"]


def _ms_as_s(df: pd.DataFrame) -> None:
    df["time_s"] = df["time_s"] * 1000.0   # the rig wrote ms; the config says time_unit = "s"


def _shuffled(df: pd.DataFrame) -> pd.DataFrame:
    return df.sample(frac=1.0, random_state=0).reset_index(drop=True)


def _empty_trial(df: pd.DataFrame) -> None:
    between = np.flatnonzero(df["trial"].to_numpy() == -1)
    df.loc[int(between[len(between) // 2]), "trial"] = 9   # a trial of one row


def _no_target_in_trial(df: pd.DataFrame) -> None:
    rows = df["trial"] == 1
    for c in ("t0_x_mm", "t0_y_mm", "t1_x_mm", "t1_y_mm", "t2_x_mm", "t2_y_mm"):
        df.loc[rows, c] = np.nan


def _target_never_visible(df: pd.DataFrame) -> None:
    df["t1_x_mm"] = np.nan
    df["t1_y_mm"] = np.nan


def _fractional_trial(df: pd.DataFrame) -> None:
    df["trial"] = df["trial"].astype(float)
    df.loc[4000, "trial"] = 1.5


def _garbage_log(base: Path, case: Path) -> Path:
    case.mkdir(parents=True, exist_ok=True)
    log = case / "rig_log.csv"
    log.write_bytes(bytes(range(256)) * 8)
    return _config(base, case, log=log)


# --- trigger / clock cases (seen by the align stage) -----------------------------------------
def _edges(df: pd.DataFrame) -> np.ndarray:
    trig = df["trigger"].to_numpy()
    return np.flatnonzero((trig[1:] > 0.5) & (trig[:-1] <= 0.5)) + 1


def _pulse_rows(df: pd.DataFrame, edge: int) -> np.ndarray:
    trig = df["trigger"].to_numpy()
    stop = edge
    while stop < trig.size and trig[stop] > 0.5:
        stop += 1
    return np.arange(edge, stop)


def _no_triggers(df: pd.DataFrame) -> None:
    df["trigger"] = 0


def _too_few_triggers(df: pd.DataFrame) -> None:
    edges = _edges(df)
    for e in edges[10:18]:         # 8 of 38 pulses lost: 30 of 40 volumes matched (< 0.9)
        df.loc[_pulse_rows(df, int(e)), "trigger"] = 0


def _extra_pulses(df: pd.DataFrame) -> None:
    edges = _edges(df)
    for k in (5, 14, 30):          # one short pulse 40% of the way to the next volume's pulse
        row = int(edges[k] + 0.4 * (edges[k + 1] - edges[k]))
        df.loc[row:row + 1, "trigger"] = 1


def _clock_jump(df: pd.DataFrame) -> None:
    edges = _edges(df)
    start = int(edges[19] + 30)    # between two pulses, mid-session
    df.loc[start:, "time_s"] = df.loc[start:, "time_s"] + 0.3


def _log_too_short(df: pd.DataFrame) -> pd.DataFrame:
    edges = _edges(df)
    return df.iloc[: int(edges[14])].copy()   # the log stops after 14 of 40 volumes


# --- config cases -----------------------------------------------------------------------------
def _cfg(edit: Callable[[str], str]) -> Callable[[Path, Path], Path]:
    def build(base: Path, case: Path) -> Path:
        return _config(base, case, edit=edit)
    return build


def _missing_config(base: Path, case: Path) -> Path:
    case.mkdir(parents=True, exist_ok=True)
    return case / "no_such_config.toml"


def _invalid_toml(text: str) -> str:
    return text.replace("[imaging]", "[imaging", 1)


def _missing_log(base: Path, case: Path) -> Path:
    return _config(base, case, log=case / "no_such_log.csv")


CASES: tuple[Case, ...] = (
    # TIFF input
    Case("tiff_truncated", "tiff", r"vol_00007\.tif: the file is truncated or damaged after "
         r"page 0 ", _tiff(_truncate), "ingest", ("check", "run")),
    Case("tiff_zero_bytes", "tiff", r"vol_00003\.tif: the file is empty \(0 bytes\)",
         _tiff(_zero_bytes), "ingest"),
    Case("tiff_float32", "tiff", r"vol_00000\.tif: page 0 has dtype float32; expected one of",
         _tiff(_retype("float32", 0)), "ingest"),
    Case("tiff_int32_one_file", "tiff", r"vol_00011\.tif: page 0 has shape \(24, 32\) int32; "
         r"expected \(24, 32\) uint16", _tiff(_retype("int32", 11)), "ingest"),
    Case("tiff_mixed_shapes", "tiff", r"vol_00012\.tif: page 0 has shape \(20, 32\)",
         _tiff(_mixed_shape), "ingest"),
    Case("tiff_mixed_page_shapes", "tiff", r"vol_00009\.tif: page 1 has shape \(24, 16\)",
         _tiff(_mixed_pages), "ingest"),
    Case("tiff_missing_index", "tiff", r"vol_00018\.tif: file index jumps from 16 .* missing "
         r"file indices 17\.\.17", _tiff(_missing_index), "ingest"),
    Case("tiff_duplicate_index", "tiff", r"vol_0*5\.tif: duplicated file index 5 \(also in "
         r".*vol_0*5\.tif\)", _tiff(_duplicate_index), "ingest"),
    Case("tiff_wrong_page_count", "tiff", r"vol_00020\.tif: 3 pages; expected "
         r"imaging\.planes_per_volume = 4", _tiff(_wrong_page_count), "ingest"),
    Case("tiff_not_a_tiff", "tiff", r"vol_00040\.tif: not a readable TIFF",
         _tiff(_not_a_tiff), "ingest"),
    Case("stack_short_last_volume", "tiff", r"stack\.tif: the stack holds 159 pages in all, "
         r"not a multiple of imaging\.planes_per_volume = 4",
         _stack(_short_last_volume), "ingest"),
    Case("tiff_one_page_volume", "tiff", r"vol_00002\.tif: page 0 has shape \(4, 24, 32\); "
         r"expected a 2-D \(y, x\) plane", _tiff(_one_page_volume), "ingest"),
    Case("stack_truncated", "tiff", r"stack\.tif: the file is truncated or damaged after page "
         r"\d+ ", _stack(_truncate_stack), "ingest"),
    # rig log
    Case("log_missing_column", "log", r"rig_log\.csv: column 'heading_rad' \(for heading\) "
         r"not found", _log(_drop_column), "behaviour", ("check", "run"), needs_prebuilt=True),
    Case("log_text_in_number", "log", r"rig_log\.csv: file line 1236, column 'x_mm': value "
         r"'n/a\?' is not a number", _log(_text_cell), "behaviour"),
    Case("log_long_nan_run", "log", r"rig_log\.csv: column 'y_mm' \(y\) is missing from file "
         r"line 2002 to file line 2041 \(40 rows", _log(_long_nan_run), "behaviour"),
    Case("log_nan_at_start", "log", r"rig_log\.csv: column 'heading_rad' \(heading\) is "
         r"missing from file line 2 to file line 4 .*at the start of the log",
         _log(_nan_at_start), "behaviour"),
    Case("log_time_backwards", "log", r"rig_log\.csv: time \(column 'time_s'\) runs backwards "
         r"at file lines 3002", _log(_time_backwards), "behaviour"),
    Case("log_duplicated_stamps", "log", r"rig_log\.csv: duplicated time stamps \(column "
         r"'time_s'\) at file lines 2502", _log(_duplicate_stamp), "behaviour"),
    Case("log_ms_declared_as_s", "log", r"rig_log\.csv: column 'time_s' read as time_unit = "
         r"'s' implies a rig rate of 0\.1\d* Hz.*time_unit = 'ms' it would be 199\.\d Hz", _log(_ms_as_s),
         "behaviour"),
    Case("log_rows_shuffled", "log", r"rig_log\.csv: rows out of order: time \(column "
         r"'time_s'\) steps backwards", _log(_shuffled), "behaviour"),
    Case("log_empty_trial", "log", r"rig_log\.csv: trial 9 \(column 'trial', file line \d+\) "
         r"is empty: 1 row", _log(_empty_trial), "behaviour"),
    Case("log_trial_without_target", "log", r"rig_log\.csv: trial 1 \(column 'trial', from "
         r"file line \d+\) is empty: no target visible", _log(_no_target_in_trial),
         "behaviour"),
    Case("log_target_never_visible", "log", r"rig_log\.csv: target 't1' \(columns 't1_x_mm', "
         r"'t1_y_mm'\) is never visible", _log(_target_never_visible), "behaviour"),
    Case("log_fractional_trial", "log", r"rig_log\.csv: column 'trial' \(trial\) holds "
         r"non-integer ids at file lines 4002", _log(_fractional_trial), "behaviour"),
    Case("log_not_text", "log", r"rig_log\.csv: file line 1 \(byte 0\) holds a NUL byte: not a text CSV",
         _garbage_log, "behaviour"),
    # triggers and clocks: the align stage
    Case("sync_no_trigger_edges", "sync", r"rig_log\.csv, column 'trigger': no trigger pulse",
         _log(_no_triggers), "align", ("run",), needs_prebuilt=True),
    Case("sync_too_few_triggers", "sync", r"rig_log\.csv, column 'trigger': only 30 of 40 "
         r"imaging events .*sync\.min_match_fraction = 0\.9", _log(_too_few_triggers),
         "align", ("run",), needs_prebuilt=True),
    Case("sync_log_shorter_than_imaging", "sync", r"rig_log\.csv: the log covers .* s of rig "
         r"time .*shorter than the imaging session", _log(_log_too_short), "align", ("run",),
         needs_prebuilt=True),
    Case("sync_extra_pulses", "sync", r"3 trigger pulses? (were|was) spurious",
         _log(_extra_pulses), "align", ("run",), exit_code=0, needs_prebuilt=True),
    Case("sync_clock_jump", "sync", r"rig clock jumps by 3\d\d\.\d ms .*fitted piecewise",
         _log(_clock_jump), "align", ("run",), exit_code=0, needs_prebuilt=True),
    # configs
    Case("config_missing_file", "config", r"config file .*no_such_config\.toml does not exist",
         _missing_config, None, ("check", "run")),
    Case("config_invalid_toml", "config", r"forkmap\.toml: not valid TOML",
         _cfg(_invalid_toml), None),
    Case("config_unknown_section", "config", r"forkmap\.toml: unknown section \[imagin\]",
         _cfg(lambda t: t + '\n[imagin]\nraw = "x"\n'), None),
    Case("config_unknown_key", "config", r"forkmap\.toml: .*imaging\.planes_per_volum\b",
         _cfg(lambda t: _set(t, "imaging", "planes_per_volum", "4")), None, ("check", "run")),
    Case("config_wrong_type", "config", r"forkmap\.toml: .*imaging\.planes_per_volume",
         _cfg(lambda t: _set(t, "imaging", "planes_per_volume", '"four"')), None),
    Case("config_bad_glob", "config", r"forkmap\.toml: imaging\.raw = .*matches no file",
         lambda b, c: _config(b, c, raw=f"{(b / 'raw').as_posix()}/volume_*.tif"), None),
    Case("config_missing_log", "config", r"forkmap\.toml: .*behaviour\.log.*no_such_log\.csv",
         _missing_log, None),
    Case("config_scheduler_typo", "config", r"forkmap\.toml: \[compute\] scheduler = 'thread': expected one of .*did you "
         r"mean 'threads'",
         _cfg(lambda t: _set(t, "compute", "scheduler", '"thread"')), None, ("check", "run")),
    Case("config_negative_voxel", "config", r"forkmap\.toml: .*imaging\.voxel_size_um",
         _cfg(lambda t: _set(t, "imaging", "voxel_size_um", "[4.0, -1.5, 1.5]")), None),
    Case("config_zero_rate", "config", r"forkmap\.toml: .*imaging\.volume_rate_hz",
         _cfg(lambda t: _set(t, "imaging", "volume_rate_hz", "0.0")), None),
    Case("config_bad_plane_order", "config", r"forkmap\.toml: .*imaging\.plane_order",
         _cfg(lambda t: _set(t, "imaging", "plane_order", '"ascend"')), None),
    Case("config_match_fraction_above_one", "config",
         r"forkmap\.toml: .*sync\.min_match_fraction",
         _cfg(lambda t: _set(t, "sync", "min_match_fraction", "1.5")), None),
    Case("config_bad_time_unit", "config", r"forkmap\.toml: .*behaviour\.time_unit",
         _cfg(lambda t: _set(t, "behaviour", "time_unit", '"sec"')), None),
    Case("config_flyback_out_of_range", "config", r"forkmap\.toml: \[imaging\] flyback_planes = \[7\]: indices must be below "
         r"planes_per_volume = 4", _cfg(lambda t: _set(t, "imaging", "flyback_planes", "[7]")),
         None),
)


def build_case(case: Case, base: Path, folder: Path) -> Path:
    """Write one case into ``folder`` (created); returns the config path to run."""
    folder.mkdir(parents=True, exist_ok=True)
    return case.build(base, folder)


def main(argv: list[str] | None = None) -> int:
    """``python tests/data/make_bad_inputs.py OUT``: write the base and every case."""
    args = sys.argv[1:] if argv is None else argv
    if len(args) != 1:
        print("usage: make_bad_inputs.py OUT", file=sys.stderr)
        return 2
    out = Path(args[0]).resolve()
    base = make_base(out / "base")
    for case in CASES:
        cfg = build_case(case, base, out / case.name)
        print(f"{case.name:34s} {cfg}")
    print(f"{len(CASES)} cases in {out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
