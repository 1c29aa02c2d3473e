"""The confluent-kafka (librdkafka) source, dead letters and push: the pure parts with a fake
consumer, then against the real Tansu broker. The parity, crash and bad-input tests run the
whole live path with this client too (test_live_parity.py, test_ingest_exactly_once.py,
test_ingest_bad_input.py)."""

from __future__ import annotations

import logging
import sys
import time
import uuid
from collections import Counter

import pytest

from ingest.confluent_source import (
    FETCH_TUNING,
    INSTALL_HINT,
    ConfluentWatch,
    check_client,
    confluent_available,
    consumer_config,
    load_confluent,
)
from ingest.sources import KafkaSettings, SourceError, SourceUnavailable

needs_confluent = pytest.mark.skipif(not confluent_available(),
                                     reason=f"confluent-kafka not installed: {INSTALL_HINT}")
CLI = [sys.executable, "-m", "featurestore.cli"]


# --- without the package ------------------------------------------------------------------------

def test_a_missing_package_is_a_readable_error(monkeypatch) -> None:
    monkeypatch.setitem(sys.modules, "confluent_kafka", None)  # import now raises ImportError
    with pytest.raises(SourceError, match=r'pip install "cellpulse\[fast\]"'):
        load_confluent()
    with pytest.raises(SourceError, match="confluent-kafka package"):
        check_client("confluent")
    assert check_client("kafka-python") == "kafka-python"
    with pytest.raises(SourceError, match="expected one of kafka-python, confluent"):
        check_client("librdkafka")


def test_ingest_with_the_package_missing_says_how_to_install(monkeypatch, capsys) -> None:
    from featurestore.cli import main

    monkeypatch.setitem(sys.modules, "confluent_kafka", None)
    rc = main(["ingest", "--kafka-client", "confluent", "--bootstrap", "127.0.0.1:1",
               "--redis-url", "memory://", "--log-level", "error"])
    err = capsys.readouterr().err
    assert rc == 2
    assert "--kafka-client confluent" in err and 'pip install "cellpulse[fast]"' in err


def test_the_client_comes_from_the_environment(monkeypatch) -> None:
    import argparse

    from ingest.main import resolve_settings

    args = argparse.Namespace(redis_url="memory://", bootstrap="127.0.0.1:1")
    assert resolve_settings(args, {}).kafka_client == "kafka-python"
    env = {"CELLPULSE_KAFKA_CLIENT": "confluent"}
    assert resolve_settings(args, env).kafka_client == "confluent"
    args.kafka_client = "kafka-python"  # the flag wins
    assert resolve_settings(args, env).kafka_client == "kafka-python"
    with pytest.raises(ValueError, match="CELLPULSE_KAFKA_CLIENT='rd'"):
        resolve_settings(argparse.Namespace(redis_url="memory://", bootstrap="h:1"),
                         {"CELLPULSE_KAFKA_CLIENT": "rd"})


def test_consumer_settings_match_the_kafka_python_ones() -> None:
    s = KafkaSettings(session_timeout_ms=3000, heartbeat_interval_ms=1000, fetch_max_wait_ms=100,
                      request_timeout_ms=30_000, reconnect_backoff_ms=50,
                      reconnect_backoff_max_ms=2000)
    conf = consumer_config("127.0.0.1:9", "g1", "me", "latest", s)
    assert conf["session.timeout.ms"] == 3000 and conf["heartbeat.interval.ms"] == 1000
    assert conf["fetch.wait.max.ms"] == 100 and conf["socket.timeout.ms"] == 30_000
    assert conf["reconnect.backoff.ms"] == 50 and conf["reconnect.backoff.max.ms"] == 2000
    assert conf["group.id"] == "g1" and conf["auto.offset.reset"] == "latest"
    assert conf["enable.auto.commit"] is False and conf["enable.auto.offset.store"] is False
    assert conf["allow.auto.create.topics"] is False
    # no one-second fetch stalls: the queue backoff is 1 ms (librdkafka's default is 1000)
    assert conf["fetch.queue.backoff.ms"] == 1 == FETCH_TUNING["fetch.queue.backoff.ms"]
    assert conf["queued.min.messages"] >= 1_000_000
    assert "group.id" not in consumer_config("h:1", None, "me", "earliest", s)


# --- a fake librdkafka consumer -------------------------------------------------------------------

class FakeMessage:
    def __init__(self, partition: int, offset: int, ts: int | None = 1000, key: bytes | None = b"k",
                 value: bytes | None = b"v", error: object = None) -> None:
        self._p, self._o, self._ts, self._k, self._v, self._e = (partition, offset, ts, key,
                                                                  value, error)

    def error(self):
        return self._e

    def partition(self):
        return self._p

    def offset(self):
        return self._o

    def timestamp(self):
        return (0, -1) if self._ts is None else (1, self._ts)

    def key(self):
        return self._k

    def value(self):
        return self._v


class FakeError:
    def __init__(self, name: str, text: str) -> None:
        self._n, self._t = name, text

    def name(self):
        return self._n

    def str(self):
        return self._t


class FakeInfo:
    def __init__(self, partitions) -> None:
        self.partitions = {p: object() for p in partitions}
        self.error = None


class FakeConsumer:
    """Records calls; ``consume`` hands out the scripted batches."""

    def __init__(self, config: dict, partitions=(0, 1, 2)) -> None:
        self.config = config
        self.batches: list[list[FakeMessage]] = []
        self.calls: list[tuple] = []
        self.watermarks: dict[int, tuple[int, int]] = {}
        self.partitions = partitions

    def list_topics(self, timeout=None):
        return type("MD", (), {"topics": {"fixes": FakeInfo(self.partitions)}})()

    def assign(self, tps):
        self.calls.append(("assign", [tp.partition for tp in tps]))

    def pause(self, tps):
        self.calls.append(("pause", [tp.partition for tp in tps]))

    def resume(self, tps):
        self.calls.append(("resume", [tp.partition for tp in tps]))

    def seek(self, tp):
        self.calls.append(("seek", tp.partition, tp.offset))

    def unassign(self):
        self.calls.append(("unassign",))

    def subscribe(self, topics, **callbacks):
        self.calls.append(("subscribe", topics))
        self.callbacks = callbacks

    def consume(self, n, timeout):
        batch = self.batches.pop(0) if self.batches else []
        assert len(batch) <= n
        return batch

    def get_watermark_offsets(self, tp, cached=False):
        assert cached  # never a ListOffsets request (wrong on the test broker)
        return self.watermarks.get(tp.partition, (-1001, -1001))

    def commit(self, offsets=None, asynchronous=True):
        self.calls.append(("commit", sorted((tp.partition, tp.offset) for tp in offsets)))

    def close(self):
        self.calls.append(("close",))


def _source(partitions=(0, 1), **kw):
    from ingest.confluent_source import ConfluentSource

    made: list[FakeConsumer] = []

    def factory(config):
        made.append(FakeConsumer(config))
        return made[-1]

    src = ConfluentSource("h:1", "fixes", "g", partitions=partitions, consumer_factory=factory,
                          **kw)
    return src, made[0]


@needs_confluent
def test_new_partitions_wait_paused_until_positioned_from_the_store() -> None:
    from confluent_kafka import OFFSET_BEGINNING

    src, fake = _source()
    assert fake.calls[:2] == [("assign", [0, 1]), ("pause", [0, 1])]
    assert src.assignment() == {"fixes:0", "fixes:1"} == src.unpositioned()
    fake.batches.append([FakeMessage(0, 0), FakeMessage(1, 0)])
    assert src.poll(0.1, 10) == []  # fetched before the seek: dropped, read again after it
    src.seek({"fixes:0": 5})  # partition 1 has nothing stored: the start policy
    assert ("seek", 0, 5) in fake.calls and ("seek", 1, OFFSET_BEGINNING) in fake.calls
    assert ("resume", [0]) in fake.calls and ("resume", [1]) in fake.calls
    assert src.unpositioned() == frozenset()
    fake.batches.append([FakeMessage(0, 4), FakeMessage(0, 5, ts=None, value=None),
                         FakeMessage(1, 0, key=None), FakeMessage(0, 6, ts=77)])
    got = src.poll(0.1, 10)
    # offset 4 is applied already (a fetch from before the seek): skipped
    assert [(r.partition, r.offset, r.timestamp_ms, r.key, r.value) for r in got] == [
        ("fixes:0", 5, None, b"k", b""), ("fixes:1", 0, 1000, None, b"v"),
        ("fixes:0", 6, 77, b"k", b"v")]
    fake.batches.append([FakeMessage(0, 6), FakeMessage(0, 7)])  # a repeat of 6
    assert [r.offset for r in src.poll(0.1, 10)] == [7]


@needs_confluent
def test_end_offsets_come_from_the_cached_fetch_watermarks_and_commits_from_assigned() -> None:
    src, fake = _source()
    assert src.end_offsets() == {}  # no fetch response yet
    fake.watermarks = {0: (0, 120), 1: (0, -1001)}
    assert src.end_offsets() == {"fixes:0": 120}
    src.commit({"fixes:0": 100, "fixes:7": 3, "other:0": 1})
    assert fake.calls[-1] == ("commit", [(0, 100)])


@needs_confluent
def test_a_rebalance_marks_partitions_and_a_gap_after_a_stored_offset_warns(caplog) -> None:
    src, fake = _source(partitions=None)
    assert fake.calls[0] == ("subscribe", ["fixes"])
    from confluent_kafka import TopicPartition

    fake.callbacks["on_assign"](fake, [TopicPartition("fixes", 2)])
    assert ("assign", [2]) in fake.calls and ("pause", [2]) in fake.calls
    assert src.unpositioned() == {"fixes:2"}
    src.seek({"fixes:2": 10})
    fake.batches.append([FakeMessage(2, 14)])
    with caplog.at_level(logging.WARNING, "cellpulse.ingest"):
        assert [r.offset for r in src.poll(0.1, 10)] == [14]
    assert "offsets 10..13 are not on the broker" in caplog.text
    fake.callbacks["on_revoke"](fake, [TopicPartition("fixes", 2)])
    assert src.assignment() == frozenset() and ("unassign",) in fake.calls
    fake.batches.append([FakeMessage(2, 15)])
    assert src.poll(0.1, 10) == []  # revoked: nothing of it is handed out


@needs_confluent
def test_missing_partitions_are_a_readable_error() -> None:
    with pytest.raises(SourceError, match=r"has partitions \[0, 1, 2\]; \[5\] do not exist"):
        _source(partitions=(0, 5))


def test_broker_watch_says_when_the_broker_is_lost_and_back(caplog) -> None:
    watch = ConfluentWatch("h:1", 10.0)
    with caplog.at_level(logging.INFO, "cellpulse.ingest"):
        watch.on_error(FakeError("_TRANSPORT", "h:1/bootstrap: Connection refused"))
        watch.on_error(FakeError("_ALL_BROKERS_DOWN", "1/1 brokers are down"))
        watch.on_stats('{"brokers": {"h:1/1": {"nodeid": 1, "state": "UP"}}}')
        watch.on_stats('{"brokers": {"h:1/1": {"nodeid": 1, "state": "UP"}}}')
    text = caplog.text
    assert "broker h:1 unreachable (h:1/bootstrap: Connection refused); reconnecting with " \
           "backoff doubling up to 10 s (attempt 1)" in text
    assert "(attempt 2)" in text
    assert text.count("is back after") == 1 and watch.outages == 1


# --- the real broker ----------------------------------------------------------------------------

def _produce(bootstrap: str, topic: str, n: int, partitions: int) -> None:
    from confluent_kafka import Producer

    p = Producer({"bootstrap.servers": bootstrap, "linger.ms": 5})
    for i in range(n):
        p.produce(topic, key=b"veh-%d" % i, value=b"m%d" % i, partition=i % partitions,
                  timestamp=1_780_000_000_000 + i)
    assert p.flush(30) == 0


@needs_confluent
def test_group_member_reads_from_stored_offsets_with_true_end_offsets(kafka_broker) -> None:
    from ingest.confluent_source import ConfluentSource

    topic = f"cf-{uuid.uuid4().hex[:8]}"
    kafka_broker.create_topic(topic, 2)
    _produce(kafka_broker.bootstrap, topic, 100, 2)  # 50 per partition
    src = ConfluentSource(kafka_broker.bootstrap, topic, f"g-{topic}",
                          settings=KafkaSettings(session_timeout_ms=3000,
                                                 heartbeat_interval_ms=1000))
    try:
        deadline = time.monotonic() + 30
        while len(src.unpositioned()) < 2:
            assert src.poll(0.2, 100) == []
            assert time.monotonic() < deadline, "no assignment"
        stored = {f"{topic}:0": 40}  # partition 1: nothing stored, from the beginning
        src.seek(stored)
        got = []
        while len(got) < 60:
            if src.unpositioned():  # librdkafka may refuse a seek until the partition starts;
                src.seek(stored)    # the consumer loop seeks again in that case, and so here
            got += src.poll(0.5, 1000)
            assert time.monotonic() < deadline, (len(got), sorted(src.unpositioned()))
        by_part = Counter(r.partition for r in got)
        assert by_part == {f"{topic}:0": 10, f"{topic}:1": 50}
        assert min(r.offset for r in got if r.partition == f"{topic}:0") == 40
        assert {r.value for r in got if r.partition == f"{topic}:0"} == {
            b"m%d" % i for i in range(80, 100, 2)}
        assert all(r.timestamp_ms >= 1_780_000_000_000 for r in got)
        # the fetch high watermarks: 50 records per partition (Tansu's ListOffsets says less)
        assert src.end_offsets() == {f"{topic}:0": 50, f"{topic}:1": 50}
        src.commit({f"{topic}:0": 50, f"{topic}:1": 50})
        src.poll(0.2, 10)  # serves the commit's reply
    finally:
        src.close()
    from kafka import KafkaConsumer, TopicPartition

    check = KafkaConsumer(bootstrap_servers=kafka_broker.bootstrap, group_id=f"g-{topic}",
                          enable_auto_commit=False)
    try:
        deadline = time.monotonic() + 10
        while check.committed(TopicPartition(topic, 0)) != 50:  # lag tools see the progress
            assert time.monotonic() < deadline
            time.sleep(0.1)
    finally:
        check.close()


@needs_confluent
def test_a_missing_topic_waits_and_a_missing_dead_letter_topic_is_readable(kafka_broker) -> None:
    from ingest.confluent_source import ConfluentSource
    from ingest.dead_letters import ConfluentDeadLetters, DeadLetterError

    asked = []
    with pytest.raises(SourceUnavailable, match="not found"):
        ConfluentSource(kafka_broker.bootstrap, f"absent-{uuid.uuid4().hex[:6]}", "g",
                        partitions=[0], should_stop=lambda: asked.append(1) or len(asked) > 1)
    with pytest.raises(DeadLetterError, match="not found on .*--dead-letter-topic"):
        ConfluentDeadLetters(kafka_broker.bootstrap, f"absent-{uuid.uuid4().hex[:6]}",
                             timeout_s=5)


@needs_confluent
def test_confluent_push_sends_the_same_records_as_kafka_python(kafka_broker, tmp_path) -> None:
    from test_to_kafka import DAY, _line_expectations, consume_all

    from ingest.citysim import write_jsonl
    from replay.to_kafka import NO_ARRIVAL, push_to_kafka

    day = tmp_path / "day.jsonl"
    write_jsonl(day, DAY)
    expected, unplaced = _line_expectations(day)
    topic = f"cfpush-{uuid.uuid4().hex[:8]}"
    kafka_broker.create_topic(topic, 4)
    summary = push_to_kafka([day], kafka_broker.bootstrap, topic, kafka_client="confluent")
    assert summary.sent == summary.delivered == len(expected)
    assert summary.skipped == Counter({NO_ARRIVAL: unplaced}) and summary.partitions == 4
    by_part = consume_all(kafka_broker.bootstrap, topic, len(expected))
    records = [r for recs in by_part.values() for r in recs]
    # exact key, value bytes and timestamp of every record, broken ones included
    assert Counter((r.key, r.value, r.timestamp) for r in records) == Counter(expected)
    for recs in by_part.values():  # arrival order within each partition
        assert [r.timestamp for r in recs] == sorted(r.timestamp for r in recs)
    keys_per_part = [{r.key for r in recs if r.key is not None} for recs in by_part.values()]
    # one vehicle, one partition
    assert sum(len(k) for k in keys_per_part) == len(set().union(*keys_per_part))


@needs_confluent
def test_cli_push_with_the_confluent_client(kafka_broker, tmp_path, capsys) -> None:
    import json

    from featurestore.cli import main
    from ingest.citysim import write_jsonl

    day = tmp_path / "day.jsonl"
    from test_to_kafka import DAY, _line_expectations

    write_jsonl(day, DAY)
    expected, _ = _line_expectations(day)
    topic = f"cfcli-{uuid.uuid4().hex[:8]}"
    rc = main(["replay", str(day), "--to-kafka", kafka_broker.bootstrap, "--topic", topic,
               "--create-topic", "2", "--kafka-client", "confluent", "--no-progress"])
    out = json.loads(capsys.readouterr().out)
    assert rc == 0 and out["topic_created"] is True
    assert out["sent"] == out["delivered"] == len(expected) and out["failed"] == {}
