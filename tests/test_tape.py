"""The tape: what live consumers received, as hourly Parquet files that replay reads back.

A demo day is cut into Kafka-like records (key = vehicle_id, four partitions by key, two
consumers, batches of varying size, one consumer restarted mid-day), recorded with
``TapeWriter``, then replayed: the training sets must equal those replayed from the original
JSON Lines file, and every rejected record must come back with its reason and exact bytes.
"""

from __future__ import annotations

import heapq
import os
import random
import re
import zlib
from collections import Counter
from dataclasses import dataclass
from pathlib import Path

import orjson
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from featurestore.cells import cell_of
from featurestore.schema import Fix, Rejection, decode_record
from ingest.citysim import CityConfig, write_jsonl
from ingest.records import SourceRecord
from ingest.tape import HOUR_MS, TAPE_SCHEMA, TapeError, TapeWriter, hour_name, prune_tape
from replay.ordering import merge_inputs
from replay.readers import Item, expand_inputs
from replay.training import replay_labels, replay_trips

# A night hour and a half; fault shares raised so that every kind of rejection occurs.
CITY = CityConfig(seed=1, vehicles=10, hours=1.5, late_share=0.03, duplicate_share=0.01,
                  out_of_order_share=0.01, broken_share=0.02, future_share=0.005)
PARTITIONS = 4
EXTRA_BROKEN = [b'{"vehicle_id":"veh-0001","event_ts":17', b"\xff\xfe\x00 not json at all",
                b'"just a string"']


def _partition(key: bytes | None) -> str:
    return f"fixes:{zlib.crc32(key) % PARTITIONS if key is not None else 0}"


def _object(line: bytes) -> dict:
    """The line's JSON object, or {} when it is not one."""
    try:
        d = orjson.loads(line)
    except orjson.JSONDecodeError:
        return {}
    return d if isinstance(d, dict) else {}


@dataclass
class Day:
    reference: Path  # the JSON Lines day minus the records the live path rejects for their key
    records: list[SourceRecord]
    decoded: list[Fix | Rejection]
    live_only: list[int]  # indexes of records rejected live but fine as lines (key, timestamp)


@pytest.fixture(scope="module")
def day(tmp_path_factory: pytest.TempPathFactory) -> Day:
    base = tmp_path_factory.mktemp("tape-day")
    write_jsonl(base / "day.jsonl", CITY)
    lines = (base / "day.jsonl").read_bytes().split(b"\n")[:-1]
    for k, extra in enumerate(EXTRA_BROKEN):  # a few more broken payloads, mid-stream
        lines.insert(len(lines) * (k + 1) // 4, extra)
    records: list[SourceRecord] = []
    decoded: list[Fix | Rejection] = []
    live_only: list[int] = []
    keep: list[bytes] = []
    offsets: Counter[str] = Counter()
    last_ms: int | None = None
    fixes_seen = 0
    for line in lines:
        d = _object(line)
        # the recorded arrival; a line that is not a JSON object arrived after the previous one
        ts: int | None = round(d["arrival_ts"] * 1000) if "arrival_ts" in d else last_ms
        last_ms = ts
        vid = d.get("vehicle_id")
        key = vid.encode() if isinstance(vid, str) else None
        as_line = decode_record(key, line, ts)
        live_change = False
        if isinstance(as_line, Fix):
            fixes_seen += 1
            if fixes_seen % 150 == 0:  # no key
                key, live_change = None, True
            elif fixes_seen % 150 == 75:  # another vehicle's key
                key, live_change = b"veh-9999", True
            elif fixes_seen == 800:  # a record without a timestamp
                ts, live_change = None, True
        partition = _partition(key)
        rec = SourceRecord(partition, offsets[partition], ts, key, line)
        offsets[partition] += 1
        if live_change:
            live_only.append(len(records))
        else:
            keep.append(line)
        records.append(rec)
        decoded.append(decode_record(rec.key, rec.value, rec.timestamp_ms))
    (base / "reference.jsonl").write_bytes(b"\n".join(keep) + b"\n")
    return Day(base / "reference.jsonl", records, decoded, live_only)


def _record_tape(day: Day, tape: Path, part_rows: int = 200) -> list[Path]:
    """Two consumers (partitions 0-1 and 2-3) write their records in polled batches of varying
    size, interleaved; consumer c0 is restarted halfway through its records."""
    owners = {f"fixes:{p}": ("c0" if p < 2 else "c1") for p in range(PARTITIONS)}
    queues: dict[str, list[int]] = {"c0": [], "c1": []}
    for i, rec in enumerate(day.records):
        queues[owners[rec.partition]].append(i)
    writers = {n: TapeWriter(tape, n, part_rows=part_rows, max_age_s=None) for n in queues}
    files: list[Path] = []
    restart_at = len(queues["c0"]) // 2
    done = {"c0": 0, "c1": 0}
    rng = random.Random(8)
    restarted = False
    while any(done[n] < len(queues[n]) for n in queues):
        for n in ("c0", "c1"):
            take = queues[n][done[n]: done[n] + rng.randint(1, 300)]
            writers[n].write([day.records[i] for i in take], [day.decoded[i] for i in take])
            done[n] += len(take)
            if n == "c0" and not restarted and done[n] >= restart_at:
                writers[n].close()
                files += writers[n].files
                writers[n] = TapeWriter(tape, n, part_rows=part_rows, max_age_s=None)
                restarted = True
    for w in writers.values():
        w.close()
        files += w.files
    return files


@pytest.fixture(scope="module")
def tape(day: Day, tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, list[Path]]:
    root = tmp_path_factory.mktemp("tape") / "tape"
    return root, _record_tape(day, root)


def test_the_demo_day_has_what_the_tape_must_carry(day: Day) -> None:
    reasons = Counter(v.reason for v in day.decoded if isinstance(v, Rejection))
    assert reasons["invalid:key"] == 21  # 10 without a key + 11 with another vehicle's key
    assert reasons["invalid:arrival_ts"] == 1  # the record without a timestamp
    assert reasons["malformed"] >= len(EXTRA_BROKEN)
    assert len(day.live_only) == 22
    hours = {v.arrival_ms // HOUR_MS for v in day.decoded if v.arrival_ms is not None}
    assert len(hours) == 2  # the day spans an hour boundary (00:00 to about 01:30)


def test_layout_one_directory_per_arrival_hour(day: Day, tape: tuple[Path, list[Path]]) -> None:
    root, files = tape
    hours = sorted({hour_name(v.arrival_ms // HOUR_MS) for v in day.decoded
                    if v.arrival_ms is not None})
    assert hours == ["2026-06-01T00", "2026-06-01T01"]
    assert sorted(p.name for p in root.iterdir()) == hours
    on_disk = sorted(p for p in root.rglob("*") if p.is_file())
    assert on_disk == sorted(files)  # no temporary file left behind
    assert len(set(files)) == len(files)  # nothing written twice under one name
    for f in files:
        assert re.fullmatch(r"c[01]-\d{6}\.parquet", f.name)
    # the restarted c0 continued its numbering instead of starting again at 000001
    c0_first_hour = sorted(f.name for f in files if f.parent.name == hours[0]
                           and f.name.startswith("c0-"))
    assert c0_first_hour == [f"c0-{k:06d}.parquet" for k in range(1, len(c0_first_hour) + 1)]
    assert len(c0_first_hour) >= 3


def test_every_record_once_each_file_sorted(day: Day, tape: tuple[Path, list[Path]]) -> None:
    root, files = tape
    seen: list[tuple[str, int]] = []
    for f in files:
        t = pq.read_table(f)
        assert t.schema.equals(TAPE_SCHEMA, check_metadata=False)
        assert t.num_rows <= 200
        arr = t.column("arrival_ts").cast(pa.int64()).to_pylist()
        assert {hour_name(a // HOUR_MS) for a in arr if a is not None} == {f.parent.name}
        keys = [(-1 if a is None else a, p, o) for a, p, o in
                zip(arr, t.column("partition").to_pylist(), t.column("offset").to_pylist(),
                    strict=True)]
        assert keys == sorted(keys)
        seen += [(p, o) for _, p, o in keys]
    assert len(seen) == len(day.records)
    assert sorted(seen) == sorted((r.partition, r.offset) for r in day.records)


def test_rows_hold_the_records_as_received(day: Day, tape: tuple[Path, list[Path]]) -> None:
    root, files = tape
    by_pos = {(r.partition, r.offset): (r, v) for r, v in zip(day.records, day.decoded,
                                                               strict=True)}
    rejected = fixes = 0
    for f in files:
        for row in pq.read_table(f).to_pylist():
            rec, value = by_pos[(row["partition"], row["offset"])]
            assert row["raw"] == rec.value  # byte for byte
            assert row["key"] == rec.key
            if isinstance(value, Rejection):
                rejected += 1
                assert (row["reason"], row["detail"]) == (value.reason, value.detail)
                assert row["vehicle_id"] == value.vehicle_id
                assert row["event_ts"] is None and row["lat"] is None
            else:
                fixes += 1
                assert row["reason"] is None and row["detail"] is None
                ms = {k: round(row[k].timestamp() * 1000) for k in ("event_ts", "arrival_ts")}
                assert (row["vehicle_id"], ms["event_ts"], ms["arrival_ts"], row["lat"],
                        row["lon"], row["status"], row["speed_mps"], row["trip_id"]) == (
                    value.vehicle_id, value.event_ms, value.arrival_ms, value.lat, value.lon,
                    value.status, value.speed_mps, value.trip_id)
    assert rejected == sum(isinstance(v, Rejection) for v in day.decoded) > 20
    assert fixes == sum(isinstance(v, Fix) for v in day.decoded) > 1500


def _sorted_frame(path: Path, keys: list[str]) -> pd.DataFrame:
    return pq.read_table(path).to_pandas().sort_values(keys, kind="stable").reset_index(drop=True)


def _dead_letters(path: Path) -> Counter:
    return Counter((d["reason"], d["detail"], d["vehicle_id"], d["raw"])
                   for d in pq.read_table(path).to_pylist())


@pytest.mark.parametrize("after_fixes", [1, 5])
def test_replay_of_the_tape_equals_replay_of_the_file(
        day: Day, tape: tuple[Path, list[Path]], tmp_path: Path, after_fixes: int) -> None:
    root, files = tape
    assert len(expand_inputs([root])) == len(files) >= 8
    ref = replay_trips([day.reference], tmp_path / "ref.parquet", after_fixes=after_fixes,
                       dead_letters=tmp_path / "ref-dl.parquet")
    got = replay_trips([root], tmp_path / "tape.parquet", after_fixes=after_fixes,
                       dead_letters=tmp_path / "tape-dl.parquet")
    assert got.training_rows == ref.training_rows >= 8
    keys = ["vehicle_id", "pickup_ts", "as_of_ts"]
    pd.testing.assert_frame_equal(_sorted_frame(tmp_path / "tape.parquet", keys),
                                  _sorted_frame(tmp_path / "ref.parquet", keys), check_exact=True)
    assert got.stats["accepted"] == ref.stats["accepted"]
    assert got.stats["in_order"] == ref.stats["in_order"]
    # rejected rows come back with their reasons: the file's, plus the live-only key and
    # timestamp rejections, with the same details and exact bytes
    extra = Counter((day.decoded[i].reason, day.decoded[i].detail, day.decoded[i].vehicle_id,
                     day.records[i].value) for i in day.live_only)
    assert _dead_letters(tmp_path / "tape-dl.parquet") == (
        _dead_letters(tmp_path / "ref-dl.parquet") + extra)
    want = Counter(ref.stats["rejected"]) + Counter(r for r, *_ in extra.elements())
    assert Counter(got.stats["rejected"]) == want
    assert {"too_late", "duplicate", "from_future", "malformed", "invalid:key"} <= set(want)


def test_cli_replays_a_tape_directory(day: Day, tape: tuple[Path, list[Path]], tmp_path: Path,
                                     capsys: pytest.CaptureFixture[str]) -> None:
    from featurestore.cli import main

    root, files = tape
    assert main(["replay", str(root), "--out", str(tmp_path / "t.parquet"), "--no-progress"]) == 0
    summary = orjson.loads(capsys.readouterr().out)
    assert summary["rows"] == len(day.records)
    assert summary["engine"]["rejected"]["invalid:key"] == 21
    dead = pq.read_table(tmp_path / "t.parquet.dead-letters.parquet").to_pylist()
    # a dead letter names the part file and row it came from
    first = next(d for d in dead if d["reason"] == "invalid:key")
    row = pq.read_table(first["source"]).slice(first["row"], 1).to_pylist()[0]
    assert Path(first["source"]) in files and row["raw"] == first["raw"]
    empty = tmp_path / "empty"
    empty.mkdir()
    assert main(["replay", str(empty), "--out", str(tmp_path / "e.parquet")]) == 2
    assert "without Parquet files" in capsys.readouterr().err


def test_labels_from_the_tape_equal_labels_from_the_file(
        day: Day, tape: tuple[Path, list[Path]], tmp_path: Path) -> None:
    root, _ = tape
    fixes = [v for v in day.decoded if isinstance(v, Fix)]
    rng = random.Random(3)
    picks = rng.sample(fixes, 300)
    rows = [{"ts": f.arrival_ms / 1000 + rng.choice([0, 0.001, 7, 90]), "vehicle_id": f.vehicle_id,
             "cell": cell_of(f.lat, f.lon, 8)} for f in picks]
    pq.write_table(pa.Table.from_pylist(rows), tmp_path / "labels.parquet")
    replay_labels([day.reference], tmp_path / "labels.parquet", tmp_path / "ref.parquet")
    replay_labels([root], tmp_path / "labels.parquet", tmp_path / "tape.parquet")
    ref = pq.read_table(tmp_path / "ref.parquet").to_pandas()
    got = pq.read_table(tmp_path / "tape.parquet").to_pandas()
    # same rows in the same order, every value equal (NaN where NaN)
    pd.testing.assert_frame_equal(got, ref, check_exact=True)
    assert got["vehicle_cell"].notna().sum() >= 250


@pytest.mark.parametrize(("spacing", "backwards"), [(40, False), (100, False), (100, True)])
def test_lazy_merge_equals_a_full_merge(spacing: int, backwards: bool) -> None:
    """Streams that overlap, or only touch (a tie at each boundary), in input order or with
    later inputs holding earlier times (ties then favour the stream not yet open)."""
    rng = random.Random(12)
    t0 = 1_780_272_000_000
    streams: list[list[Item]] = []
    for src in range(7):
        base = t0 + (6 - src if backwards else src) * spacing
        arr = sorted([base, base + 100] + [base + rng.randrange(101) for _ in range(src * 4)])
        items = [Item(src, r, Fix("v", a, 0.0, 0.0, "vacant", a)) for r, a in enumerate(arr)]
        if src == 3:
            items.insert(0, Item(src, 99, Rejection("malformed", "", b"x")))  # no arrival
        streams.append(items)
    starts = [min((i.arrival_ms for i in s if i.arrival_ms is not None), default=None)
              for s in streams]
    starts[1] = None  # unknown: opened at once
    got = list(merge_inputs([iter(s) for s in streams], starts))
    assert sorted(got, key=lambda i: (i.source, i.row)) == sorted(
        (i for s in streams for i in s), key=lambda i: (i.source, i.row))
    timed = [i for i in got if i.arrival_ms is not None]
    full = [i for i in heapq.merge(*streams, key=lambda i: (i.arrival_ms or 0, i.source, i.row))
            if i.arrival_ms is not None]
    assert timed == full


def _batch(*arrivals_ms: int) -> tuple[list[SourceRecord], list[Fix | Rejection]]:
    recs = []
    for ms in arrivals_ms:
        raw = orjson.dumps({"vehicle_id": "veh-1", "event_ts": ms / 1000 - 1, "lat": 1.0,
                            "lon": 2.0, "status": "vacant"})
        recs.append(SourceRecord("fixes:0", ms, ms, b"veh-1", raw))
    return recs, [decode_record(r.key, r.value, r.timestamp_ms) for r in recs]


def test_an_hour_is_written_once_it_closes(tmp_path: Path) -> None:
    t0 = 1_780_275_600_000  # 2026-06-01T01:00Z
    w = TapeWriter(tmp_path, "a", close_after_s=60, max_age_s=None)
    w.write(*_batch(t0 - 5_000, t0 + 1_000))
    assert w.files == [] and w.buffered_rows == 2
    w.write(*_batch(t0 + 60_000))  # 60 s past 01:00: the hour from 00:00 closes
    assert [(f.parent.name, f.name) for f in w.files] == [("2026-06-01T00", "a-000001.parquet")]
    assert w.buffered_rows == 2
    w.close()
    assert [(f.parent.name, f.name) for f in w.files][1:] == [("2026-06-01T01",
                                                                "a-000001.parquet")]
    assert pq.read_table(w.files[1]).num_rows == 2
    with pytest.raises(ValueError, match="closed"):
        w.write([], [])
    # a second writer of the same name never replaces a file
    w2 = TapeWriter(tmp_path, "a", max_age_s=None)
    w2.write(*_batch(t0 - 1_000))
    w2.close()
    assert w2.files == [tmp_path / "2026-06-01T00" / "a-000002.parquet"]


def test_a_failed_write_keeps_the_batch_and_memory_stays_bounded(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import ingest.tape as tape_module

    real = tape_module.pq.write_table
    failing = {"on": True}
    calls = Counter()

    def write_table(*args, **kwargs):  # noqa: ANN002, ANN003
        calls["write"] += 1
        if failing["on"]:
            raise OSError(28, "No space left on device")
        return real(*args, **kwargs)

    monkeypatch.setattr(tape_module.pq, "write_table", write_table)
    t0 = 1_780_275_600_000
    w = TapeWriter(tmp_path, "a", part_rows=3, max_buffered_rows=8, retry_s=0, max_age_s=None)
    with pytest.raises(TapeError, match="No space left on device; 4 rows kept"):
        w.write(*_batch(*(t0 + k for k in range(4))))  # the whole batch is buffered
    with pytest.raises(TapeError, match="9 rows dropped"):
        w.write(*_batch(*(t0 + k for k in range(4, 9))))  # beyond 8 buffered: given up
    assert (w.rows_dropped, w.buffered_rows, w.files) == (9, 0, [])
    with pytest.raises(TapeError, match="3 rows kept"):
        w.write(*_batch(t0 + 9, t0 + 10, t0 + 11))
    failing["on"] = False
    w.close()  # the kept rows are written at last
    assert [pq.read_table(f).column("offset").to_pylist() for f in w.files] == [
        [t0 + 9, t0 + 10, t0 + 11]]
    assert not any(p.name.startswith(".") for p in tmp_path.rglob("*"))  # no temporary left
    # after a failure, no new attempt before retry_s has passed
    failing["on"] = True
    w = TapeWriter(tmp_path, "b", part_rows=1, retry_s=3600, max_age_s=None)
    before = calls["write"]
    with pytest.raises(TapeError):
        w.write(*_batch(t0, t0 + 1, t0 + 2))
    w.write(*_batch(t0 + 3))
    assert (calls["write"] - before, w.buffered_rows) == (1, 4)


def test_prune_deletes_whole_hours_older_than_kept(tmp_path: Path) -> None:
    for h in range(6):
        d = tmp_path / f"2026-06-01T{h:02d}"
        d.mkdir()
        (d / "a-000001.parquet").write_bytes(b"x")
    (tmp_path / "notes").mkdir()
    (tmp_path / "2026-06-01T99").mkdir()  # not an hour
    now = 1_780_272_000_000 + 5 * HOUR_MS + 30 * 60_000  # 05:30Z
    gone = prune_tape(tmp_path, keep_hours=2, now_ms=now)  # keep what ended after 03:30
    assert [p.name for p in gone] == ["2026-06-01T00", "2026-06-01T01", "2026-06-01T02"]
    assert sorted(p.name for p in tmp_path.iterdir()) == [
        "2026-06-01T03", "2026-06-01T04", "2026-06-01T05", "2026-06-01T99", "notes"]
    assert prune_tape(tmp_path, keep_hours=2, now_ms=now) == []
    with pytest.raises(ValueError):
        prune_tape(tmp_path, keep_hours=-1)


def test_writer_prunes_by_the_wall_clock(tmp_path: Path) -> None:
    old = 1_590_000_000_000  # 2020-05-20: long before any wall clock this runs under
    (tmp_path / "2020-05-20T00").mkdir()
    with TapeWriter(tmp_path, "a", keep_hours=24 * 30, max_age_s=None) as w:
        w.write(*_batch(old))
    assert w.files and not any(f.exists() for f in w.files)
    assert sorted(os.listdir(tmp_path)) == []
