"""Exactly-once effect through the real broker and a real redis-server with AOF: ``cellpulse
ingest`` is SIGKILLed mid-stream and restarted (in a consumer group), or redis-server is
SIGKILLed and restarted under it; the final state equals a replay of the same messages (every
vehicle, cell and route vector; the total of the cell fix counters), and every rejected message
is in the dead-letter topic (repeats allowed, none missing). With each Kafka client."""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import time
import uuid
from collections import Counter
from pathlib import Path

import pytest
from ingest_support import (
    KAFKA_CLIENTS,
    compare_with_replay,
    produce_day,
    redis_cell_fixes,
    replay_counters,
    replayed,
)
from kafka import KafkaConsumer, TopicPartition
from servers import RedisServer

from featurestore.redis_store import RedisStore
from ingest.citysim import CityConfig, expected_counts, write_jsonl

PARTITIONS = 4
HISTORY_S = 900
WAIT_S = 60.0  # bound on every wait of these tests


class EverysecRedis(RedisServer):
    """redis-server with AOF fsynced once a second (the common production setting): a SIGKILL
    may lose the last second of writes."""

    def __init__(self) -> None:
        super().__init__(appendonly=True)

    def _argv(self) -> list[str]:
        argv = super()._argv()
        argv[argv.index("--appendfsync") + 1] = "everysec"
        return argv


CITY = CityConfig(seed=29, vehicles=80, hours=1)  # about 4,500 messages from 20 vehicles


@pytest.fixture(scope="module")
def day(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("eo") / "day.jsonl"
    write_jsonl(path, CITY)
    return path


@pytest.fixture(scope="module")
def replay(day: Path):
    return replayed(day)


@pytest.fixture
def redis_aof():
    server = EverysecRedis()
    try:
        server.start()
        yield server
    finally:
        server.close()


@pytest.fixture
def topic(kafka_broker, day: Path) -> tuple[str, int]:
    name = f"eo-{uuid.uuid4().hex[:8]}"
    kafka_broker.create_topic(name, PARTITIONS)
    kafka_broker.create_topic(f"{name}-dead-letters", 1)
    lines = [x.rstrip(b"\r\n") for x in day.read_bytes().splitlines() if x.strip()]
    return name, produce_day(kafka_broker.bootstrap, name, lines)


@pytest.fixture(params=KAFKA_CLIENTS)
def kafka_client(request) -> str:
    return request.param


def _ingest(bootstrap: str, topic: str, url: str, log: Path, *extra: str,
            client: str = "kafka-python") -> subprocess.Popen:
    argv = [sys.executable, "-m", "featurestore.cli", "ingest", "--bootstrap", bootstrap,
            "--kafka-client", client,
            "--topic", topic, "--redis-url", url, "--history", str(HISTORY_S),
            "--max-poll-records", "10", "--fetch-max-wait-ms", "100", *extra]
    with open(log, "ab") as fh:
        return subprocess.Popen(argv, stdout=fh, stderr=subprocess.STDOUT,
                                stdin=subprocess.DEVNULL)


def _applied(client) -> int:
    try:
        return sum(int(v) for v in client.hgetall("cellpulse:pos").values())
    except Exception:  # noqa: BLE001 - Redis restarting
        return -1


def _wait_applied(proc: subprocess.Popen, client, at_least: int) -> int:
    deadline = time.monotonic() + WAIT_S
    while time.monotonic() < deadline and proc.poll() is None:
        n = _applied(client)
        if n >= at_least:
            return n
        time.sleep(0.002)
    raise AssertionError(f"consumer exited ({proc.returncode}) or stalled before {at_least} "
                         f"messages were applied")


def _finish(proc: subprocess.Popen, log: Path) -> None:
    try:
        code = proc.wait(timeout=WAIT_S)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()
        raise AssertionError("consumer did not stop: " + log.read_text()[-3000:]) from None
    assert code == 0, log.read_text()[-3000:]


def _kill(proc: subprocess.Popen) -> None:
    if proc.poll() is None:
        os.kill(proc.pid, signal.SIGKILL)
    proc.wait(timeout=10)


def _dead_letters(bootstrap: str, topic: str) -> list:
    consumer = KafkaConsumer(bootstrap_servers=bootstrap, enable_auto_commit=False)
    tp = TopicPartition(topic, 0)
    consumer.assign([tp])
    end = consumer.end_offsets([tp])[tp]
    consumer.seek_to_beginning(tp)
    out: list = []
    try:
        for _ in range(100):  # bounded: at most 100 polls of 200 ms
            got = consumer.poll(timeout_ms=200)
            for recs in got.values():
                out.extend(recs)
            if not got and out and len(out) >= end:
                break
    finally:
        consumer.close()
    return out


def _check_end_state(url: str, bootstrap: str, topic: str, total: int, replay) -> None:
    mem, engine_stats = replay
    store = RedisStore.from_url(url, history_ms=HISTORY_S * 1000)
    try:
        assert sum(store.offsets().values()) == total
        counted = compare_with_replay(store, mem)
        assert counted["vehicles"] == expected_counts(CITY)["vehicles_seen"] == 20
        assert counted["cells"] > 100 and counted["routes"] > 10
        # no fix lost, none counted twice
        assert redis_cell_fixes(store.client) == engine_stats.accepted
        assert store.counters() == replay_counters(engine_stats)  # every message once
    finally:
        store.client.close()
    # every rejected message has a dead letter (a crash may have repeated some)
    letters = _dead_letters(bootstrap, f"{topic}-dead-letters")
    distinct = {}
    for rec in letters:
        h = {k: v.decode() for k, v in rec.headers}
        distinct[(h["source_partition"], int(h["source_offset"]))] = h["reason"]
    assert Counter(distinct.values()) == engine_stats.rejected
    assert len(letters) >= len(distinct)


def test_consumer_killed_mid_stream_and_restarted_ends_equal_to_replay(
        kafka_broker, redis_aof, topic, replay, tmp_path: Path, kafka_client: str) -> None:
    name, total = topic
    log = tmp_path / "ingest.log"
    client = redis_aof.client()
    group = ["--group", f"g-{name}", "--session-timeout-ms", "1000",
             "--heartbeat-interval-ms", "250"]  # a short session: the group re-forms fast
    kills = []
    try:
        for share in (0.20, 0.45, 0.70):
            proc = _ingest(kafka_broker.bootstrap, name, redis_aof.url, log, *group,
                           client=kafka_client)
            try:
                start = max(_applied(client), 0)
                kills.append(_wait_applied(proc, client, max(int(share * total), start + 1)))
            finally:
                _kill(proc)
        assert all(0 < k < total for k in kills), kills  # every kill landed mid-stream
        proc = _ingest(kafka_broker.bootstrap, name, redis_aof.url, log, *group,
                       "--idle-exit", "1.5", client=kafka_client)
        _finish(proc, log)
        _check_end_state(redis_aof.url, kafka_broker.bootstrap, name, total, replay)
    finally:
        client.close()
    text = log.read_text()
    assert text.count("(stored with the state)") >= 3  # every restart resumed from Redis
    assert ("with librdkafka" in text) == (kafka_client == "confluent")


def test_redis_killed_and_restarted_under_the_consumer_ends_equal_to_replay(
        kafka_broker, redis_aof, topic, replay, tmp_path: Path, kafka_client: str) -> None:
    """Two outages: a plain SIGKILL and restart (the AOF keeps every write), then a SIGKILL
    after which Redis comes back from an older copy of its AOF, as after losing its latest
    writes: the consumer must read the lost batches again from the offsets it finds."""
    name, total = topic
    log = tmp_path / "ingest.log"
    aof = redis_aof.dir / "appendonlydir"
    snapshot = tmp_path / "aof-snapshot"
    proc = _ingest(kafka_broker.bootstrap, name, redis_aof.url, log,
                   "--partitions", ",".join(str(p) for p in range(PARTITIONS)),
                   "--idle-exit", "3", client=kafka_client)
    client = redis_aof.client(socket_timeout=2)
    try:
        _wait_applied(proc, client, int(0.30 * total))
        redis_aof.kill()
        time.sleep(0.3)
        redis_aof.start()
        snapped = _wait_applied(proc, client, int(0.45 * total))
        shutil.copytree(aof, snapshot)  # an older copy of the log (its tail may be cut)
        before = _wait_applied(proc, client, int(0.65 * total))
        redis_aof.kill()
        shutil.rmtree(aof)
        shutil.copytree(snapshot, aof)
        redis_aof.start()
        after = _applied(client)
        assert 0 < after < before, (snapped, before, after)  # writes were lost
        _finish(proc, log)
    finally:
        client.close()
        _kill(proc)
    text = log.read_text()
    assert text.count("Redis unavailable") >= 2
    assert text.count("Redis is back") >= 2
    _check_end_state(redis_aof.url, kafka_broker.bootstrap, name, total, replay)
