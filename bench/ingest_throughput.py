"""Throughput of the live consumer (ingest.consumer) from the Tansu test broker into a real
redis-server, one process.

    python -m bench.ingest_throughput                  # a generated day of 200 vehicles, 8 h
    python -m bench.ingest_throughput --vehicles 445 --hours 24

The day is pushed once into a 4-partition topic (replay.to_kafka). Figures, each reading the
whole topic from the start: the floor (kafka-python polling every record, no decoding, no
Redis), then the consumer loop (decode, engine, dead letters, one atomic Redis apply per batch)
into a flushed Redis with the default 900 s of history and without history, at two batch sizes.
Not a test.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
import uuid
from pathlib import Path

from featurestore.redis_store import RedisStore
from ingest.citysim import CityConfig, write_jsonl
from ingest.consumer import ConsumerLoop, LoopOptions
from ingest.dead_letters import KafkaDeadLetters
from ingest.sources import KafkaSettings, KafkaSource
from replay.to_kafka import push_to_kafka

PARTITIONS = 4


def floor(bootstrap: str, topic: str, total: int) -> float:
    from kafka import KafkaConsumer, TopicPartition

    consumer = KafkaConsumer(bootstrap_servers=bootstrap, enable_auto_commit=False,
                             max_poll_records=2000)
    tps = [TopicPartition(topic, p) for p in range(PARTITIONS)]
    consumer.assign(tps)
    consumer.seek_to_beginning(*tps)
    t0 = time.perf_counter()
    n = 0
    while n < total:
        n += sum(len(v) for v in consumer.poll(timeout_ms=500).values())
    seconds = time.perf_counter() - t0
    consumer.close()
    return seconds


def consume(bootstrap: str, topic: str, url: str, history_s: float, batch: int,
            total: int) -> float:
    store = RedisStore.from_url(url, history_ms=round(history_s * 1000))
    store.client.flushall()
    source = KafkaSource(bootstrap, topic, f"bench-{uuid.uuid4().hex[:6]}",
                         partitions=range(PARTITIONS),
                         settings=KafkaSettings(max_poll_records=batch))
    loop = ConsumerLoop(source, store, KafkaDeadLetters(bootstrap, f"{topic}-dead-letters"),
                        options=LoopOptions(max_poll_records=batch, max_records=total))
    t0 = time.perf_counter()
    stats = loop.run()
    seconds = time.perf_counter() - t0
    assert stats.received == total, (stats.received, total)
    return seconds


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--vehicles", type=int, default=200)
    ap.add_argument("--hours", type=float, default=8.0)
    ap.add_argument("--seed", type=int, default=7)
    args = ap.parse_args()
    sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "tests"))
    from servers import KafkaBroker, RedisServer

    with tempfile.TemporaryDirectory() as tmp, KafkaBroker() as broker, RedisServer() as redis:
        day = Path(tmp) / "day.jsonl"
        write_jsonl(day, CityConfig(seed=args.seed, vehicles=args.vehicles, hours=args.hours))
        topic = f"bench-ingest-{uuid.uuid4().hex[:8]}"
        broker.create_topic(topic, PARTITIONS)
        broker.create_topic(f"{topic}-dead-letters", 1)
        pushed = push_to_kafka([day], broker.bootstrap, topic)
        total = pushed.delivered
        print(f"{total:,} records in {PARTITIONS} partitions; broker {broker.bootstrap}, "
              f"redis-server {redis.url}")
        print(f"{'what':52} {'seconds':>8} {'fixes/s':>10} {'ratio to floor':>15}")
        floor_s = floor(broker.bootstrap, topic, total)
        print(f"{'floor: kafka-python poll only (no decode, no Redis)':52} {floor_s:8.2f} "
              f"{total / floor_s:10,.0f} {1.0:15.2f}", flush=True)
        for history_s, batch in ((900, 500), (900, 2000), (0, 500), (0, 2000)):
            s = consume(broker.bootstrap, topic, redis.url, history_s, batch, total)
            label = f"consumer loop, history {history_s:g} s, batches of {batch}"
            print(f"{label:52} {s:8.2f} {total / s:10,.0f} {floor_s / s:15.2f}", flush=True)


if __name__ == "__main__":
    main()
