"""Replay throughput and memory on demo-city days, beside a plain numpy floor in the same run.

    python -m bench.replay_throughput                 # 1, 2 and 4 days of 445 vehicles
    python -m bench.replay_throughput --quick         # 45 vehicles: a smoke run
    python -m bench.replay_throughput --profile prof.txt   # pyinstrument of the 1-day replay

Input: demo days (``ingest.citysim.write_parquet``) of 445 vehicles x 24 h, about 1.0 M fixes
each, cached under the data directory. 1 M fixes is one day, 2 M two consecutive days, 4 M
four: the input grows in length (time), not in fleet size, as a longer history does.

The figure is the full ``replay --trips`` (the whole catalog: vehicle, trip and cell families
as of each pickup's arrival, labels from the dropoff): read and validate every row, order by
arrival, run the engine, answer the lookups, write the training set and the dead letters.
Each size runs in its own fresh process, so its peak RSS (``ru_maxrss``) is its own.
"Per core" is fixes per second of the process's CPU time (the machine is shared: wall time is
reported beside it). The floor reads the same columns, assigns H3 cells and counts per
(cell, bucket) with numpy: what any pipeline must at least do.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path
from typing import Any

import h3
import numpy as np
import pyarrow.parquet as pq

from bench.common import BenchEnv, BenchOptions, Figure
from ingest.citysim import CityConfig, write_parquet

FULL_VEHICLES = 445  # x 24 h: about 1.0 M fixes a day
QUICK_VEHICLES = 45  # about 0.1 M a day
FIRST_DAY = dt.date(2026, 6, 1)
DAYS = (1, 2, 4)
TARGET_RATE = 500_000.0  # fixes/s per core
TARGET_RATIO = 0.5  # of the numpy floor
TARGET_MEMORY = 1.2  # peak RSS of the longest input / of one day
TARGET = "≥ 500 k fixes/s per core and ≥ 0.5 × floor"


def _log(text: str) -> None:
    print(f"[replay] {text}", file=sys.stderr, flush=True)


def day_files(opts: BenchOptions, days: int) -> list[Path]:
    """The first ``days`` demo days (generated once, cached under the data directory)."""
    vehicles = QUICK_VEHICLES if opts.quick else FULL_VEHICLES
    data = Path(opts.data_dir or tempfile.gettempdir()) / "cellpulse-bench"
    data.mkdir(parents=True, exist_ok=True)
    out = []
    for i in range(days):
        day = (FIRST_DAY + dt.timedelta(days=i)).isoformat()
        path = data / f"day-{day}-s{opts.seed + i}-v{vehicles}.parquet"
        if not path.exists():
            t0 = time.perf_counter()
            tmp = path.with_name(f".{path.name}.{os.getpid()}")
            write_parquet(tmp, CityConfig(seed=opts.seed + i, vehicles=vehicles, day=day))
            tmp.replace(path)
            _log(f"generated {path.name} in {time.perf_counter() - t0:.1f} s")
        out.append(path)
    return out


def rows_of(paths: list[Path]) -> int:
    return sum(pq.ParquetFile(p).metadata.num_rows for p in paths)


def numpy_floor(paths: list[Path], resolution: int = 8, bucket_s: int = 60
                ) -> tuple[float, float, int]:
    """(CPU s, wall s, cell-buckets) to read lat/lon/event_ts, assign cells and count per
    (cell, bucket), file by file."""
    c0, t0 = time.process_time(), time.perf_counter()
    groups = 0
    to_int = h3.str_to_int
    for path in paths:
        t = pq.read_table(path, columns=["lat", "lon", "event_ts"])
        lat = t.column("lat").to_numpy(zero_copy_only=False)
        lon = t.column("lon").to_numpy(zero_copy_only=False)
        ev = t.column("event_ts").to_numpy(zero_copy_only=False)
        ok = (np.isfinite(lat) & np.isfinite(lon) & np.isfinite(ev) & (np.abs(lat) <= 90)
              & (np.abs(lon) <= 180))
        cells = np.fromiter((to_int(h3.latlng_to_cell(a, b, resolution))
                             for a, b in zip(lat[ok].tolist(), lon[ok].tolist(), strict=True)),
                            dtype=np.uint64, count=int(ok.sum()))
        buckets = (ev[ok] // bucket_s).astype(np.int64)
        keys = np.stack([cells.astype(np.int64), buckets], axis=1)
        groups += len(np.unique(keys, axis=0))
    return time.process_time() - c0, time.perf_counter() - t0, groups


def child(out_dir: str, inputs: list[str]) -> dict[str, Any]:
    """One replay --trips in this process: what it did, its CPU and wall time, peak RSS."""
    from replay.training import replay_trips

    base_rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    c0, t0 = time.process_time(), time.perf_counter()
    summary = replay_trips(inputs, Path(out_dir) / "trips.parquet",
                           dead_letters=Path(out_dir) / "dead.parquet")
    cpu, wall = time.process_time() - c0, time.perf_counter() - t0
    return {"rows": summary.rows, "training_rows": summary.training_rows,
            "rejected": summary.stats.get("rejected_total"), "cpu_s": cpu, "wall_s": wall,
            "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
            "rss_after_imports_mb": base_rss / 1024}


def replay_in_subprocess(inputs: list[Path]) -> dict[str, Any]:
    with tempfile.TemporaryDirectory(prefix="cellpulse-bench-") as tmp:
        cmd = [sys.executable, "-m", "bench.replay_throughput", "--child", tmp,
               *map(str, inputs)]
        done = subprocess.run(cmd, check=True, capture_output=True, text=True,
                              cwd=Path(__file__).resolve().parent.parent)
        return json.loads(done.stdout.strip().splitlines()[-1])


def run(opts: BenchOptions, env: BenchEnv) -> list[Figure]:
    del env  # no servers: replay runs in process memory
    runs: dict[int, dict[str, Any]] = {}
    for days in DAYS:
        inputs = day_files(opts, days)
        got = replay_in_subprocess(inputs)
        runs[days] = got
        _log(f"{days} day(s), {got['rows']:,} fixes: {got['cpu_s']:.1f} s CPU, "
             f"{got['wall_s']:.1f} s wall, {got['rows'] / got['cpu_s']:,.0f} fixes/s per core, "
             f"peak RSS {got['peak_rss_mb']:,.0f} MB")
    figures: list[Figure] = []
    for days in (DAYS[0], DAYS[-1]):
        inputs = day_files(opts, days)
        floor_cpu, floor_wall, groups = numpy_floor(inputs)
        got = runs[days]
        rate = got["rows"] / got["cpu_s"]
        floor = got["rows"] / floor_cpu
        _log(f"floor over {days} day(s): {floor:,.0f} fixes/s per core ({groups:,} cell-buckets)")
        figures.append(Figure(
            "replay", f"replay --trips, {got['rows'] / 1e6:.1f} M fixes ({days} day(s)), "
                      "per core", rate, "fixes/s", floor,
            "numpy: read columns, H3 cells, count per (cell, bucket)",
            target=TARGET, met=rate >= TARGET_RATE and rate >= TARGET_RATIO * floor,
            extra={"rows": got["rows"], "cpu_s": round(got["cpu_s"], 2),
                   "wall_s": round(got["wall_s"], 2),
                   "wall_fixes_per_s": round(got["rows"] / got["wall_s"]),
                   "floor_cpu_s": round(floor_cpu, 2), "floor_wall_s": round(floor_wall, 2),
                   "training_rows": got["training_rows"], "rejected": got["rejected"]}))
    one = runs[DAYS[0]]
    for days in DAYS:
        got = runs[days]
        growth = (got["cpu_s"] / one["cpu_s"]) / (got["rows"] / one["rows"])
        figures.append(Figure(
            "replay", f"replay --trips time, {got['rows'] / 1e6:.1f} M fixes ({days} day(s))",
            got["cpu_s"], "s", better="lower",
            target="grows linearly (time per fix as for 1 day)",
            extra={"wall_s": round(got["wall_s"], 2), "cpu_per_fix_vs_1_day": round(growth, 3),
                   "rows": got["rows"]}))
    for days in (DAYS[0], DAYS[-1]):
        got = runs[days]
        ratio = got["peak_rss_mb"] / one["peak_rss_mb"]
        figures.append(Figure(
            "replay", f"replay --trips peak RSS, {got['rows'] / 1e6:.1f} M fixes ({days} day(s))",
            got["peak_rss_mb"], "MB", better="lower",
            target=f"≤ {TARGET_MEMORY} × the 1-day figure",
            met=None if days == DAYS[0] else ratio <= TARGET_MEMORY,
            extra={"vs_1_day": round(ratio, 3),
                   "rss_after_imports_mb": round(got["rss_after_imports_mb"], 1)}))
    return figures


def profile(opts: BenchOptions, out: str) -> None:
    """The 1-day replay under pyinstrument (``pip install pyinstrument``), as text."""
    from pyinstrument import Profiler

    from replay.training import replay_trips

    inputs = day_files(opts, 1)
    with tempfile.TemporaryDirectory() as tmp:
        prof = Profiler(interval=0.001)
        prof.start()
        summary = replay_trips(inputs, Path(tmp) / "trips.parquet",
                               dead_letters=Path(tmp) / "dead.parquet")
        prof.stop()
    Path(out).write_text(prof.output_text(unicode=True, color=False, show_all=False))
    print(f"{summary.rows:,} fixes under the profiler; profile in {out}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="45-vehicle days (a smoke run)")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--data-dir", help="keep the generated days here (default: a temp dir)")
    ap.add_argument("--profile", metavar="FILE",
                    help="instead: profile the 1-day replay with pyinstrument into FILE")
    ap.add_argument("--child", nargs="+", metavar=("OUT_DIR", "INPUT"), help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        print(json.dumps(child(args.child[0], args.child[1:])))
        return
    opts = replace(BenchOptions(), quick=args.quick, seed=args.seed, data_dir=args.data_dir)
    if args.profile:
        profile(opts, args.profile)
        return
    figures = run(opts, BenchEnv())
    print(f"{'what':60} {'value':>12} {'unit':>8} {'floor':>10} {'ratio':>6} {'met':>4}")
    for f in figures:
        met = "" if f.met is None else ("yes" if f.met else "NO")
        ratio = f"{f.ratio:6.2f}" if f.floor else ""
        floor = f"{f.floor:10,.0f}" if f.floor else ""
        print(f"{f.what:60} {f.value:12,.1f} {f.unit:>8} {floor:>10} {ratio:>6} {met:>4}")


if __name__ == "__main__":
    main()
