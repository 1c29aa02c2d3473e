"""The tape's cost: recording a consumer's batches, and replaying a tape beside its source file.

    python -m bench.tape --vehicles 200          # a demo day, about 450 k records

Recording: ``TapeWriter.write`` per batch of 500 decoded records, two writers (partitions
split as two consumers would), against a floor that only writes the same rows, already in
Arrow, with ``pyarrow.parquet.write_table``. Replay: ``replay_trips`` of the tape directory
against ``replay_trips`` of the same day as one JSON Lines file (the same engine work; the
tape adds reading many Parquet files and merging them by arrival).
"""

from __future__ import annotations

import argparse
import shutil
import tempfile
import time
import zlib
from pathlib import Path

import orjson
import pyarrow.parquet as pq

from featurestore.schema import decode_record
from ingest.citysim import CityConfig, write_jsonl
from ingest.records import SourceRecord
from ingest.tape import TapeWriter
from replay.training import replay_trips


def records_of(path: Path, partitions: int = 4) -> list[SourceRecord]:
    """Each line as a record keyed by its vehicle_id; lines without an arrival take the last."""
    out: list[SourceRecord] = []
    offsets = [0] * partitions
    last: int | None = None
    for line in path.read_bytes().split(b"\n")[:-1]:
        try:
            d = orjson.loads(line)
        except orjson.JSONDecodeError:
            d = None
        d = d if isinstance(d, dict) else {}
        ts = round(d["arrival_ts"] * 1000) if isinstance(d.get("arrival_ts"), float) else last
        last = ts
        vid = d.get("vehicle_id")
        key = vid.encode() if isinstance(vid, str) else None
        p = zlib.crc32(key) % partitions if key else 0
        out.append(SourceRecord(f"fixes:{p}", offsets[p], ts, key, line))
        offsets[p] += 1
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--vehicles", type=int, default=200)
    ap.add_argument("--hours", type=float, default=24.0)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--batch", type=int, default=500, help="records per write() call")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(prefix="cellpulse-bench-tape-") as tmp:
        work = Path(tmp)
        src = work / "day.jsonl"
        write_jsonl(src, CityConfig(seed=args.seed, vehicles=args.vehicles, hours=args.hours))
        recs = records_of(src)
        decoded = [decode_record(r.key, r.value, r.timestamp_ms) for r in recs]
        n = len(recs)

        t0 = time.perf_counter()
        writers = {name: TapeWriter(work / "tape", name, max_age_s=None) for name in ("a", "b")}
        by_writer: dict[str, list[int]] = {"a": [], "b": []}
        for i, r in enumerate(recs):
            by_writer["a" if r.partition in ("fixes:0", "fixes:1") else "b"].append(i)
        for name, idx in by_writer.items():
            w = writers[name]
            for lo in range(0, len(idx), args.batch):
                part = idx[lo:lo + args.batch]
                w.write([recs[i] for i in part], [decoded[i] for i in part])
            w.close()
        record_s = time.perf_counter() - t0
        files = [f for w in writers.values() for f in w.files]
        tables = [pq.read_table(f) for f in files]
        t0 = time.perf_counter()
        for k, t in enumerate(tables):
            pq.write_table(t, work / f"floor-{k}.parquet", compression="zstd")
        floor_s = time.perf_counter() - t0

        t0 = time.perf_counter()
        replay_trips([src], work / "a.parquet", dead_letters=work / "a-dl.parquet")
        file_s = time.perf_counter() - t0
        t0 = time.perf_counter()
        replay_trips([work / "tape"], work / "b.parquet", dead_letters=work / "b-dl.parquet")
        tape_s = time.perf_counter() - t0
        size = sum(f.stat().st_size for f in files)
        shutil.rmtree(work / "tape")

    print(f"records {n:,}; tape {len(files)} files, {size / 2**20:.1f} MiB "
          f"(source JSON Lines {src.name})")
    print(f"record (TapeWriter)        {n / record_s:>12,.0f} records/s  ({record_s:.2f} s)")
    print(f"floor (write_table only)   {n / floor_s:>12,.0f} records/s  ({floor_s:.2f} s)")
    print(f"ratio                      {floor_s / record_s:>12.3f}")
    print(f"replay --trips of the tape {n / tape_s:>12,.0f} records/s  ({tape_s:.2f} s)")
    print(f"replay --trips of the file {n / file_s:>12,.0f} records/s  ({file_s:.2f} s)")
    print(f"ratio                      {file_s / tape_s:>12.3f}")


if __name__ == "__main__":
    main()
