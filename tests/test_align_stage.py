"""The behaviour and align stage wrappers against their kernels run eagerly."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from pipeline.align import ClockModel
from pipeline.align.stages import acquired_plane_times, align_kernels, read_times, run_align
from pipeline.behaviour import LogSpec, read_log
from pipeline.behaviour.stages import behaviour_kernels, run_behaviour
from pipeline.config import BehaviourSettings, ImagingSettings, SyncSettings
from pipeline.errors import InputError
from pipeline.store import Store

OFFSET_S, DRIFT_PPM = 7.3, 40.0
N_VOL, N_PLANES, RATE_HZ = 60, 6, 2.0


class _Settings:
    def __init__(self, log: Path, raw: str) -> None:
        self.behaviour = BehaviourSettings(log=log)
        self.imaging = ImagingSettings(raw=raw, voxel_size_um=(4.0, 1.5, 1.5),
                                       volume_rate_hz=RATE_HZ, planes_per_volume=N_PLANES,
                                       flyback_planes=(5,), flyback_s=0.05)
        self.sync = SyncSettings()


def write_session_log(rng: np.random.Generator, path: Path) -> None:
    """Two trials toward two static targets, a 200 Hz rig clock with offset and drift."""
    t_end = OFFSET_S + (1 + DRIFT_PPM * 1e-6) * N_VOL / RATE_HZ + 3.0
    # sample intervals 5 ms + N(0, 0.3 ms), accumulated: edges fall at every phase of a sample
    t = OFFSET_S - 3.0 + np.cumsum(0.005 + rng.normal(0, 3e-4, int((t_end - OFFSET_S + 3) / 0.005)))
    n = t.size
    trial = np.where(t < OFFSET_S + 15, 0, 1)
    heading = np.pi / 2 + 0.3 * np.sin(t)
    turn = np.gradient(np.unwrap(heading), t)
    x = np.cumsum(np.cos(heading)) * 0.005
    y = np.cumsum(np.sin(heading)) * 0.005
    trig = np.zeros(n)
    vol_rig = OFFSET_S + (1 + DRIFT_PPM * 1e-6) * np.arange(N_VOL) / RATE_HZ
    trig[np.searchsorted(t, vol_rig[np.arange(N_VOL) != 17])] = 1      # volume 17 dropped
    pd.DataFrame({"time_s": t, "x_mm": x, "y_mm": y, "heading_rad": heading, "turn": turn,
                  "bout": (rng.random(n) < 0.1).astype(int), "vigor": rng.random(n),
                  "trial": trial, "t0_x_mm": -5.0, "t0_y_mm": 20.0, "t1_x_mm": 5.0,
                  "t1_y_mm": 20.0, "trigger": trig}).to_csv(path, index=False)


def run_stage(fn, name: str, settings, root: Path) -> Store:
    base = Store(root)
    sub = base.stage_store(name, "test", resumable=False)
    fn(settings, sub, None)
    sub.commit()
    return base


@pytest.fixture
def session(rng, tmp_path):
    log = tmp_path / "rig.csv"
    write_session_log(rng, log)
    settings = _Settings(log, str(tmp_path / "raw" / "*.tif"))
    root = tmp_path / "out"
    base = Store(root)
    ingest = base.stage_store("ingest", "test", resumable=False)    # a stand-in for ingest
    ingest.create_volumes(shape=(N_VOL, N_PLANES - 1, 4, 4), chunks=(1, N_PLANES - 1, 4, 4),
                          voxel_size_um=(4.0, 1.5, 1.5), interval_s=1 / RATE_HZ)
    ingest.commit()
    return settings, root


def test_behaviour_stage_matches_kernels(session):
    settings, root = session
    store = run_stage(run_behaviour, "behaviour", settings, root)
    table, report = read_log(settings.behaviour.log, LogSpec.from_settings(settings.behaviour))
    ref = behaviour_kernels(table, settings.behaviour)
    pd.testing.assert_frame_equal(store.read_table("behaviour.parquet"), table,
                                  check_like=False)
    np.testing.assert_array_equal(store.read_array("behaviour/bearing_rad")[...],
                                  ref["bearing_rad"])
    assert store.read_array("behaviour/bearing_rad").attrs["targets"] == ["t0", "t1"]
    bouts = store.read_table("bouts.parquet")
    np.testing.assert_array_equal(bouts["onset_rig_s"], ref["bouts"]["onset_s"])
    meta = json.loads(pq.read_schema(root / "behaviour.parquet").metadata[b"forkmap"])
    assert meta["units"]["heading_rad"] == "rad" and meta["clock"] == "rig"
    assert meta["report"]["n_rows"] == report["n_rows"]
    assert store.read_array("behaviour/density").shape == (
        store.read_array("behaviour/y_edges_mm").shape[0] - 1,
        store.read_array("behaviour/x_edges_mm").shape[0] - 1)


def test_align_stage_matches_kernels_and_recovers_clock(session):
    settings, root = session
    run_stage(run_behaviour, "behaviour", settings, root)
    store = run_stage(run_align, "align", settings, root)
    info_clock = store.read_array("align/plane_times_s").attrs["clock_model"]
    model = ClockModel.from_dict(info_clock)
    assert model.offset_s == pytest.approx(OFFSET_S, abs=1e-3)
    assert model.drift_ppm == pytest.approx(DRIFT_PPM, abs=20)   # 30 s session: loose drift
    assert model.dropped_volume_indices == (17,)
    pt = store.read_array("align/plane_times_s")[...]
    assert pt.shape == (N_VOL, N_PLANES - 1)
    # demo rule: plane period (0.5 - 0.05) / 6 planes acquired, flyback plane 5 dropped
    np.testing.assert_allclose(pt[1], 0.5 + np.arange(5) * 0.075)
    table = store.read_table("behaviour.parquet")
    geometry = {k: store.read_array(f"behaviour/{k}")[...]
                for k in ("bearing_rad", "distance_mm", "subtended_rad", "bisector_rad")}
    _, kept, _, ref = align_kernels(
        table, geometry, store.read_table("bouts.parquet")["onset_rig_s"].to_numpy(),
        acquired_plane_times(settings.imaging, N_VOL), [0, 1, 2, 3, 4], settings.sync)
    for name, arr in ref.items():
        got = store.read_array(f"align/{name}")
        np.testing.assert_array_equal(got[...], arr)
        assert got.shape[:2] == (N_VOL, N_PLANES - 1)
    assert store.read_array("align/bearing_rad").shape == (N_VOL, N_PLANES - 1, 2)
    assert tuple(store.read_array("align/heading_rad").metadata.dimension_names) == ("t", "z")


def test_read_times_names_the_line(tmp_path):
    p = tmp_path / "pulses.csv"
    p.write_text("time_s\n0.5\n1.0\nabc\n")
    with pytest.raises(InputError, match=r"sync.timestamps .*pulses.csv: file line 4: 'abc' is "
                       "not a time"):
        read_times(p, what="sync.timestamps")
    p.write_text("0.5\n1.0\n")
    np.testing.assert_allclose(read_times(p, what="x"), [0.5, 1.0])
