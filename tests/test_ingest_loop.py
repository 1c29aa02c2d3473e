"""The consumer loop, fast: the file source into a fakeredis store (resume, stale batches, lost
connections, dead-letter file), stdin, settings and metrics. The same loop against the real
broker and redis-server is in test_ingest_bad_input.py and test_ingest_exactly_once.py."""

from __future__ import annotations

import argparse
import io
from pathlib import Path

import fakeredis
import orjson
import pytest
import redis
from ingest_support import compare_with_replay, redis_cell_fixes, replay_counters, replayed

from featurestore.config import EngineConfig
from featurestore.redis_store import RedisStore
from featurestore.store import StaleBatchError
from ingest.citysim import CityConfig, write_jsonl
from ingest.consumer import ConsumerLoop, LoopOptions, spans_of
from ingest.dead_letters import FileDeadLetters, letter_raw
from ingest.main import resolve_settings
from ingest.records import SourceRecord
from ingest.sources import FileSource
from ingest.stats import ConsumerStats, register_metrics

HISTORY_MS = 900_000


@pytest.fixture(scope="module")
def day(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("loop") / "day.jsonl"
    write_jsonl(path, CityConfig(seed=11, vehicles=12, hours=1.5))
    return path


@pytest.fixture(scope="module")
def replay(day: Path):
    return replayed(day)


def _store() -> RedisStore:
    return RedisStore(fakeredis.FakeRedis(server=fakeredis.FakeServer()), history_ms=HISTORY_MS)


def _loop(day: Path, store, tmp_path: Path, *, max_records: int | None = None,
          batch: int = 97, name: str = "dl.jsonl") -> ConsumerLoop:
    source = FileSource(str(day), arrival_from_message=True)
    sink = FileDeadLetters(str(tmp_path / name))
    opts = LoopOptions(max_poll_records=batch, max_records=max_records, poll_timeout_s=0.01,
                       backoff_initial_s=0.001, backoff_max_s=0.002)
    return ConsumerLoop(source, store, sink, options=opts)


def _lines(day: Path) -> list[bytes]:
    return [line.rstrip(b"\n") for line in day.read_bytes().splitlines(keepends=True)]


def test_a_file_ends_equal_to_replay_and_counts_add_up(day: Path, replay, tmp_path: Path) -> None:
    mem, engine_stats = replay
    store = _store()
    stats = _loop(day, store, tmp_path).run()
    lines = _lines(day)
    assert stats.received == len(lines)
    assert stats.received == stats.accepted + stats.rejected_total
    assert stats.accepted == engine_stats.accepted
    assert dict(stats.rejected) == dict(engine_stats.rejected)
    assert stats.dead_letters == stats.rejected_total
    assert store.offsets() == {f"file:{day}": len(lines)}
    compare_with_replay(store, mem)
    # every accepted fix is counted in exactly one cell counter
    assert redis_cell_fixes(store.client) == engine_stats.accepted
    assert store.counters() == replay_counters(engine_stats)


def test_a_second_run_resumes_after_the_stored_offset(day: Path, replay, tmp_path: Path) -> None:
    mem, engine_stats = replay
    store = _store()
    first = _loop(day, store, tmp_path, max_records=300).run()
    assert first.received == 300
    assert store.offsets() == {f"file:{day}": 300}
    second = _loop(day, store, tmp_path, name="dl2.jsonl").run()
    assert first.received + second.received == len(_lines(day))
    assert first.accepted + second.accepted == engine_stats.accepted
    compare_with_replay(store, mem)
    assert redis_cell_fixes(store.client) == engine_stats.accepted
    assert store.counters() == replay_counters(engine_stats)


def test_a_stale_batch_is_refused_and_the_loop_resumes_from_the_store(
        day: Path, replay, tmp_path: Path) -> None:
    mem, engine_stats = replay
    store = _store()
    zombie = _loop(day, store, tmp_path, batch=50, name="z.jsonl")
    assert zombie.step() == 50  # lines 0..49 applied; the next batch would start at 50
    other = _loop(day, store, tmp_path, max_records=100, name="o.jsonl")
    other.run()  # another consumer applies lines 50..149
    assert store.offsets() == {f"file:{day}": 150}
    assert zombie.step() == 0  # its batch 50..99 is refused: nothing written
    assert zombie.stats.stale_batches == 1
    assert zombie.stats.dropped == 50
    zombie.run()  # re-positioned at 150 from the store
    assert zombie.stats.received + other.stats.received == len(_lines(day))
    compare_with_replay(store, mem)
    assert redis_cell_fixes(store.client) == engine_stats.accepted
    assert store.counters() == replay_counters(engine_stats)


class _Flaky:
    """A store whose apply fails with a lost connection: before writing, or after writing
    (the reply lost), on the given calls."""

    def __init__(self, store: RedisStore, before: set[int], after: set[int]) -> None:
        self.store = store
        self.history_ms = store.history_ms
        self.before, self.after = before, after
        self.calls = 0

    def apply(self, delta) -> None:
        self.calls += 1
        if self.calls in self.before:
            raise redis.ConnectionError("connection reset (test)")
        self.store.apply(delta)
        if self.calls in self.after:
            raise redis.ConnectionError("reply lost (test)")

    def __getattr__(self, name):
        return getattr(self.store, name)


def test_lost_connections_never_lose_or_double_a_batch(day: Path, replay, tmp_path: Path) -> None:
    mem, engine_stats = replay
    store = _store()
    flaky = _Flaky(store, before={2, 6}, after={4, 8})  # four separate outages
    loop = _loop(day, flaky, tmp_path)
    stats = loop.run()
    assert stats.reconnects["redis"] == 4
    # calls 2 and 6 wrote nothing: their batches are read again from the stored offsets; 4 and 8
    # were written but not confirmed: the stored offsets show it, counted once, not re-read
    assert stats.stale_batches == 0
    assert stats.dropped == 2 * 97
    assert stats.received == len(_lines(day))
    assert stats.received == stats.accepted + stats.rejected_total
    compare_with_replay(store, mem)
    assert redis_cell_fixes(store.client) == engine_stats.accepted
    assert store.counters() == replay_counters(engine_stats)


def test_dead_letter_file_keeps_reason_source_and_exact_bytes(tmp_path: Path) -> None:
    good = (b'{"vehicle_id":"v1","event_ts":1780000000,"lat":1.0,"lon":2.0,'
            b'"status":"vacant","arrival_ts":1780000001}')
    lines = [good, b"not json \xff\xfe", b"", b'{"vehicle_id":"v1","event_ts":1780000000,'
             b'"lat":1.0,"lon":2.0,"status":"vacant","arrival_ts":1780000002}',
             b'{"vehicle_id":"v2","event_ts":1780000000,"lat":95.0,"lon":2.0,'
             b'"status":"vacant","arrival_ts":1780000003}']
    path = tmp_path / "in.jsonl"
    path.write_bytes(b"\n".join(lines) + b"\n")
    store = _store()
    stats = _loop(path, store, tmp_path, name="dead.jsonl").run()
    assert stats.received == 4  # the blank line is no message
    assert stats.accepted == 1
    got = [orjson.loads(x) for x in (tmp_path / "dead.jsonl").read_bytes().splitlines()]
    assert [(g["reason"], g["source_offset"]) for g in got] == [
        ("malformed", 1), ("duplicate", 3), ("invalid:lat", 4)]
    assert [letter_raw(g) for g in got] == [lines[1], lines[3], lines[4]]
    assert got[0]["raw"] is None  # not UTF-8: kept as base64
    assert all(g["source_partition"] == f"file:{path}" for g in got)
    assert got[2]["source_timestamp"] is None  # arrival from the message, none in the record
    assert got[1]["detail"].startswith("same vehicle and event time")


def test_stdin_numbers_lines_on_from_the_stored_offset(tmp_path: Path) -> None:
    msg = (b'{"vehicle_id":"v1","event_ts":%d,"lat":1.0,"lon":2.0,"status":"vacant",'
           b'"arrival_ts":%d}')
    store = _store()
    for run in range(2):
        text = b"\n".join(msg % (1780000000 + 10 * i + 100 * run, 1780000001 + 10 * i
                                 + 100 * run) for i in range(5)) + b"\n"
        source = FileSource("-", arrival_from_message=True, stdin=io.BytesIO(text))
        loop = ConsumerLoop(source, store, FileDeadLetters(str(tmp_path / "d.jsonl")),
                            options=LoopOptions(poll_timeout_s=0.05))
        stats = loop.run()
        assert stats.received == 5 and stats.accepted == 5
        assert store.offsets() == {"file:-": 5 * (run + 1)}


def test_spans_cover_each_partition_of_a_batch() -> None:
    from featurestore.schema import decode_record

    recs = [SourceRecord("t:0", 5, 1000, None, b"x"), SourceRecord("t:1", 9, 3000, None, b"x"),
            SourceRecord("t:0", 6, 2000, None, b"x"), SourceRecord("t:0", 8, 1500, None, b"x")]
    spans = spans_of(recs, [decode_record(r.key, r.value, r.timestamp_ms) for r in recs])
    assert {p: (s.first_offset, s.next_offset, s.last_arrival_ms) for p, s in spans.items()} == {
        "t:0": (5, 9, 2000), "t:1": (9, 10, 3000)}


def test_settings_come_from_flags_then_environment() -> None:
    args = argparse.Namespace(bootstrap=None, redis_url="redis://127.0.0.1:1/0", topic="a",
                              history=None, arrival_from_message=None)
    env = {"CELLPULSE_BOOTSTRAP": "h:9", "CELLPULSE_TOPIC": "b", "CELLPULSE_HISTORY": "60",
           "CELLPULSE_ARRIVAL_FROM_MESSAGE": "true", "CELLPULSE_REDIS_URL": "redis://x:2/0"}
    s = resolve_settings(args, env)
    assert (s.bootstrap, s.topic, s.history, s.arrival_from_message, s.redis_url) == (
        "h:9", "a", 60.0, True, "redis://127.0.0.1:1/0")
    assert s.group == "cellpulse" and s.max_poll_records == 500
    with pytest.raises(ValueError, match="CELLPULSE_MAX_RECORDS='ten'"):
        resolve_settings(args, {**env, "CELLPULSE_MAX_RECORDS": "ten"})
    with pytest.raises(ValueError, match="--redis-url"):
        resolve_settings(argparse.Namespace(bootstrap="h:1"), {})


def test_stats_export_as_prometheus_metrics() -> None:
    from prometheus_client import CollectorRegistry, generate_latest

    stats = ConsumerStats()
    stats.record_batch(10, 7, {"malformed": 2, "too_late": 1}, 0.01)
    stats.lag["fixes:0"] = 42
    registry = CollectorRegistry()
    register_metrics(stats, registry)
    text = generate_latest(registry).decode()
    assert "cellpulse_ingest_received_total 10.0" in text
    assert "cellpulse_ingest_accepted_total 7.0" in text
    assert 'cellpulse_ingest_rejected_total{reason="malformed"} 2.0' in text
    assert 'cellpulse_ingest_lag{partition="fixes:0"} 42.0' in text
    stats.record_batch(5, 5, {}, 0.01)  # read at scrape time
    assert "cellpulse_ingest_received_total 15.0" in generate_latest(registry).decode()


def test_stale_error_names_the_partition() -> None:
    store = _store()
    from featurestore.store import Delta, SourceSpan

    store.apply(Delta(spans={"t:0": SourceSpan(0, 10, None)}))
    with pytest.raises(StaleBatchError, match="t:0"):
        store.apply(Delta(spans={"t:0": SourceSpan(5, 12, None)}))


def test_engine_options_reach_the_loop(day: Path, tmp_path: Path) -> None:
    cfg = EngineConfig(max_delay_s=5.0)  # most deliveries of the demo city arrive within 5 s
    source = FileSource(str(day), arrival_from_message=True)
    loop = ConsumerLoop(source, _store(), FileDeadLetters(str(tmp_path / "d.jsonl")),
                        config=cfg)
    stats = loop.run()
    _, default_stats = replayed(day)
    _, strict_stats = replayed(day, cfg)
    assert stats.rejected["too_late"] == strict_stats.rejected["too_late"]
    assert stats.rejected["too_late"] > default_stats.rejected["too_late"]
