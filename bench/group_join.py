"""How long a kafka-python consumer takes to get partitions from the Tansu test broker.

    python -m bench.group_join                 # starts its own broker on loopback
    python -m bench.group_join --quick         # skips the 45 s default session (about 23 s)
    python -m bench.group_join --bootstrap 127.0.0.1:9092

Each scenario creates a consumer for a topic that already holds records and measures, from
the moment the consumer is created, the seconds until it has an assignment and until its
first record arrives. The floor, measured in the same run, is manual partition assignment
(``assign`` + ``seek_to_beginning``), which needs no group coordination at all. Scenarios:

- ``group``: a fresh consumer group, one member, with the given session timeout;
- ``after crash``: a member of the group is SIGKILLed (it never sends LeaveGroup), then a new
  member joins the same group;
- ``joins a live member``: a second member joins while the first keeps polling (a rebalance);
- ``static``: static membership (``group_instance_id``).

Not a test: timing figures vary with the machine and go into the README, never into asserts.
"""

from __future__ import annotations

import argparse
import os
import signal
import statistics
import subprocess
import sys
import time
import uuid
from dataclasses import dataclass

from kafka import KafkaConsumer, KafkaProducer, TopicPartition

PARTITIONS = 4
RECORDS = 200
JOIN_LIMIT_S = 90.0  # bound on each wait; a join that takes longer is reported as failed


@dataclass(frozen=True)
class Scenario:
    label: str
    session_ms: int | None  # None: kafka-python's default (45000)
    heartbeat_ms: int | None = None
    static: bool = False
    after_crash: bool = False
    beside_live: bool = False


def _consumer_config(s: Scenario, group: str) -> dict:
    cfg: dict = dict(group_id=group, auto_offset_reset="earliest", enable_auto_commit=False)
    if s.session_ms is not None:
        cfg["session_timeout_ms"] = s.session_ms
    if s.heartbeat_ms is not None:
        cfg["heartbeat_interval_ms"] = s.heartbeat_ms
    if s.static:
        cfg["group_instance_id"] = f"member-{uuid.uuid4().hex[:8]}"
    return cfg


def _wait(consumer: KafkaConsumer, t0: float) -> tuple[float, float]:
    """Poll until the consumer has an assignment and a first record; seconds from t0."""
    t_assign = t_first = float("nan")
    while time.perf_counter() - t0 < JOIN_LIMIT_S:
        got = consumer.poll(timeout_ms=20)
        now = time.perf_counter() - t0
        if t_assign != t_assign and consumer.assignment():  # nan check
            t_assign = now
        if got:
            if t_assign != t_assign:
                t_assign = now
            t_first = now
            break
    return t_assign, t_first


def manual(bootstrap: str, topic: str) -> tuple[float, float]:
    t0 = time.perf_counter()
    consumer = KafkaConsumer(bootstrap_servers=bootstrap, enable_auto_commit=False)
    try:
        parts = [TopicPartition(topic, p) for p in range(PARTITIONS)]
        consumer.assign(parts)
        consumer.seek_to_beginning(*parts)
        return _wait(consumer, t0)
    finally:
        consumer.close()


_MEMBER = """
import sys, time
from kafka import KafkaConsumer
cfg = eval(sys.argv[3])
c = KafkaConsumer(sys.argv[2], bootstrap_servers=sys.argv[1], **cfg)
deadline = time.monotonic() + 120
while not c.assignment() and time.monotonic() < deadline:
    c.poll(timeout_ms=50)
print("joined" if c.assignment() else "timeout", flush=True)
deadline = time.monotonic() + 300
while time.monotonic() < deadline:  # keep the membership alive until SIGKILLed
    c.poll(timeout_ms=50)
"""


def _start_member(bootstrap: str, topic: str, cfg: dict) -> subprocess.Popen:
    """Start a member in a child process and wait until it has partitions."""
    proc = subprocess.Popen(
        [sys.executable, "-c", _MEMBER, bootstrap, topic, repr(cfg)],
        stdout=subprocess.PIPE, text=True,
    )
    line = proc.stdout.readline().strip()
    if line != "joined":
        _kill(proc)
        raise RuntimeError(f"the other member did not join: {line!r}")
    return proc


def _kill(proc: subprocess.Popen) -> None:
    """SIGKILL by PID: the member never sends LeaveGroup."""
    if proc.poll() is None:
        os.kill(proc.pid, signal.SIGKILL)
    proc.wait(timeout=10)


def group(bootstrap: str, topic: str, s: Scenario) -> tuple[float, float]:
    grp = f"bench-{uuid.uuid4().hex[:10]}"
    cfg = _consumer_config(s, grp)
    other = None
    if s.after_crash or s.beside_live:
        other = _start_member(bootstrap, topic, cfg)
        if s.after_crash:
            _kill(other)
    t0 = time.perf_counter()
    consumer = KafkaConsumer(topic, bootstrap_servers=bootstrap, **cfg)
    try:
        return _wait(consumer, t0)
    finally:
        consumer.close()
        if other is not None:
            _kill(other)


def _fill(bootstrap: str, topic: str) -> None:
    producer = KafkaProducer(bootstrap_servers=bootstrap, acks="all", linger_ms=5)
    for i in range(RECORDS):
        producer.send(topic, key=f"veh-{i % 17}".encode(), value=b"{}")
    producer.flush(timeout=30)
    producer.close()


def _fmt(xs: list[float]) -> str:
    if any(x != x for x in xs):
        return f"failed (no assignment within {JOIN_LIMIT_S:.0f} s)"
    if len(xs) == 1:
        return f"{xs[0]:6.2f}"
    return f"{statistics.median(xs):6.2f}  ({min(xs):.2f}-{max(xs):.2f})"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--bootstrap", help="an existing broker; default: start Tansu on loopback")
    ap.add_argument("--repeat", type=int, default=3, help="runs per scenario (default 3)")
    ap.add_argument("--quick", action="store_true", help="skip the default 45 s session")
    args = ap.parse_args()

    from bench.servers import KafkaBroker, create_topic

    broker = None
    bootstrap = args.bootstrap
    if bootstrap is None:
        broker = KafkaBroker()
        broker.start()
        bootstrap = broker.bootstrap
    try:
        topic = f"bench-join-{uuid.uuid4().hex[:8]}"
        if broker is not None:
            broker.create_topic(topic, PARTITIONS)
        else:
            from kafka.admin import KafkaAdminClient

            admin = KafkaAdminClient(bootstrap_servers=bootstrap)
            create_topic(admin, topic, PARTITIONS)
            admin.close()
        _fill(bootstrap, topic)

        scenarios = [
            Scenario("group, session 6000 / heartbeat 2000", 6000, 2000),
            Scenario("group, session 3000 / heartbeat 1000", 3000, 1000),
            Scenario("group, session 1000 / heartbeat 300", 1000, 300),
            Scenario("group, session 6000 / heartbeat 500", 6000, 500),
            Scenario("joins a live member, session 6000 / hb 2000", 6000, 2000,
                     beside_live=True),
            Scenario("joins a live member, session 1000 / hb 300", 1000, 300, beside_live=True),
            Scenario("after crash, session 6000 / heartbeat 2000", 6000, 2000, after_crash=True),
            Scenario("after crash, session 1000 / heartbeat 300", 1000, 300, after_crash=True),
            Scenario("static member, session 6000 / heartbeat 2000", 6000, 2000, static=True),
        ]
        if not args.quick:
            scenarios.insert(0, Scenario("group, kafka-python defaults (45000 / 3000)", None))

        print(f"broker {bootstrap}, topic {topic}: {PARTITIONS} partitions, {RECORDS} records; "
              f"seconds from consumer creation, median (min-max) of {args.repeat}")
        floor = [manual(bootstrap, topic) for _ in range(args.repeat)]
        floor_first = statistics.median(f for _a, f in floor)
        print(f"{'scenario':48} {'assigned':>22} {'first record':>22} {'/ floor':>8}")
        print(f"{'manual assign + seek_to_beginning (floor)':48} "
              f"{_fmt([a for a, _f in floor]):>22} {_fmt([f for _a, f in floor]):>22} "
              f"{1.0:8.1f}")
        for s in scenarios:
            runs = 1 if s.session_ms is None else args.repeat
            res = [group(bootstrap, topic, s) for _ in range(runs)]
            firsts = [f for _a, f in res]
            ratio = statistics.median(firsts) / floor_first if floor_first > 0 else float("nan")
            print(f"{s.label:48} {_fmt([a for a, _f in res]):>22} {_fmt(firsts):>22} "
                  f"{ratio:8.1f}", flush=True)
    finally:
        if broker is not None:
            broker.close()


if __name__ == "__main__":
    main()
