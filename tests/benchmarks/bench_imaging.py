"""Benchmark of the imaging path (motion + summary images + traces) on a synthetic session.

The session is written straight into a zarr array (no TIFFs): a fixed random-blob volume seen
through a field of view moved by a random shift per volume, plus Gaussian noise; cells are
balls at some of the blob centres. Measured in one run:

(a) our path (1 worker) / one plain read + decompress pass over the same zarr (goal <= 3);
(b) the same path written with reference libraries (skimage phase_cross_correlation per volume,
    scipy.ndimage.shift, a registered copy, boolean-mask means per cell) / ours (goal >= 5),
    on a subset of volumes, with the shift errors of both against the truth;
(c) peak RSS of our path at N and 2N volumes, each in its own subprocess (goal flat within
    15 %, under 2 GB);
(d) 2 workers on a distributed LocalCluster vs 1 (goal >= 1.7x, identical outputs), with the
    machine's capacity for two workers at that moment (two independent 1-worker runs at
    once vs one alone) as the bound it is read against.

(a) times the three passes fused in one task per block (register, accumulate, sample), the
least the imaging path can do. The pipeline runs them as its stages must, since cells are
found between the two: the motion stage (reference block summed, re-registered, then every
volume registered and accumulated) and the traces stage's sampling pass, reading every volume
twice; (a') times exactly those stage task functions on the same data.
"""

from __future__ import annotations

import hashlib
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import scipy.ndimage as ndi
import zarr

ROOT = Path(__file__).resolve().parents[2]
VOXEL_UM = (4.0, 1.5, 1.5)
UPSAMPLE = 20


def make_session(folder: Path, n_vol: int, shape: tuple[int, int, int], *, seed: int = 0
                 ) -> tuple[str, np.ndarray, np.ndarray]:
    """Write a synthetic session; returns (volumes path, true shifts (n, 3), cell labels)."""
    rng = np.random.default_rng(seed)
    pad = (2, 8, 8)
    big_shape = tuple(s + 2 * p for s, p in zip(shape, pad, strict=True))
    n_blob = int(np.prod(big_shape) / 400)
    centres = np.column_stack([rng.integers(0, s, n_blob) for s in big_shape])
    big = np.zeros(big_shape, np.float32)
    big[tuple(centres.T)] = rng.uniform(500, 1500, n_blob)
    big = ndi.gaussian_filter(big, (0.7, 1.2, 1.2)) * 15 + 100
    shifts = np.column_stack([rng.integers(-1, 2, n_vol), rng.integers(-6, 7, n_vol),
                              rng.integers(-6, 7, n_vol)]).astype(np.float64)
    from pipeline.config import ImagingSettings
    from pipeline.store import blosc

    path = str(folder / "volumes.zarr")
    # the codec the ingest stage writes by default (Blosc lz4 + bit-shuffle): zarr's own
    # default (zstd) decompresses about twice as slowly and made the read pass, the
    # baseline of the first row, slower than on a real session
    arr = zarr.create_array(path, shape=(n_vol, *shape), chunks=(1, *shape), dtype="uint16",
                            compressors=blosc(ImagingSettings.codec, ImagingSettings.codec_level),
                            overwrite=True)
    for t in range(n_vol):
        # content displaced by +shift: volume_t(r) = reference(r - shift)
        sl = tuple(slice(p - int(s), p - int(s) + n)
                   for p, s, n in zip(pad, shifts[t], shape, strict=True))
        vol = big[sl] + rng.normal(0, 8, shape).astype(np.float32)
        arr[t] = np.clip(vol, 0, 65535).astype(np.uint16)
    labels = np.zeros(shape, np.int32)
    inner = centres - np.array(pad)
    ok = np.all((inner >= 2) & (inner < np.array(shape) - 2), axis=1)
    zz, yy, xx = np.indices((3, 5, 5)) - np.array([1, 2, 2])[:, None, None, None]
    ball = (zz * 4.0) ** 2 + (yy * 1.5) ** 2 + (xx * 1.5) ** 2 <= 3.0**2
    offs = np.argwhere(ball) - np.array([1, 2, 2])
    for i, c in enumerate(inner[ok][: max(1, int(ok.sum()) // 2)]):
        p = c + offs
        labels[tuple(p.T)] = i + 1
    # a later ball can cover an earlier one completely: number the cells left 1..n
    present, consecutive = np.unique(labels, return_inverse=True)
    labels = consecutive.reshape(labels.shape).astype(np.int32)
    assert present[0] == 0
    return path, shifts, labels


_CPU: dict[str, float] = {}  # process CPU seconds of the last timed runs (1 worker only)


def _read_pass(path: str, *, reused: bool = False) -> float:
    """One plain read + decompress pass (``arr[t]``, the baseline); ``reused``: through the
    stages' reused-buffer reader instead (reported beside it, not the baseline)."""
    from pipeline.store import VolumeReader

    arr = zarr.open_array(path, mode="r")
    get = VolumeReader(arr) if reused else (lambda t: np.asarray(arr[t]))
    c0 = time.process_time()
    t0 = time.perf_counter()
    total = 0.0
    for t in range(arr.shape[0]):
        total += float(get(t)[0, 0, 0])
    seconds = time.perf_counter() - t0
    if not reused:
        _CPU["read"] = min(_CPU.get("read", np.inf), time.process_time() - c0)
    return seconds


def _path_task(group: tuple[int, int], vpath: str, ref_path: str, weights_path: str,
               options: dict, spill_dir: str | None = None
               ) -> tuple[np.ndarray, object, np.ndarray, np.ndarray]:
    """One block of our path: register, accumulate summary sums, sample the cells (the sums
    are written under ``spill_dir`` and returned as a handle when given, as the stage does
    on process workers)."""
    from pipeline.store import VolumeReader
    from pipeline.volumes.motion import register_volume
    from pipeline.volumes.motion_stage import load_reference
    from pipeline.volumes.sampling import sample_volume
    from pipeline.volumes.summary import SummaryAccumulator
    from pipeline.volumes.traces import _cached_weights

    read = VolumeReader(zarr.open_array(vpath, mode="r"))   # one reused buffer, as the stages
    reference, prep = load_reference(ref_path, options)   # conditioned once per process
    w = _cached_weights(weights_path)
    acc = SummaryAccumulator.empty(reference.shape, offset=reference, dtype="float32")
    n = group[1] - group[0]
    shifts = np.zeros((n, 3))
    cell = np.empty((w.cell.shape[0], n), np.float32)
    neu = np.empty_like(cell)
    for i, t in enumerate(range(*group)):
        vol = read(t)
        shifts[i] = register_volume(vol, prep, upsample=UPSAMPLE)[0]
        acc.update_shifted(vol, shifts[i])
        cell[:, i], neu[:, i] = sample_volume(vol, shifts[i], w)
    if spill_dir is not None:
        return shifts, acc.spill(f"{spill_dir}/sums_{group[0]}"), cell, neu
    return shifts, acc, cell, neu


def _merge(total: tuple, part: tuple, *, offset: np.ndarray) -> tuple:
    """Fold one block's results into the running total, in volume order (as the stage)."""
    from pipeline.volumes.motion_stage import _merge_groups

    _, _, acc = _merge_groups(([], [], total[1]), ([], [], part[1]), offset=offset)
    return (total[0] + part[0], acc, total[2] + part[2], total[3] + part[3])


def _first(part: tuple) -> tuple:
    return [part[0]], part[1], [part[2]], [part[3]]


def _warm(vpath: str, ref_path: str, weights_path: str, options: dict) -> None:
    _path_task((0, 1), vpath, ref_path, weights_path, options)


def _path_task_listed(group: tuple[int, int], *args: object) -> tuple:
    return _first(_path_task(group, *args))  # type: ignore[arg-type]


def our_path(vpath: str, labels: np.ndarray, work: Path, *, scheduler: str = "threads",
             workers: int = 1, block: int = 8) -> tuple[float, dict]:
    """Run our imaging path; returns (seconds, outputs).

    The blocks are folded in volume order as they finish (``Compute.reduce``, as the motion
    stage does), so memory holds about one summary accumulator per running task.
    """
    from functools import partial

    from pipeline.compute import Compute
    from pipeline.config import ComputeSettings
    from pipeline.volumes.motion_stage import (
        _resolve,
        content_hash,
        spill_directory,
        volume_groups,
    )
    from pipeline.volumes.sampling import build_weights
    from pipeline.volumes.traces import _save_weights

    arr = zarr.open_array(vpath, mode="r")
    n = arr.shape[0]
    ref_path = str(work / "reference.zarr")
    ref = np.asarray(arr[0], dtype=np.float32)
    ref_arr = zarr.create_array(ref_path, shape=ref.shape, dtype="float32", overwrite=True)
    ref_arr[...] = ref
    ref_arr.attrs["content_hash"] = content_hash(ref)     # as the motion stage writes it
    weights_path = str(work / "weights")
    _save_weights(weights_path, build_weights(labels, voxel_size_um=VOXEL_UM))
    # the motion stage's defaults: estimation on 2 x 2 binned planes, high-pass in y and x
    options = {"highpass_sigma_vox": (0.0, 6.0, 6.0), "bin_yx": 2}
    groups = volume_groups(0, n, block=block, n_tasks=16)  # as the motion stage cuts them
    compute = Compute(ComputeSettings(scheduler=scheduler, workers=workers), quiet=True)
    try:
        # warm up (imports, compiled kernels, cached weights) on every worker, untimed
        if compute.client is not None:
            compute.client.run(_warm, vpath, ref_path, weights_path, options)
        else:
            _warm(vpath, ref_path, weights_path, options)
        spill = spill_directory(compute, work / "sums")
        c0 = time.process_time()
        t0 = time.perf_counter()
        shifts, acc, cell, neu = compute.reduce(_path_task_listed, groups, vpath, ref_path,
                                                weights_path, options, spill,
                                                merge=partial(_merge, offset=ref))
        mean, corr = _resolve(acc, ref, 26).finalize()
        seconds = time.perf_counter() - t0
        _CPU["ours"] = time.process_time() - c0
    finally:
        compute.close()
    out = {"shifts": np.concatenate(shifts), "mean": mean, "corr": corr,
           "cell": np.concatenate(cell, axis=1), "neuropil": np.concatenate(neu, axis=1)}
    return seconds, out


def stage_passes(vpath: str, labels: np.ndarray, work: Path, *, reference_count: int = 50,
                 n_vol: int | None = None) -> float:
    """Seconds of the motion stage's passes and the traces stage's sampling pass, run with
    the stages' own task functions, partitions and defaults (1 worker), on the first
    ``n_vol`` volumes (all by default)."""
    from functools import partial

    from pipeline.compute import Compute
    from pipeline.config import ComputeSettings, MotionSettings, TracesSettings
    from pipeline.volumes.motion_stage import (
        _block_registered_sum,
        _block_sum,
        _merge_groups,
        _register_group,
        clear_reference_cache,
        content_hash,
        volume_groups,
    )
    from pipeline.volumes.sampling import build_weights
    from pipeline.volumes.traces import _extract_one, _save_weights

    m, ts = MotionSettings(), TracesSettings()
    arr = zarr.open_array(vpath, mode="r")
    n = int(arr.shape[0]) if n_vol is None else min(int(arr.shape[0]), n_vol)
    opts = {"bin_yx": m.bin_yx, "tukey_alpha": m.tukey_alpha,
            "highpass_sigma_vox": (0.0, m.highpass_sigma_um / VOXEL_UM[1],
                                   m.highpass_sigma_um / VOXEL_UM[2]),
            "max_shift_vox": tuple(2 * m.max_shift_um / v for v in VOXEL_UM)}
    weights_path = str(work / "stage_weights")
    _save_weights(weights_path, build_weights(labels, voxel_size_um=VOXEL_UM))
    ref_path = str(work / "stage_reference.zarr")
    ref_arr = zarr.create_array(ref_path, shape=arr.shape[1:], dtype="float32", overwrite=True)
    shifts_path = str(work / "stage_shifts.zarr")
    out = {name: str(work / f"stage_{name}.zarr") for name in ("raw", "neuropil")}
    for path in out.values():
        zarr.create_array(path, shape=(int(labels.max()), n), dtype="float32", overwrite=True,
                          chunks=(max(1, min(int(labels.max()), 4096)), ts.block_volumes))
    ref_groups = volume_groups(0, min(n, reference_count), block=m.block_volumes, n_tasks=16)
    compute = Compute(ComputeSettings(scheduler="threads", workers=1), quiet=True)
    try:
        c0 = time.process_time()
        t0 = time.perf_counter()
        # each reference written with its content hash, as the motion stage does
        for fn, extra in ((_block_sum, ()), (_block_registered_sum, (ref_path, opts, m.upsample))):
            sums = compute.map(fn, ref_groups, vpath, *extra)
            ref = (np.sum(sums, axis=0) / min(n, reference_count)).astype(np.float32)
            ref_arr[...] = ref
            ref_arr.attrs["content_hash"] = content_hash(ref)
        groups = volume_groups(0, n, block=m.block_volumes, n_tasks=n)
        reference = ref                       # the refined reference just written
        shift_blocks, _q, acc = compute.reduce(
            _register_group, groups, vpath, ref_path, opts, m.upsample, m.neighbourhood, True,
            merge=partial(_merge_groups, offset=reference, neighbourhood=m.neighbourhood))
        clear_reference_cache()
        acc.finalize()
        zarr.create_array(shifts_path, shape=(n, 3), dtype="float64",
                          overwrite=True)[...] = np.concatenate(shift_blocks)
        compute.map(_extract_one, list(range(0, n, ts.block_volumes)), n, ts.block_volumes,
                    vpath, shifts_path, weights_path, out["raw"], out["neuropil"])
        seconds = time.perf_counter() - t0
        _CPU["stages"] = time.process_time() - c0
    finally:
        compute.close()
    return seconds


def naive_path(vpath: str, labels: np.ndarray, work: Path, n_vol: int) -> tuple[float, dict]:
    """The same path with reference libraries, on the first ``n_vol`` volumes.

    Register each volume (skimage phase_cross_correlation), write a registered copy
    (scipy.ndimage.shift, linear), then the mean and local-correlation images from that copy
    and each cell's mean through a boolean mask per cell.
    """
    from skimage.registration import phase_cross_correlation

    arr = zarr.open_array(vpath, mode="r")
    reference = np.asarray(arr[0], dtype=np.float32)
    t0 = time.perf_counter()
    reg = zarr.create_array(str(work / "registered.zarr"), shape=(n_vol, *arr.shape[1:]),
                            chunks=(1, *arr.shape[1:]), dtype="float32", overwrite=True)
    shifts = np.zeros((n_vol, 3))
    for t in range(n_vol):
        vol = np.asarray(arr[t], dtype=np.float32)
        shifts[t] = -phase_cross_correlation(reference, vol, upsample_factor=UPSAMPLE)[0]
        reg[t] = ndi.shift(vol, -shifts[t], order=1, mode="nearest")
    total = np.zeros(arr.shape[1:])
    for t in range(n_vol):
        total += reg[t]
    # local correlation: Pearson over time of each voxel with the mean of its 26 neighbours
    # (3x3x3 box mean without the centre), from a second pass over the registered copy
    mean = total / n_vol
    sxn = np.zeros_like(total)
    sxx = np.zeros_like(total)
    snn = np.zeros_like(total)
    nb_sum = np.zeros_like(total)
    for t in range(n_vol):
        x = np.asarray(reg[t], dtype=np.float64)
        nb = (ndi.uniform_filter(x, size=3, mode="nearest") * 27 - x) / 26
        nb_sum += nb
        sxn += (x - mean) * nb
        sxx += (x - mean) ** 2
        snn += nb * nb
    nb_mean = nb_sum / n_vol
    var_n = snn / n_vol - nb_mean**2
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = (sxn / n_vol) / np.sqrt(sxx / n_vol * var_n)
    masks = [labels == i for i in range(1, int(labels.max()) + 1)]
    cell = np.empty((len(masks), n_vol), np.float32)
    for t in range(n_vol):
        v = np.asarray(reg[t])
        for i, m in enumerate(masks):
            cell[i, t] = v[m].mean()
    seconds = time.perf_counter() - t0
    return seconds, {"shifts": shifts, "mean": mean, "corr": corr, "cell": cell}


def _digest(out: dict) -> str:
    h = hashlib.sha256()
    for k in sorted(out):
        h.update(np.ascontiguousarray(out[k]).tobytes())
    return h.hexdigest()


def _rss_child(n_vol: int, shape: tuple[int, int, int]) -> None:
    """Subprocess body: make a session of n_vol volumes, run our path, print peak RSS."""
    with tempfile.TemporaryDirectory() as tmp:
        vpath, _, labels = make_session(Path(tmp), n_vol, shape)
        base = _peak_rss_kib()
        our_path(vpath, labels, Path(tmp))
        peak = _peak_rss_kib()
    print(json.dumps({"peak_mb": peak / 1024, "after_setup_mb": base / 1024}))


def _peak_rss_kib() -> float:
    """Peak resident set of this process in KiB: ``VmHWM`` from /proc/self/status on Linux.

    Not ``getrusage(RUSAGE_SELF).ru_maxrss``: Linux carries the parent's resident set at
    fork into the child's ``ru_maxrss`` across exec, so a child started by a big parent (the
    naive baseline's per-cell masks take ~4 GB) reported the parent's size, not its own.
    """
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return float(line.split()[1])
    except OSError:
        pass
    return float(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)


def _timed_child(vpath: str, labels_path: str, work: str) -> None:
    """Subprocess body: one warm 1-worker run of our path on an existing session; prints s."""
    labels = np.load(labels_path)
    Path(work).mkdir(parents=True, exist_ok=True)
    print(json.dumps({"seconds": our_path(vpath, labels, Path(work))[0]}))


def _capacity(vpath: str, labels: np.ndarray, work: Path) -> float:
    """What the shared machine offers two workers now: two independent 1-worker runs of our
    path started together, each in its own process, against one run alone (throughput ratio:
    2.0 on two free cores). A 2-worker speed-up cannot exceed it; measured next to the
    cluster run because the other users' load changes from minute to minute."""
    labels_path = str(work / "capacity_labels.npy")
    np.save(labels_path, labels)

    def start(k: int) -> subprocess.Popen:
        code = (f"import sys; sys.path.insert(0, {str(ROOT)!r}); sys.path.insert(0, "
                f"{str(ROOT / 'tests' / 'benchmarks')!r}); import bench_imaging as b; "
                f"b._timed_child({vpath!r}, {labels_path!r}, {str(work / f'cap{k}')!r})")
        return subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE,
                                stderr=subprocess.DEVNULL, text=True, cwd=ROOT)

    def seconds(proc: subprocess.Popen) -> float:
        out, _ = proc.communicate()
        return float(json.loads(out.strip().splitlines()[-1])["seconds"])

    alone = seconds(start(0))
    pair = [start(1), start(2)]
    both = max(seconds(p) for p in pair)
    return 2.0 * alone / both


def _rss(n_vol: int, shape: tuple[int, int, int]) -> float:
    code = (f"import sys; sys.path.insert(0, {str(ROOT)!r}); sys.path.insert(0, "
            f"{str(ROOT / 'tests' / 'benchmarks')!r}); import bench_imaging as b; "
            f"b._rss_child({n_vol}, {tuple(shape)!r})")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, cwd=ROOT)
    return float(json.loads(out.stdout.strip().splitlines()[-1])["peak_mb"])


def run(quick: bool) -> list[dict]:
    shape, n_vol, n_naive = ((12, 128, 128), 48, 16) if quick else ((30, 256, 256), 400, 40)
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        vpath, truth, labels = make_session(work, n_vol, shape)
        truth = truth - truth[0]  # the reference is volume 0
        t_read = min(_read_pass(vpath) for _ in range(2))
        t_reused = min(_read_pass(vpath, reused=True) for _ in range(2))
        # best of 2 (the machine is shared; the CPU time is the smaller of the two runs)
        t_ours, ours = our_path(vpath, labels, work)
        cpu_first = _CPU["ours"]
        t_again, _ = our_path(vpath, labels, work)
        t_ours, _CPU["ours"] = min(t_ours, t_again), min(cpu_first, _CPU["ours"])
        err = float(np.abs(ours["shifts"] - truth).max())
        rows.append({
            "name": f"imaging path / one read pass ({n_vol} x {'x'.join(map(str, shape))})",
            "figure": t_ours, "baseline": t_read, "ratio": t_ours / t_read, "goal": 3.0,
            "passed": bool(t_ours / t_read <= 3.0), "unit": "s",
            "note": f"motion + summary images + cell/neuropil sampling, 1 worker; "
                    f"{int(labels.max())} cells; max shift error {err:.3f} vox; CPU-time "
                    f"ratio {_CPU['ours'] / _CPU['read']:.2f} (less sensitive to a shared "
                    f"machine's load); the read pass through the stages' reused-buffer "
                    f"reader took {t_reused:.2f} s (ratio to it {t_ours / t_reused:.2f})",
        })
        stage_passes(vpath, labels, work, n_vol=2)  # warm up (compiled kernels), untimed
        t_stages = stage_passes(vpath, labels, work)
        cpu_first = _CPU["stages"]
        t_stages = min(t_stages, stage_passes(vpath, labels, work))  # best of 2
        _CPU["stages"] = min(cpu_first, _CPU["stages"])
        rows.append({
            "name": "imaging stages as the pipeline runs them / one read pass",
            "figure": t_stages, "baseline": t_read, "ratio": t_stages / t_read, "goal": 3.0,
            "passed": bool(t_stages / t_read <= 3.0), "unit": "s",
            "note": "motion stage passes (50-volume reference block twice, then all volumes) "
                    "+ traces sampling pass, with the stages' task functions and defaults, "
                    "1 worker: every volume is read twice, as cells are found in between; "
                    f"CPU-time ratio {_CPU['stages'] / _CPU['read']:.2f}",
        })
        t_naive, naive = naive_path(vpath, labels, work, n_naive)
        per_naive = t_naive / n_naive
        per_ours = t_ours / n_vol
        err_naive = float(np.abs(naive["shifts"] - truth[:n_naive]).max())
        ratio = per_naive / per_ours
        rows.append({
            "name": "imaging path: reference-library version / ours (per volume)",
            "figure": per_ours, "baseline": per_naive, "ratio": ratio, "goal": 5.0,
            "passed": bool(ratio >= 5.0 and err <= max(err_naive, 0.1)), "unit": "s/volume",
            "note": f"baseline phase_cross_correlation + ndimage.shift + registered zarr copy + "
                    f"mean/local-correlation passes + boolean-mask means on the first "
                    f"{n_naive} volumes; max shift error ours "
                    f"{err:.3f}, baseline {err_naive:.3f} vox",
        })
        t1, out1 = t_ours, ours
        t2, out2 = our_path(vpath, labels, work, scheduler="local-cluster", workers=2)
        same = _digest(out1) == _digest(out2)
        t_again, out2 = our_path(vpath, labels, work, scheduler="local-cluster", workers=2)
        t2, same = min(t2, t_again), same and _digest(out1) == _digest(out2)  # best of 2
        capacity = _capacity(vpath, labels, work)
        rows.append({
            "name": "imaging path: 2-worker LocalCluster speed-up over 1 worker",
            "figure": t2, "baseline": t1, "ratio": t1 / t2, "goal": 1.7,
            "passed": bool(t1 / t2 >= 1.7 and same), "unit": "s",
            "note": f"outputs identical: {same}; machine has 2 cores shared with others; "
                    f"machine capacity for two workers measured right after: "
                    f"{capacity:.2f} (two independent 1-worker runs at once vs one alone, "
                    f"2.0 = two free cores; the speed-up cannot exceed it)",
        })
    rss_1 = _rss(n_vol, shape)
    rss_2 = _rss(2 * n_vol, shape)
    growth = rss_2 / rss_1
    rows.append({
        "name": f"imaging path peak RSS, {2 * n_vol} vs {n_vol} volumes",
        "figure": rss_2, "baseline": rss_1, "ratio": growth, "goal": 1.15,
        "passed": bool(growth <= 1.15 and rss_2 < 2048), "unit": "MB",
        "note": "each run in its own subprocess (peak resident set, VmHWM)",
    })
    return rows


if __name__ == "__main__":
    for row in run(quick="--full" not in sys.argv):
        print(row)
