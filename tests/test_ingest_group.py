"""Consumer groups on the real broker: a second member joins mid-stream (the partitions move,
each new owner resumes from the offsets in Redis, a batch the old owner applied late is refused),
and a member stopped by SIGTERM leaves cleanly; the final state equals replay."""

from __future__ import annotations

import signal
import subprocess
import sys
import threading
import time
import uuid
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

from featurestore.redis_store import RedisStore
from ingest.citysim import CityConfig, write_jsonl
from ingest.consumer import ConsumerLoop, LoopOptions
from ingest.dead_letters import KafkaDeadLetters
from ingest.sources import KafkaSettings, KafkaSource

PARTITIONS = 4
WAIT_S = 60.0
# a short session so that the group re-forms within about a second on this broker
SETTINGS = KafkaSettings(session_timeout_ms=1000, heartbeat_interval_ms=250,
                         max_poll_records=10, fetch_max_wait_ms=100)


@pytest.fixture(scope="module")
def day(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("grp") / "day.jsonl"
    write_jsonl(path, CityConfig(seed=31, vehicles=60, hours=1))
    return path


@pytest.fixture(scope="module")
def replay(day: Path):
    return replayed(day)


@pytest.fixture
def topic(kafka_broker, day: Path) -> tuple[str, int]:
    name = f"grp-{uuid.uuid4().hex[:8]}"
    kafka_broker.create_topic(name, PARTITIONS)
    kafka_broker.create_topic(f"{name}-dead-letters", 1)
    lines = [x for x in day.read_bytes().splitlines() if x.strip()]
    return name, produce_day(kafka_broker.bootstrap, name, lines)


class _Slowed:
    """A store whose applies take 30 ms longer while ``slow()`` says so (the test keeps the
    first member busy until the second has joined, however long the join takes)."""

    def __init__(self, store: RedisStore, slow) -> None:
        self.store = store
        self.history_ms = store.history_ms
        self.slow = slow

    def apply(self, delta) -> None:
        if self.slow():
            time.sleep(0.03)
        self.store.apply(delta)

    def __getattr__(self, name):
        return getattr(self.store, name)


def _member(bootstrap: str, topic: str, url: str, group: str, slow=lambda: False,
            client: str = "kafka-python") -> ConsumerLoop:
    if client == "confluent":
        from ingest.confluent_source import ConfluentSource
        from ingest.dead_letters import ConfluentDeadLetters

        source: object = ConfluentSource(bootstrap, topic, group, settings=SETTINGS)
        sink: object = ConfluentDeadLetters(bootstrap, f"{topic}-dead-letters")
    else:
        source = KafkaSource(bootstrap, topic, group, settings=SETTINGS)
        sink = KafkaDeadLetters(bootstrap, f"{topic}-dead-letters")
    return ConsumerLoop(source, _Slowed(RedisStore.from_url(url, history_ms=900_000), slow),
                        sink,
                        options=LoopOptions(max_poll_records=10, poll_timeout_s=0.1,
                                            idle_exit_s=3.0))


def _applied(store: RedisStore) -> int:
    return sum(store.offsets().values())


@pytest.mark.parametrize("client", KAFKA_CLIENTS)
def test_a_second_member_takes_over_partitions_and_the_state_equals_replay(
        kafka_broker, redis_url: str, topic, replay, client: str) -> None:
    name, total = topic
    group = f"g-{name}"
    store = RedisStore.from_url(redis_url, history_ms=900_000)
    joined = threading.Event()
    first = _member(kafka_broker.bootstrap, name, redis_url, group,
                    slow=lambda: _applied(store) >= total // 5 and not joined.is_set(),
                    client=client)
    errors: list[BaseException] = []

    def run(loop: ConsumerLoop) -> None:
        try:
            loop.run()
        except BaseException as exc:  # noqa: BLE001 - reported by the test
            errors.append(exc)

    t1 = threading.Thread(target=run, args=(first,), daemon=True)
    t1.start()
    deadline = time.monotonic() + WAIT_S
    while _applied(store) < total // 5 and time.monotonic() < deadline:
        time.sleep(0.005)
    assert _applied(store) < total  # the second member joins mid-stream
    second = _member(kafka_broker.bootstrap, name, redis_url, group, client=client)
    t2 = threading.Thread(target=run, args=(second,), daemon=True)
    t2.start()
    while not second.source.assignment() and time.monotonic() < deadline:
        time.sleep(0.01)
    joined.set()
    for t in (t1, t2):
        t.join(timeout=WAIT_S)
        assert not t.is_alive()
    assert not errors, errors
    assert _applied(store) == total
    # both members applied messages: the partitions were shared out
    assert first.stats.received > 0 and second.stats.received > 0
    mem, engine_stats = replay
    compare_with_replay(store, mem)
    assert redis_cell_fixes(store.client) == engine_stats.accepted
    assert store.counters() == replay_counters(engine_stats)
    # every message was applied once: what each member counted adds up to the topic
    assert first.stats.received + second.stats.received == total


def test_sigterm_stops_cleanly_and_a_restart_completes_the_state(
        kafka_broker, redis_url: str, topic, replay, tmp_path: Path) -> None:
    name, total = topic
    log = tmp_path / "ingest.log"
    argv = [sys.executable, "-m", "featurestore.cli", "ingest", "--bootstrap",
            kafka_broker.bootstrap, "--topic", name, "--redis-url", redis_url,
            "--group", f"g-{name}", "--session-timeout-ms", "3000",
            "--heartbeat-interval-ms", "750", "--max-poll-records", "10"]
    store = RedisStore.from_url(redis_url, history_ms=900_000)
    with open(log, "ab") as fh:
        proc = subprocess.Popen(argv, stdout=fh, stderr=subprocess.STDOUT)
    try:
        deadline = time.monotonic() + WAIT_S
        while _applied(store) < total // 3 and time.monotonic() < deadline:
            assert proc.poll() is None, log.read_text()
            time.sleep(0.005)
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=30) == 0, log.read_text()
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    text = log.read_text()
    assert "SIGTERM received" in text
    assert "revoked" in text  # it left the group on the way out
    stopped_at = _applied(store)
    assert 0 < stopped_at < total
    with open(log, "ab") as fh:
        rest = subprocess.run([*argv, "--idle-exit", "2"], stdout=fh, stderr=subprocess.STDOUT,
                              timeout=WAIT_S)
    assert rest.returncode == 0, log.read_text()
    mem, engine_stats = replay
    compare_with_replay(store, mem)
    assert redis_cell_fixes(store.client) == engine_stats.accepted
    assert store.counters() == replay_counters(engine_stats)
