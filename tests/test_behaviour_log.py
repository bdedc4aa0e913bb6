"""Rig log reader: canonical output, units, and one test per bad-input case."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.behaviour import LogSpec, read_log
from pipeline.errors import ForkmapError, InputError

RATE_HZ = 200.0


def make_log(rng: np.random.Generator, n: int = 400, *, n_trials: int = 2) -> pd.DataFrame:
    """A small log in the demo rig's column layout (two targets, one trial gap)."""
    t = np.arange(n) / RATE_HZ + 3.0
    trial = np.repeat(np.arange(n_trials), int(np.ceil(n / n_trials)))[:n]
    trial[n // n_trials - 5: n // n_trials] = -1
    heading = np.cumsum(rng.normal(0, 0.01, n))
    return pd.DataFrame({
        "time_s": t, "x_mm": np.cumsum(rng.normal(0, 0.01, n)),
        "y_mm": np.cumsum(rng.normal(0, 0.01, n)), "heading_rad": heading,
        "turn": rng.normal(0, 1, n), "bout": (rng.random(n) < 0.2).astype(int),
        "vigor": rng.random(n), "trial": trial,
        "t0_x_mm": np.full(n, 10.0), "t0_y_mm": np.full(n, 5.0),
        "t1_x_mm": np.linspace(10, 12, n), "t1_y_mm": np.full(n, -5.0),
        "trigger": (np.arange(n) % 100 == 0).astype(int),
    })


def write(df: pd.DataFrame, tmp_path: Path, name: str = "log.csv") -> Path:
    path = tmp_path / name
    if name.endswith(".parquet"):
        df.to_parquet(path)
    else:
        df.to_csv(path, index=False)
    return path


def test_reads_canonical_columns_and_units(rng, tmp_path):
    df = make_log(rng)
    table, report = read_log(write(df, tmp_path))
    assert list(table.columns[:9]) == ["t_rig_s", "x_mm", "y_mm", "heading_rad", "turn_rad_s",
                                       "bout", "vigor", "trial", "trigger"]
    assert table.attrs["targets"] == ["t0", "t1"]
    assert table.attrs["units"]["turn_rad_s"] == "rad/s"
    np.testing.assert_allclose(table["t_rig_s"], df["time_s"])
    np.testing.assert_allclose(table["t1_x_mm"], df["t1_x_mm"])
    assert table["trial"].dtype == np.int32 and table["bout"].dtype == np.int8
    # common practice: headings are reported wrapped to (-pi, pi]
    np.testing.assert_allclose(np.exp(1j * table["heading_rad"]), np.exp(1j * df["heading_rad"]))
    assert report["median_rate_hz"] == pytest.approx(RATE_HZ, rel=1e-6)
    assert report["repaired_rows"] == 0 and report["n_rows"] == len(df)


def test_parquet_and_csv_agree_and_chunking_does_not_matter(rng, tmp_path):
    df = make_log(rng)
    a, _ = read_log(write(df, tmp_path, "log.parquet"))
    b, _ = read_log(write(df, tmp_path), LogSpec(chunk_rows=37))
    pd.testing.assert_frame_equal(a, b)


def test_unit_conversion(rng, tmp_path):
    df = make_log(rng)
    raw = df.assign(time_s=df["time_s"] * 1e3, x_mm=df["x_mm"] * 1e3, y_mm=df["y_mm"] * 1e3,
                    heading_rad=np.rad2deg(df["heading_rad"]), turn=np.rad2deg(df["turn"]))
    spec = LogSpec(time_unit="ms", position_unit="um", angle_unit="deg",
                   targets=(("t0", "t0_x_mm", "t0_y_mm"),))
    table, _ = read_log(write(raw, tmp_path), spec)
    np.testing.assert_allclose(table["t_rig_s"], df["time_s"])
    np.testing.assert_allclose(table["x_mm"], df["x_mm"])
    np.testing.assert_allclose(table["turn_rad_s"], df["turn"])
    # t0 columns are in um in this file too: 10 mm logged as 10 um -> 0.01 mm
    np.testing.assert_allclose(table["t0_x_mm"], 0.01)
    assert table.attrs["targets"] == ["t0"]
    virt, _ = read_log(write(df, tmp_path, "v.csv"), LogSpec(position_unit="virtual",
                                                              position_scale_mm=0.5))
    np.testing.assert_allclose(virt["y_mm"], 0.5 * df["y_mm"])


def test_optional_columns_not_logged(rng, tmp_path):
    df = make_log(rng).drop(columns=["turn", "vigor", "trigger"])
    table, report = read_log(write(df, tmp_path))
    assert table["turn_rad_s"].isna().all() and (table["trigger"] == 0).all()
    assert report["not_logged"] == ["turn", "vigor", "trigger"]


def test_short_gap_repaired_by_linear_interpolation(rng, tmp_path):
    df = make_log(rng)
    truth = df["x_mm"].copy()
    df.loc[50:54, "x_mm"] = np.nan        # 5 rows: 30 ms between good samples < 50 ms
    df.loc[60:61, "heading_rad"] = np.nan
    table, report = read_log(write(df, tmp_path))
    # reference: numpy.interp between the bounding good samples
    expect = np.interp(df["time_s"][50:55], df["time_s"][[49, 55]], truth[[49, 55]])
    np.testing.assert_allclose(table["x_mm"][50:55], expect)
    assert report["repaired_rows"] == 7


def test_missing_column_suggests_closest(rng, tmp_path):
    df = make_log(rng).rename(columns={"heading_rad": "headng_rad"})
    with pytest.raises(InputError, match=r"column 'heading_rad' \(for heading\) not found; "
                       r"columns present: .*did you mean 'headng_rad'"):
        read_log(write(df, tmp_path))


def test_missing_target_column(rng, tmp_path):
    with pytest.raises(InputError, match=r"column 't2_x_mm' \(target 't2'\) not found"):
        read_log(write(make_log(rng), tmp_path), LogSpec(targets=(("t2", "t2_x_mm", "y"),)))


def test_non_numeric_cell_names_line_and_column(rng, tmp_path):
    df = make_log(rng).astype({"vigor": object})
    df.loc[123, "vigor"] = "fast"
    with pytest.raises(InputError, match=r"log.csv: file line 125, column 'vigor': value "
                       r"'fast' is not a number"):
        read_log(write(df, tmp_path), LogSpec(chunk_rows=50))


def test_long_nan_run_names_rows(rng, tmp_path):
    df = make_log(rng)
    df.loc[100:119, "y_mm"] = np.nan      # 20 rows: 105 ms > 50 ms
    with pytest.raises(InputError, match=r"column 'y_mm' \(y\) is missing from file line 102 "
                       r"to file line 121 \(20 rows, spanning 0.105 s\); runs up to max_gap_s"):
        read_log(write(df, tmp_path))


def test_nan_at_start_cannot_be_interpolated(rng, tmp_path):
    df = make_log(rng)
    df.loc[0:1, "turn"] = np.nan
    with pytest.raises(InputError, match=r"'turn' \(turn\) is missing from file line 2 to file "
                       r"line 3 \(2 rows, at the start of the log\)"):
        read_log(write(df, tmp_path))


def test_time_backwards(rng, tmp_path):
    df = make_log(rng)
    df.loc[200, "time_s"] = df.loc[198, "time_s"]
    with pytest.raises(InputError, match=r"runs backwards at file lines 202.*clock reset, or "
                       "rows out of order"):
        read_log(write(df, tmp_path))


def test_duplicated_stamps(rng, tmp_path):
    df = make_log(rng)
    df.loc[201, "time_s"] = df.loc[200, "time_s"]
    with pytest.raises(InputError, match=r"duplicated time stamps .* at file lines 203"):
        read_log(write(df, tmp_path))


def test_rows_shuffled(rng, tmp_path):
    df = make_log(rng).sample(frac=1.0, random_state=1)
    with pytest.raises(InputError, match=r"rows out of order: .* sort the file by time"):
        read_log(write(df, tmp_path))


def test_ms_declared_as_s(rng, tmp_path):
    df = make_log(rng)
    df["time_s"] *= 1e3
    with pytest.raises(InputError, match=r"implies a rig rate of 0.2 Hz, outside the plausible "
                       r"range 10-10000 Hz .*time_unit = 'ms' it would be 200 Hz"):
        read_log(write(df, tmp_path))


def test_empty_trial(rng, tmp_path):
    df = make_log(rng)
    df.loc[300, "trial"] = 7
    with pytest.raises(InputError, match=r"trial 7 \(column 'trial', file line 302\) is empty: "
                       "1 row"):
        read_log(write(df, tmp_path))


def test_trial_without_visible_target(rng, tmp_path):
    df = make_log(rng)
    last = df["trial"] == 1
    df.loc[last, ["t0_x_mm", "t1_x_mm"]] = np.nan
    with pytest.raises(InputError, match=r"trial 1 .* is empty: no target visible"):
        read_log(write(df, tmp_path))


def test_target_never_visible(rng, tmp_path):
    df = make_log(rng)
    df["t1_y_mm"] = np.nan
    with pytest.raises(InputError, match=r"target 't1' \(columns 't1_x_mm', 't1_y_mm'\) is never"
                       " visible"):
        read_log(write(df, tmp_path))


def test_non_integer_trial(rng, tmp_path):
    df = make_log(rng).astype({"trial": float})
    df.loc[10, "trial"] = 0.5
    with pytest.raises(InputError, match=r"non-integer ids at file lines 12"):
        read_log(write(df, tmp_path))


def test_missing_file_and_unknown_mapping(tmp_path):
    with pytest.raises(InputError, match=r"nope.csv: file does not exist"):
        read_log(tmp_path / "nope.csv")
    (tmp_path / "a.csv").write_text("time_s,x_mm\n0,1\n")
    with pytest.raises(InputError, match=r"unknown canonical column name\(s\) \['speed'\]"):
        read_log(tmp_path / "a.csv", LogSpec(columns={"speed": "x_mm"}))


@settings(max_examples=500, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_any_generated_log_reads_or_raises_our_error(tmp_path_factory, data):
    """Property: a corrupted log either reads (and is then valid) or raises a ForkmapError."""
    rng = np.random.default_rng(data.draw(st.integers(0, 2**31 - 1)))
    df = make_log(rng, n=60)
    n_bad = data.draw(st.integers(0, 3))
    for _ in range(n_bad):
        col = data.draw(st.sampled_from(list(df.columns)))
        row = data.draw(st.integers(0, len(df) - 1))
        val = data.draw(st.sampled_from([np.nan, "x", -1e9, 0.0, 1e9, ""]))
        df[col] = df[col].astype(object)
        df.loc[row, col] = val
    path = write(df, tmp_path_factory.mktemp("h"))
    try:
        table, report = read_log(path)
    except ForkmapError:
        return
    t = table["t_rig_s"].to_numpy()
    assert np.all(np.diff(t) > 0)
    animal = table[["x_mm", "y_mm", "heading_rad"]].to_numpy()
    assert np.isfinite(animal).all()
    assert report["n_rows"] == len(df)
