"""Pushing a recorded day into Kafka (replay.to_kafka) against the real Tansu broker, and the
pacing with an injected clock. Demo data only (the fictional city of ingest.citysim)."""

from __future__ import annotations

import json
import uuid
from collections import Counter, defaultdict

import orjson
import pytest
from kafka import KafkaConsumer, TopicPartition

from featurestore.cli import main
from featurestore.schema import Fix, decode_record
from ingest.citysim import CityConfig, write_jsonl, write_parquet
from replay.readers import iter_file
from replay.to_kafka import NO_ARRIVAL, PushError, parse_speed, push_to_kafka

# A short day with more broken messages than the default, so every kind shows up.
DAY = CityConfig(seed=5, vehicles=5, hours=0.5, broken_share=0.08)


def _topic(name: str) -> str:
    return f"{name}-{uuid.uuid4().hex[:8]}"


def consume_all(bootstrap: str, topic: str, expected: int) -> dict[int, list]:
    """Every record of ``topic`` by partition, in offset order (manual assignment)."""
    consumer = KafkaConsumer(bootstrap_servers=bootstrap, enable_auto_commit=False)
    out: dict[int, list] = defaultdict(list)
    try:
        parts = [TopicPartition(topic, p) for p in sorted(consumer.partitions_for_topic(topic))]
        consumer.assign(parts)
        consumer.seek_to_beginning(*parts)
        got = 0
        for _ in range(100):  # bounded: each poll waits at most 100 ms
            for tp, records in consumer.poll(timeout_ms=100).items():
                out[tp.partition].extend(records)
                got += len(records)
            if got >= expected:
                break
        # one more short poll: nothing beyond what was expected
        for tp, records in consumer.poll(timeout_ms=100).items():
            out[tp.partition].extend(records)
    finally:
        consumer.close()
    return out


def _line_expectations(path) -> tuple[list[tuple[bytes | None, bytes, int]], int]:
    """From the file alone (not the project's readers): the (key, value, timestamp) of every
    line that carries a numeric arrival_ts, in file order, and the count of the others."""
    sent, unplaced = [], 0
    for line in path.read_bytes().splitlines():
        try:
            d = orjson.loads(line)
        except orjson.JSONDecodeError:
            d = None
        arr = d.get("arrival_ts") if isinstance(d, dict) else None
        if not isinstance(arr, (int, float)) or isinstance(arr, bool):
            unplaced += 1
            continue
        vid = d.get("vehicle_id")
        sent.append((vid.encode() if isinstance(vid, str) else None, line, round(arr * 1000)))
    return sent, unplaced


def test_jsonl_day_arrives_in_order_keyed_and_byte_identical(kafka_broker, tmp_path):
    day = tmp_path / "day.jsonl"
    write_jsonl(day, DAY)
    expected, unplaced = _line_expectations(day)
    assert unplaced > 0  # not-JSON lines: they have no arrival time to place them by
    topic = _topic("day")
    kafka_broker.create_topic(topic, 4)

    summary = push_to_kafka([day], kafka_broker.bootstrap, topic)

    assert summary.sent == summary.delivered == len(expected)
    assert summary.skipped == Counter({NO_ARRIVAL: unplaced})
    assert summary.partitions == 4
    assert summary.first_arrival_ms == min(ts for _k, _v, ts in expected)
    assert summary.last_arrival_ms == max(ts for _k, _v, ts in expected)
    by_part = consume_all(kafka_broker.bootstrap, topic, len(expected))
    records = [r for recs in by_part.values() for r in recs]
    assert len(records) == len(expected)
    # exact key, value bytes and timestamp of every record, broken ones included
    assert Counter((r.key, r.value, r.timestamp) for r in records) == Counter(expected)
    broken = [v for k, v, ts in expected if not isinstance(decode_record(k, v, ts), Fix)]
    assert len(broken) >= 3  # invalid fields (lat, status, missing vehicle_id, ...) still sent
    assert set(broken) <= {r.value for r in records}
    # one vehicle, one partition; within a partition the file's (arrival) order is kept
    parts_of: dict[bytes | None, set[int]] = defaultdict(set)
    for p, recs in by_part.items():
        for r in recs:
            parts_of[r.key].add(p)
        stamps = [r.timestamp for r in recs]
        assert stamps == sorted(stamps)
        want = [v for k, v, _ts in expected
                if k is not None and k in {r.key for r in recs}]
        assert [r.value for r in recs if r.key is not None] == want
    assert all(len(ps) == 1 for k, ps in parts_of.items() if k is not None)
    assert {k for k in parts_of if k is not None} == {
        k for k, _v, _ts in expected if k is not None}


def test_parquet_rows_decode_live_to_what_replay_reads(kafka_broker, tmp_path):
    day = tmp_path / "day.parquet"
    write_parquet(day, DAY)
    items = [it for it in iter_file(day) if it.arrival_ms is not None]
    topic = _topic("parquet")
    kafka_broker.create_topic(topic, 3)

    summary = push_to_kafka([day], kafka_broker.bootstrap, topic)

    assert summary.sent == len(items)
    records = [r for recs in consume_all(kafka_broker.bootstrap, topic, len(items)).values()
               for r in recs]
    assert len(records) == len(items)
    live = Counter()
    for r in records:
        got = decode_record(r.key, r.value, r.timestamp)
        live[got if isinstance(got, Fix) else ("rejected", got.reason)] += 1
    recorded = Counter(it.value if isinstance(it.value, Fix) else ("rejected", it.value.reason)
                       for it in items)
    assert live == recorded  # the live decode of every pushed row equals replay's reading
    assert sum(n for k, n in recorded.items() if isinstance(k, tuple)) >= 3


def test_missing_topic_is_a_readable_error(kafka_broker, tmp_path):
    day = tmp_path / "day.jsonl"
    write_jsonl(day, CityConfig(seed=5, vehicles=5, hours=0.25))
    with pytest.raises(PushError, match="does not exist.*--create-topic"):
        push_to_kafka([day], kafka_broker.bootstrap, _topic("absent"))


def test_cli_creates_topic_and_prints_summary(kafka_broker, tmp_path, capsys):
    day = tmp_path / "day.jsonl"
    write_jsonl(day, DAY)
    expected, unplaced = _line_expectations(day)
    topic = _topic("cli")
    rc = main(["replay", str(day), "--to-kafka", kafka_broker.bootstrap, "--topic", topic,
               "--create-topic", "2", "--no-progress"])
    assert rc == 0
    out = json.loads(capsys.readouterr().out)
    assert out["sent"] == len(expected) and out["skipped"] == {NO_ARRIVAL: unplaced}
    assert out["topic_created"] is True and out["partitions"] == 2 and out["speed"] == "max"
    by_part = consume_all(kafka_broker.bootstrap, topic, len(expected))
    assert sorted(by_part) == [0, 1]
    assert sum(len(v) for v in by_part.values()) == len(expected)


def test_cli_needs_out_or_to_kafka(tmp_path, capsys):
    day = tmp_path / "day.jsonl"
    write_jsonl(day, CityConfig(seed=5, vehicles=5, hours=0.25))
    assert main(["replay", str(day)]) == 2
    assert "--out PATH" in capsys.readouterr().err
    assert main(["replay", str(day), "--to-kafka", "127.0.0.1:9", "--labels", "x.csv"]) == 2
    assert "--labels: not with --to-kafka" in capsys.readouterr().err


# --- pacing, with an injected clock and a producer that only records --------------------------

class FakeClock:
    def __init__(self) -> None:
        self.now = 1000.0
        self.sleeps: list[float] = []

    def __call__(self) -> float:
        return self.now

    def sleep(self, seconds: float) -> None:
        assert seconds > 0
        self.sleeps.append(seconds)
        self.now += seconds


class RecordingProducer:
    def __init__(self, clock: FakeClock, cost_s: float = 0.0) -> None:
        self.clock, self.cost_s = clock, cost_s
        self.sent: list[tuple[float, bytes | None, bytes, int]] = []
        self.flushed = self.closed = False

    def send(self, topic, key=None, value=None, timestamp_ms=None):
        self.sent.append((self.clock.now, key, value, timestamp_ms))
        self.clock.now += self.cost_s  # each send takes this long on the fake clock

    def flush(self):
        self.flushed = True

    def close(self, timeout=None):
        self.closed = True


def _paced(tmp_path, speed, cost_s=0.0):
    day = tmp_path / "day.jsonl"
    write_jsonl(day, CityConfig(seed=5, vehicles=5, hours=0.25))
    clock = FakeClock()
    producer = RecordingProducer(clock, cost_s)
    summary = push_to_kafka([day], "unused:9092", "fixes", speed=speed,
                            producer_factory=lambda **cfg: producer, clock=clock,
                            sleep=clock.sleep)
    return summary, producer, clock


@pytest.mark.parametrize("speed", [1.0, 60.0])
def test_pacing_sends_each_row_at_its_scaled_arrival(tmp_path, speed):
    summary, producer, clock = _paced(tmp_path, speed)
    assert producer.flushed and producer.closed
    assert summary.sent == len(producer.sent) > 50
    t0, first = producer.sent[0][0], producer.sent[0][3]
    for at, _k, _v, ts in producer.sent:
        assert at - t0 == pytest.approx((ts - first) / 1000 / speed, abs=1e-9)
    span_s = (producer.sent[-1][3] - first) / 1000
    assert sum(clock.sleeps) == pytest.approx(span_s / speed, abs=1e-9)


def test_pacing_catches_up_when_sending_is_slow(tmp_path):
    # each send costs 2 s of fake time: at 60x most rows are already late, so no sleep is
    # longer than the gap to the next row, and the run takes max(paced time, send time)
    summary, producer, clock = _paced(tmp_path, 60.0, cost_s=2.0)
    first = producer.sent[0][3]
    for i, (at, _k, _v, ts) in enumerate(producer.sent):
        due = producer.sent[0][0] + (ts - first) / 1000 / 60
        assert at >= due - 1e-9
        assert at == pytest.approx(max(due, producer.sent[i - 1][0] + 2.0) if i else due)


def test_directory_of_parquet_files_is_merged_in_arrival_order(tmp_path):
    tape = tmp_path / "tape"
    tape.mkdir()
    write_parquet(tape / "a.parquet", CityConfig(seed=5, vehicles=5, hours=0.25))
    write_parquet(tape / "b.parquet", CityConfig(seed=10, vehicles=5, hours=0.25))
    rows = sum(1 for name in ("a", "b") for it in iter_file(tape / f"{name}.parquet")
               if it.arrival_ms is not None)
    clock = FakeClock()
    producer = RecordingProducer(clock)
    summary = push_to_kafka([tape], "unused:9092", "fixes",
                            producer_factory=lambda **cfg: producer, clock=clock,
                            sleep=clock.sleep)
    stamps = [ts for _at, _k, _v, ts in producer.sent]
    assert summary.sent == len(stamps) == rows > 100
    assert stamps == sorted(stamps)


def test_max_speed_never_sleeps(tmp_path):
    summary, producer, clock = _paced(tmp_path, None)
    assert clock.sleeps == [] and summary.sent == len(producer.sent) > 50
    assert summary.as_dict()["speed"] == "max"


def test_parse_speed():
    assert parse_speed("max") is None and parse_speed(None) is None
    assert parse_speed("60") == 60.0 and parse_speed(0.5) == 0.5
    for bad in ("0", "-3", "fast", "inf", "nan"):
        with pytest.raises(ValueError, match="number > 0"):
            parse_speed(bad)
