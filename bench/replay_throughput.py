"""Replay throughput on demo-city days, beside a plain numpy floor measured in the same run.

    python -m bench.replay_throughput --vehicles 420      # about 1 M fixes

The floor reads the same columns, assigns H3 cells and counts per (cell, bucket) with numpy:
what any pipeline must at least do. The figure is the full replay: decode and validate every
row with the per-message schema, run the engine, and write the --trips training set.
"""

from __future__ import annotations

import argparse
import resource
import tempfile
import time
from pathlib import Path

import h3
import numpy as np
import pyarrow.parquet as pq

from ingest.citysim import CityConfig, write_parquet
from replay.training import replay_trips


def numpy_floor(path: Path, resolution: int = 8, bucket_s: int = 60) -> tuple[float, int]:
    """Seconds to read lat/lon/event_ts, assign cells and count per (cell, bucket)."""
    t0 = time.perf_counter()
    t = pq.read_table(path, columns=["lat", "lon", "event_ts"])
    lat = t.column("lat").to_numpy(zero_copy_only=False)
    lon = t.column("lon").to_numpy(zero_copy_only=False)
    ev = t.column("event_ts").to_numpy(zero_copy_only=False)
    ok = np.isfinite(lat) & np.isfinite(lon) & np.isfinite(ev) & (np.abs(lat) <= 90) & (
        np.abs(lon) <= 180)
    to_int = h3.str_to_int
    cells = np.fromiter((to_int(h3.latlng_to_cell(a, b, resolution))
                         for a, b in zip(lat[ok].tolist(), lon[ok].tolist(), strict=True)),
                        dtype=np.uint64, count=int(ok.sum()))
    buckets = (ev[ok] // bucket_s).astype(np.int64)
    keys = np.stack([cells.astype(np.int64), buckets], axis=1)
    uniq = np.unique(keys, axis=0, return_counts=True)[1]
    return time.perf_counter() - t0, len(uniq)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--vehicles", type=int, default=445, help="445 gives about 1 M fixes")
    ap.add_argument("--hours", type=float, default=24.0)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--data", default=None, help="directory for generated days (cached)")
    args = ap.parse_args()
    data = Path(args.data or tempfile.gettempdir()) / "cellpulse-bench"
    data.mkdir(parents=True, exist_ok=True)
    src = data / f"day-s{args.seed}-v{args.vehicles}-h{args.hours:g}.parquet"
    if not src.exists():
        t0 = time.perf_counter()
        write_parquet(src, CityConfig(seed=args.seed, vehicles=args.vehicles, hours=args.hours))
        print(f"generated {src} in {time.perf_counter() - t0:.1f} s")
    rows = pq.ParquetFile(src).metadata.num_rows
    floor_s, groups = numpy_floor(src)
    t0 = time.perf_counter()
    summary = replay_trips([src], data / "trips.parquet", dead_letters=data / "dead.parquet")
    replay_s = time.perf_counter() - t0
    rss_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    fig = rows / replay_s
    floor = rows / floor_s
    print(f"rows {rows:,}  (cell-buckets counted by the floor: {groups:,})")
    print(f"replay --trips   {fig:>12,.0f} fixes/s  ({replay_s:.2f} s, one core)")
    print(f"numpy floor      {floor:>12,.0f} fixes/s  ({floor_s:.2f} s)")
    print(f"ratio            {fig / floor:>12.3f}")
    print(f"training rows {summary.training_rows:,}; peak RSS {rss_mb:,.0f} MiB")


if __name__ == "__main__":
    main()
