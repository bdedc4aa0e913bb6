"""Run every ``tests/benchmarks/bench_*.py`` and write one table (Markdown and JSON).

``python -m tests.benchmarks.run [--quick] [--only NAME]``. Each benchmark module exposes
``run(quick: bool) -> list[dict]`` whose rows carry ``name, figure, baseline, ratio, goal,
passed, unit, note``; ours and the baseline are measured in the same process.
"""

from __future__ import annotations

import argparse
import importlib
import json
import os
import platform
import sys
import time
import traceback
from pathlib import Path

HERE = Path(__file__).resolve().parent
OUT = HERE.parents[1] / "bench-results"


def machine_info() -> dict[str, object]:
    import numpy as np

    info: dict[str, object] = {
        "cores": os.cpu_count(), "python": platform.python_version(),
        "machine": platform.machine(), "numpy": np.__version__,
    }
    try:
        from threadpoolctl import threadpool_info

        info["blas"] = [f"{p.get('internal_api')} {p.get('version')} "
                        f"({p.get('num_threads')} threads)" for p in threadpool_info()]
    except ImportError:
        info["blas"] = "unknown"
    for dist in ("scipy", "dask", "zarr", "scikit-learn", "numba"):
        from importlib import metadata

        try:
            info[dist] = metadata.version(dist)
        except metadata.PackageNotFoundError:
            pass
    return info


def _fmt(v: object) -> str:
    if isinstance(v, float):
        return f"{v:.3g}"
    return "" if v is None else str(v)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="small sizes (a smoke run)")
    ap.add_argument("--only", help="run bench_<ONLY>.py only")
    args = ap.parse_args(argv)
    sys.path.insert(0, str(HERE.parents[1]))
    rows: list[dict[str, object]] = []
    names = sorted(p.stem for p in HERE.glob("bench_*.py"))
    if args.only:
        names = [n for n in names if n == f"bench_{args.only}"]
    for name in names:
        t0 = time.perf_counter()
        print(f"== {name}", flush=True)
        try:
            mod = importlib.import_module(f"tests.benchmarks.{name}")
            got = mod.run(args.quick)
        except Exception as exc:  # a broken benchmark is a row, not a crash of the table
            traceback.print_exc()
            got = [{"name": name, "note": f"FAILED: {type(exc).__name__}: {exc}",
                    "passed": False}]
        for r in got:
            r.setdefault("module", name)
            print("   ", {k: _fmt(v) for k, v in r.items()}, flush=True)
        rows.extend(got)
        print(f"   ({time.perf_counter() - t0:.0f} s)", flush=True)
    OUT.mkdir(exist_ok=True)
    info = machine_info()
    (OUT / "bench.json").write_text(json.dumps({"machine": info, "rows": rows}, indent=1,
                                               default=str))
    cols = ("name", "figure", "baseline", "ratio", "goal", "passed", "unit", "note")
    lines = ["# forkmap benchmarks", "", "Machine: " + ", ".join(f"{k}={v}" for k, v in
                                                               info.items()), "",
             "| " + " | ".join(cols) + " |", "|" + "---|" * len(cols)]
    for r in rows:
        cells = []
        for c in cols:
            v = r.get(c)
            cells.append("pass" if v is True else "MISS" if v is False else _fmt(v))
        lines.append("| " + " | ".join(cells) + " |")
    (OUT / "bench.md").write_text("\n".join(lines) + "\n")
    print("\n".join(lines))
    print(f"\nwritten: {OUT / 'bench.md'} and bench.json")
    return 0


if __name__ == "__main__":
    sys.exit(main())
