"""Live ingest throughput, per Kafka client: the consumer loop of ``cellpulse ingest``
(ingest.consumer.ConsumerLoop: decode, engine, dead letters, one atomic Redis apply per batch)
in one process, from the Tansu test broker into a real redis-server, beside the floor of the
same client: a bare consumer that only reads the same topic and discards the records.

    python -m bench.ingest_throughput                  # 400 vehicles, 12 h: about 370 k fixes
    python -m bench.ingest_throughput --quick          # 150 vehicles, 6 h
    python -m bench.ingest_throughput --clients confluent

The day is pushed into 4-partition topics three times, with producer batching that gives the
broker record batches of about 16, 500 and 5,000 records. The batch sizes are checked on the
broker: the topic is read whole with kafka-python, counting every record batch its parser
opens (records per batch from each batch header); librdkafka's producer statistics give the
mean records per batch it sent. Figures
per client and batch size: floor, consumer loop with the default 900 s of history; for the
~500 batches also without history. Also the push (``replay --to-kafka``) rows/s per client
beside reading, decoding and ordering the same rows without Kafka. Not a test; timings on a
shared machine are noisy.
"""

from __future__ import annotations

import argparse
import contextlib
import sys
import tempfile
import time
import uuid
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

from bench.common import BenchEnv, BenchOptions, Figure
from featurestore.redis_store import RedisStore
from ingest.citysim import CityConfig, write_jsonl
from ingest.confluent_source import FETCH_TUNING, confluent_available
from ingest.consumer import ConsumerLoop, LoopOptions
from ingest.dead_letters import ConfluentDeadLetters, KafkaDeadLetters
from ingest.sources import KafkaSettings, KafkaSource
from replay.to_kafka import push_to_kafka, record_of

PARTITIONS = 4
BATCH_RECORDS = (16, 500, 5000)  # records per broker record batch (aimed at)
MAIN_BATCH = 500
POLL_RECORDS = 2000  # records per consumer-loop batch (--max-poll-records 2000)
TARGET_RATE = 100_000.0
TARGET_RATIO = 0.5
TARGET = "≥ 100 k/s and ≥ 0.5× floor"


@dataclass(frozen=True)
class Sizes:
    vehicles: int
    hours: float

    @classmethod
    def of(cls, opts: BenchOptions) -> Sizes:
        return cls(150, 6.0) if opts.quick else cls(400, 12.0)


def _log(text: str) -> None:
    print(f"[ingest] {text}", file=sys.stderr, flush=True)


# --- data -----------------------------------------------------------------------------------

def _records(day: Path) -> list[tuple[bytes | None, bytes, int]]:
    """(key, value, arrival ms) of every row in arrival order, as ``replay --to-kafka`` sends."""
    from replay.training import _ordered_items

    out = []
    for item in _ordered_items([day], None, False):
        if item.arrival_ms is not None:
            key, value = record_of(item)
            out.append((key, value, item.arrival_ms))
    return out


def _push_batched(bootstrap: str, topic: str, records: list, per_batch: int) -> float:
    """Produce ``records`` with librdkafka batching of about ``per_batch`` records per record
    batch (linger long enough to fill them). Returns the producer's mean records per batch."""
    from confluent_kafka import Producer

    stats: list[dict] = []
    p = Producer({"bootstrap.servers": bootstrap, "acks": "all", "enable.idempotence": True,
                  "linger.ms": {16: 50, 500: 200}.get(per_batch, 1000),
                  "batch.num.messages": per_batch,
                  "batch.size": 16 * 1024 * 1024, "message.max.bytes": 16 * 1024 * 1024,
                  "queue.buffering.max.messages": 2_000_000, "statistics.interval.ms": 500,
                  "stats_cb": lambda s: stats.append(__import__("orjson").loads(s))})
    for key, value, ts in records:
        while True:
            try:
                p.produce(topic, value=value, key=key, timestamp=ts)
                break
            except BufferError:
                p.poll(0.05)
    assert p.flush(120) == 0
    time.sleep(0.6)
    p.poll(0.1)
    batchcnt = [s["topics"][topic]["batchcnt"] for s in stats if topic in s.get("topics", {})]
    return float(batchcnt[-1]["avg"]) if batchcnt else float("nan")


def _push_plain(bootstrap: str, topic: str, records: list) -> None:
    """Without confluent-kafka: kafka-python with replay.to_kafka's batching."""
    from kafka import KafkaProducer

    from replay.to_kafka import PRODUCER_CONFIG

    p = KafkaProducer(bootstrap_servers=bootstrap, **{
        k: v for k, v in PRODUCER_CONFIG.items() if k != "allow_auto_create_topics"})
    for key, value, ts in records:
        p.send(topic, key=key, value=value, timestamp_ms=ts)
    p.flush()
    p.close()


def broker_batches(bootstrap: str, topic: str, total: int) -> dict[str, float]:
    """Count the record batches the broker holds for ``topic``: read it whole with
    kafka-python and note every batch its record parser opens (``MemoryRecords.next_batch``;
    a batch fetched twice is counted once, by base offset and CRC). Returns the number of
    batches and the mean and median records per batch."""
    import statistics

    from kafka import KafkaConsumer, TopicPartition
    from kafka.record import memory_records

    seen: dict[tuple[int, int], int] = {}
    original = memory_records.MemoryRecords.next_batch

    def counting(self, *args, **kwargs):  # type: ignore[no-untyped-def]
        batch = original(self, *args, **kwargs)
        if batch is not None and hasattr(batch, "records_count"):
            seen[(batch.base_offset, batch.crc)] = batch.records_count
        return batch

    memory_records.MemoryRecords.next_batch = counting  # type: ignore[method-assign]
    consumer = KafkaConsumer(bootstrap_servers=bootstrap, enable_auto_commit=False,
                             max_poll_records=POLL_RECORDS)
    try:
        tps = [TopicPartition(topic, p) for p in range(PARTITIONS)]
        consumer.assign(tps)
        consumer.seek_to_beginning(*tps)
        n, deadline = 0, time.monotonic() + 120
        while n < total and time.monotonic() < deadline:
            n += sum(len(v) for v in consumer.poll(timeout_ms=500).values())
    finally:
        memory_records.MemoryRecords.next_batch = original  # type: ignore[method-assign]
        consumer.close()
    sizes = list(seen.values())
    assert sum(sizes) == total, (sum(sizes), total)
    return {"broker_batches": len(sizes),
            "broker_mean_records_per_batch": round(statistics.fmean(sizes), 1),
            "broker_median_records_per_batch": statistics.median(sizes)}


# --- floors -----------------------------------------------------------------------------------

def floor_kafka_python(bootstrap: str, topic: str, total: int) -> float:
    from kafka import KafkaConsumer, TopicPartition

    consumer = KafkaConsumer(bootstrap_servers=bootstrap, enable_auto_commit=False,
                             max_poll_records=POLL_RECORDS)
    tps = [TopicPartition(topic, p) for p in range(PARTITIONS)]
    consumer.assign(tps)
    consumer.seek_to_beginning(*tps)
    t0 = time.perf_counter()
    n = 0
    while n < total:
        n += sum(len(v) for v in consumer.poll(timeout_ms=500).values())
    seconds = time.perf_counter() - t0
    consumer.close()
    return total / seconds


def floor_confluent(bootstrap: str, topic: str, total: int) -> float:
    from confluent_kafka import OFFSET_BEGINNING, Consumer, TopicPartition

    consumer = Consumer({"bootstrap.servers": bootstrap, "group.id": "bench-floor",
                         "enable.auto.commit": False, **FETCH_TUNING})
    consumer.list_topics(timeout=10)  # leaders known before the assignment, as in the source
    t0 = time.perf_counter()
    consumer.assign([TopicPartition(topic, p, OFFSET_BEGINNING) for p in range(PARTITIONS)])
    n = 0
    while n < total:  # what is ready, else wait for the first record (as ConfluentSource.poll)
        msgs = consumer.consume(POLL_RECORDS, 0) or consumer.consume(1, 0.5)
        n += sum(1 for m in msgs if m.error() is None)
    seconds = time.perf_counter() - t0
    consumer.close()
    return total / seconds


FLOORS = {"kafka-python": floor_kafka_python, "confluent": floor_confluent}


# --- the consumer loop --------------------------------------------------------------------------

def consume(client: str, bootstrap: str, topic: str, url: str, history_s: float, total: int,
            profile: str | None = None) -> float:
    """Fixes per second of the consumer loop reading the whole topic into a flushed Redis."""
    store = RedisStore.from_url(url, history_ms=round(history_s * 1000))
    store.client.flushall()
    settings = KafkaSettings(max_poll_records=POLL_RECORDS)
    group = f"bench-{uuid.uuid4().hex[:6]}"
    if client == "confluent":
        from ingest.confluent_source import ConfluentSource

        source: Any = ConfluentSource(bootstrap, topic, group, partitions=range(PARTITIONS),
                                      settings=settings)
        sink: Any = ConfluentDeadLetters(bootstrap, f"{topic}-dead-letters")
    else:
        source = KafkaSource(bootstrap, topic, group, partitions=range(PARTITIONS),
                             settings=settings)
        sink = KafkaDeadLetters(bootstrap, f"{topic}-dead-letters")
    loop = ConsumerLoop(source, store, sink,
                        options=LoopOptions(max_poll_records=POLL_RECORDS, max_records=total))
    t0 = time.perf_counter()
    if profile:
        from pyinstrument import Profiler

        with Profiler(interval=0.001) as prof:
            stats = loop.run()
        Path(profile).write_text(prof.output_text(unicode=False, color=False, show_all=False))
    else:
        stats = loop.run()
    seconds = time.perf_counter() - t0
    store.client.close()
    assert stats.received == total, (stats.received, total)
    return total / seconds


# --- the push ------------------------------------------------------------------------------------

def push_figures(bootstrap: str, day: Path, clients: tuple[str, ...], rows: int,
                 create_topic: Any) -> list[Figure]:
    from replay.training import _ordered_items

    t0 = time.perf_counter()
    n = sum(1 for it in _ordered_items([day], None, False) if it.arrival_ms is not None)
    floor = n / (time.perf_counter() - t0)
    out = []
    for client in clients:
        topic = f"bench-push-{uuid.uuid4().hex[:8]}"
        create_topic(topic, 8)
        s = push_to_kafka([day], bootstrap, topic, kafka_client=client)
        assert s.delivered == rows, (s.delivered, rows)
        _log(f"push ({client}): {s.rows_per_s:,.0f} rows/s")
        out.append(Figure("ingest", f"push, replay --to-kafka ({client}), 8 partitions",
                          s.rows_per_s, "rows/s", floor,
                          "reading, decoding, ordering the rows (no Kafka)",
                          extra={"rows": rows, "client": client}))
    return out


# --- run ------------------------------------------------------------------------------------

def _ratio_met(value: float, floor: float) -> bool:
    return value >= TARGET_RATE and value >= TARGET_RATIO * floor


def run(opts: BenchOptions, env: BenchEnv) -> list[Figure]:
    clients = tuple(c for c in opts.kafka_clients
                    if c == "kafka-python" or (c == "confluent" and confluent_available()))
    skipped = [c for c in opts.kafka_clients if c not in clients]
    if skipped:
        _log(f"skipping {', '.join(skipped)}: confluent-kafka is not installed "
             '(pip install -e ".[fast]")')
    sizes = Sizes.of(opts)
    with contextlib.ExitStack() as stack:
        bootstrap, url = env.bootstrap, env.redis_url
        if bootstrap is None or url is None:
            from bench.servers import KafkaBroker, RedisServer

            if bootstrap is None:
                broker = stack.enter_context(KafkaBroker())
                bootstrap = broker.bootstrap
            if url is None:
                url = stack.enter_context(RedisServer()).url
        tmp = stack.enter_context(tempfile.TemporaryDirectory())
        day = Path(opts.data_dir or tmp) / f"ingest-{sizes.vehicles}v-{sizes.hours:g}h-" \
                                           f"s{opts.seed}.jsonl"
        if not day.exists():
            _log(f"generating {sizes.vehicles} vehicles x {sizes.hours:g} h")
            write_jsonl(day, CityConfig(seed=opts.seed, vehicles=sizes.vehicles,
                                        hours=sizes.hours))
        records = _records(day)
        total = len(records)
        _log(f"{total:,} records; broker {bootstrap}, redis {url}")

        def create_topic(name: str, partitions: int) -> None:
            from replay.to_kafka import ensure_topic

            ensure_topic(bootstrap, name, partitions)

        topics: dict[int, tuple[str, str, dict[str, Any]]] = {}
        for per_batch in (BATCH_RECORDS if confluent_available() else (MAIN_BATCH,)):
            topic = f"bench-ingest-{per_batch}-{uuid.uuid4().hex[:6]}"
            create_topic(topic, PARTITIONS)
            create_topic(f"{topic}-dead-letters", 1)
            if confluent_available():
                mean = _push_batched(bootstrap, topic, records, per_batch)
                info = {"producer_mean_records_per_batch": round(mean, 1),
                        **broker_batches(bootstrap, topic, total)}
                label = f"~{per_batch} records per broker batch"
            else:
                _push_plain(bootstrap, topic, records)
                info = broker_batches(bootstrap, topic, total)
                label = (f"~{info['broker_mean_records_per_batch']:.0f} records per broker "
                         "batch (kafka-python producer)")
            _log(f"topic with {label}: {info}")
            topics[per_batch] = (topic, label, info)

        figures: list[Figure] = []
        for client in clients:
            for per_batch, (topic, label, info) in topics.items():
                floor = FLOORS[client](bootstrap, topic, total)
                _log(f"{client}, {label}: floor {floor:,.0f}/s")
                histories = (900.0, 0.0) if per_batch == MAIN_BATCH else (900.0,)
                for history in histories:
                    rate = consume(client, bootstrap, topic, url, history, total)
                    _log(f"{client}, {label}, history {history:g} s: "
                         f"{rate:,.0f}/s ({rate / floor:.2f}x floor)")
                    figures.append(Figure(
                        "ingest", f"consumer loop ({client}), history {history:g} s, {label}",
                        rate, "fixes/s", floor, f"bare {client} consumer, same topic",
                        target=TARGET, met=_ratio_met(rate, floor),
                        extra={"records": total, "partitions": PARTITIONS,
                               "poll_records": POLL_RECORDS, "client": client,
                               "history_s": history, **info}))
        figures += push_figures(bootstrap, day, clients, total, create_topic)
        return figures


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="a smaller day")
    ap.add_argument("--clients", default="kafka-python,confluent",
                    help="comma-separated Kafka clients (default both)")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--data-dir", help="keep the generated day here")
    ap.add_argument("--profile", metavar="FILE",
                    help="instead: profile one consumer-loop run (first client, ~500 records "
                         "per batch) with pyinstrument into FILE")
    ap.add_argument("--history", type=float, default=900.0,
                    help="history of the profiled run, seconds (default 900)")
    args = ap.parse_args()
    opts = replace(BenchOptions(), quick=args.quick, seed=args.seed, data_dir=args.data_dir,
                   kafka_clients=tuple(c.strip() for c in args.clients.split(",") if c.strip()))
    if args.profile:
        profile(opts, args.profile, args.history)
        return
    figures = run(opts, BenchEnv())
    print(f"{'what':74} {'value':>10} {'floor':>10} {'ratio':>6} {'met':>4}")
    for f in figures:
        met = "" if f.met is None else ("yes" if f.met else "NO")
        print(f"{f.what:74} {f.value:10,.0f} {f.floor or 0:10,.0f} {f.ratio or 0:6.2f} {met:>4}")


def profile(opts: BenchOptions, out: str, history_s: float = 900.0) -> None:
    """One consumer-loop run under pyinstrument (``pip install pyinstrument``)."""
    from bench.servers import KafkaBroker, RedisServer

    client = opts.kafka_clients[0]
    sizes = Sizes.of(opts)
    with tempfile.TemporaryDirectory() as tmp, KafkaBroker() as broker, RedisServer() as redis:
        day = Path(tmp) / "day.jsonl"
        write_jsonl(day, CityConfig(seed=opts.seed, vehicles=sizes.vehicles, hours=sizes.hours))
        records = _records(day)
        topic = f"bench-profile-{uuid.uuid4().hex[:6]}"
        broker.create_topic(topic, PARTITIONS)
        broker.create_topic(f"{topic}-dead-letters", 1)
        if confluent_available():
            _push_batched(broker.bootstrap, topic, records, MAIN_BATCH)
        else:
            _push_plain(broker.bootstrap, topic, records)
        rate = consume(client, broker.bootstrap, topic, redis.url, history_s, len(records),
                       profile=out)
        print(f"{client}: {rate:,.0f} fixes/s under the profiler; profile in {out}")


if __name__ == "__main__":
    main()
