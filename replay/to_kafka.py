"""Push recorded fixes into a Kafka topic in arrival order, as fast as possible or paced.

Each row becomes one record: key = the vehicle id (so one vehicle's fixes stay in one
partition, in order), value = the message as JSON, timestamp = the recorded arrival time.
Inputs are read and ordered exactly as replay reads them (``replay.readers`` and
``replay.ordering``), so a day pushed here and consumed by the live path meets the same
messages, in the same order, that ``cellpulse replay`` processes.

Broken rows are sent too, so that the live path dead-letters them: a JSON Lines line goes
out byte for byte as recorded; a Parquet or CSV row that fails validation goes out as its
cells in JSON (the raw form dead letters keep). Only rows without a usable arrival time
cannot be placed in time; they are skipped and counted.
"""

from __future__ import annotations

import datetime as dt
import math
import threading
import time
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import orjson

from featurestore.schema import Fix, Rejection
from replay.readers import InputError, Item, count_rows, detect_format, expand_inputs

# Reads, decodes and orders inputs exactly as replay does (arrival order, ties in file order).
from replay.training import _ordered_items

NO_ARRIVAL = "no_arrival"
SEND_ERROR_PREFIX = "send_error:"
MAX_EXAMPLES = 20
MAX_KEY_BYTES = 256
# kafka-python 3 buffers without bound: flush after this many sends to bound memory.
FLUSH_EVERY = 50_000

# Up to 256 KiB per partition batch, waiting up to 20 ms to fill it: fewer, larger requests
# over a real network. On loopback it measures the same as kafka-python's defaults (about
# 30-40 k rows/s either way, bench/push_throughput.py): the client's per-record send() in
# Python is the limit there. acks=all with idempotence keeps each partition's records in send
# order across retries, so arrival times never decrease within a partition.
PRODUCER_CONFIG: dict[str, Any] = {
    "acks": "all",
    "enable_idempotence": True,
    "linger_ms": 20,
    "batch_size": 256 * 1024,
    "max_request_size": 4 * 1024 * 1024,
    "max_block_ms": 15_000,
    "bootstrap_timeout_ms": 15_000,
    "allow_auto_create_topics": False,
}


# The librdkafka producer (``kafka_client="confluent"``, pip install "cellpulse[fast]"): the same
# semantics (acks=all with idempotence keeps each partition's records in send order across
# retries), with linger and batch limits that fill large record batches; it produces about
# 0.9 M rows/s into the test broker where kafka-python's per-record send() in Python manages
# 30-40 k (bench/ingest_throughput.py measures both).
CONFLUENT_PRODUCER_CONFIG: dict[str, Any] = {
    "acks": "all",
    "enable.idempotence": True,
    "linger.ms": 20,
    "batch.num.messages": 10_000,
    "batch.size": 4 * 1024 * 1024,
    "message.max.bytes": 4 * 1024 * 1024,
    "queue.buffering.max.messages": 1_000_000,
    "message.timeout.ms": 60_000,
    "log.connection.close": False,
}
KAFKA_CLIENTS = ("kafka-python", "confluent")


class PushError(ValueError):
    """The broker or topic cannot take the push (unreachable, topic missing)."""


@dataclass
class PushSummary:
    """What a push did: rows read, sent, skipped (and why), the arrival span and the pace."""

    topic: str
    bootstrap: str
    speed: float | None
    partitions: int | None = None
    rows_read: int = 0
    sent: int = 0
    sent_invalid: Counter = field(default_factory=Counter)  # sent, will be dead-lettered live
    skipped: Counter = field(default_factory=Counter)
    skipped_examples: list[dict[str, Any]] = field(default_factory=list)
    failed: Counter = field(default_factory=Counter)  # sends the broker did not acknowledge
    first_arrival_ms: int | None = None
    last_arrival_ms: int | None = None
    seconds: float = 0.0

    @property
    def rows_per_s(self) -> float:
        return self.sent / self.seconds if self.seconds > 0 else math.nan

    @property
    def delivered(self) -> int:
        return self.sent - sum(self.failed.values())

    def as_dict(self) -> dict[str, Any]:
        return {
            "topic": self.topic, "bootstrap": self.bootstrap,
            "speed": "max" if self.speed is None else self.speed,
            "partitions": self.partitions, "rows_read": self.rows_read, "sent": self.sent,
            "delivered": self.delivered, "sent_invalid": dict(self.sent_invalid),
            "skipped": dict(self.skipped), "skipped_examples": self.skipped_examples,
            "failed": dict(self.failed),
            "first_arrival_ts": _iso(self.first_arrival_ms),
            "last_arrival_ts": _iso(self.last_arrival_ms),
            "arrival_span_s": (None if self.first_arrival_ms is None else
                               (self.last_arrival_ms - self.first_arrival_ms) / 1000),
            "seconds": round(self.seconds, 3), "rows_per_s": round(self.rows_per_s, 1),
        }


def _iso(ms: int | None) -> str | None:
    if ms is None:
        return None
    stamp = dt.datetime.fromtimestamp(ms / 1000, tz=dt.timezone.utc)
    return stamp.isoformat(timespec="milliseconds").replace("+00:00", "Z")


def _raw_vehicle_key(raw: bytes) -> bytes | None:
    """The vehicle_id text of a message that failed validation, if it has one, so that it
    lands in that vehicle's partition; None when the message has no readable vehicle_id."""
    try:
        d = orjson.loads(raw)
    except orjson.JSONDecodeError:
        return None
    vid = d.get("vehicle_id") if isinstance(d, dict) else None
    if isinstance(vid, bool) or vid is None:
        return None
    if isinstance(vid, (int, float)):
        vid = str(vid)
    if not isinstance(vid, str):
        return None
    key = vid.encode("utf-8", "surrogatepass")
    return key if 0 < len(key) <= MAX_KEY_BYTES else None


def record_of(item: Item) -> tuple[bytes | None, bytes]:
    """The (key, value) a recorded row is sent as.

    A valid fix: key = its vehicle id; value = the JSON Lines line as recorded, or for a
    table row the message as JSON (``Fix.to_record``, which decodes back to the same fix).
    A rejected row: value = its raw form (the line as recorded, or the row's cells as JSON);
    key = its vehicle id when it has a usable one, else None.
    """
    value = item.value
    if isinstance(value, Fix):
        raw = item.raw if item.raw is not None else orjson.dumps(value.to_record())
        return value.vehicle_id.encode(), raw
    key = value.vehicle_id.encode() if value.vehicle_id else _raw_vehicle_key(value.raw)
    return key, value.raw


def parse_speed(text: str | float | None) -> float | None:
    """``max`` (or None) = as fast as possible; a number > 0 = that many times real time."""
    if text is None or (isinstance(text, str) and text.strip().lower() == "max"):
        return None
    try:
        speed = float(text)
    except ValueError as exc:
        raise ValueError(f"speed {text!r}: give a number > 0 (60 = 60x real time) or 'max'"
                         ) from exc
    if not math.isfinite(speed) or speed <= 0:
        raise ValueError(f"speed {text!r}: give a number > 0 (60 = 60x real time) or 'max'")
    return speed


def _default_producer(**config: Any) -> Any:
    from kafka import KafkaProducer
    from kafka.errors import KafkaError

    try:
        return KafkaProducer(**config)
    except KafkaError as exc:  # kafka-python 3: KafkaTimeoutError "Unable to bootstrap"
        raise PushError(f"no Kafka broker answers at {config.get('bootstrap_servers')}: "
                        f"{exc}") from exc


def _admin(bootstrap: str, timeout_s: float) -> Any:
    from kafka.admin import KafkaAdminClient
    from kafka.errors import KafkaError

    try:
        return KafkaAdminClient(bootstrap_servers=bootstrap,
                                bootstrap_timeout_ms=int(timeout_s * 1000))
    except KafkaError as exc:  # kafka-python 3: KafkaTimeoutError "Unable to bootstrap"
        raise PushError(f"no Kafka broker answers at {bootstrap}: {exc}") from exc


def _partition_count(admin: Any, topic: str) -> int | None:
    """Partitions of ``topic``, or None when the broker does not list it. Asks for the list of
    all topics first: some brokers (Tansu) create a topic that metadata names."""
    if topic not in admin.list_topics():
        return None
    (info,) = admin.describe_topics([topic])
    return len(info.get("partitions") or [])


def topic_partitions(bootstrap: str, topic: str, timeout_s: float = 15.0) -> int | None:
    """How many partitions ``topic`` has on the broker, or None when it does not exist."""
    admin = _admin(bootstrap, timeout_s)
    try:
        return _partition_count(admin, topic)
    finally:
        admin.close()


def ensure_topic(bootstrap: str, topic: str, partitions: int, timeout_s: float = 15.0
                 ) -> tuple[bool, int]:
    """Create ``topic`` with ``partitions`` partitions (replication 1) unless it exists, and
    wait until every partition has a leader. Returns (created here, partition count)."""
    from kafka.errors import TopicAlreadyExistsError

    if partitions < 1:
        raise ValueError(f"partitions must be at least 1, not {partitions}")
    admin = _admin(bootstrap, timeout_s)
    try:
        existing = _partition_count(admin, topic)
        if existing is not None:
            return False, existing
        created = True
        try:
            admin.create_topics({topic: {"num_partitions": partitions,
                                         "replication_factor": 1}})
        except TopicAlreadyExistsError:  # created by someone else meanwhile
            created = False
        admin.wait_for_topics([topic], timeout_ms=int(timeout_s * 1000))
        return created, _partition_count(admin, topic) or partitions
    finally:
        admin.close()


def _progress(total: int | None, enabled: bool) -> Any:
    from tqdm import tqdm

    return tqdm(total=total, unit="fix", unit_scale=True, disable=not enabled, leave=False,
                desc="to kafka", mininterval=0.5)


def push_to_kafka(
    inputs: Sequence[str | Path],
    bootstrap: str,
    topic: str,
    speed: float | None = None,
    assume_delay_s: float | None = None,
    sort: bool = False,
    progress: bool = False,
    producer_factory: Callable[..., Any] | None = None,
    *,
    clock: Callable[[], float] = time.monotonic,
    sleep: Callable[[float], None] = time.sleep,
    producer_config: dict[str, Any] | None = None,
    kafka_client: str = "kafka-python",
) -> PushSummary:
    """Send every row of ``inputs`` (files, or tape directories) with an arrival time to
    ``topic``, in arrival order across all inputs.

    ``speed``: None sends as fast as the broker takes them; ``s`` > 0 paces the sends so
    that the wall-clock time since the first send is (arrival - first arrival) / s
    (1 = real time, 60 = an hour per minute). ``clock`` and ``sleep`` are injectable for
    tests. ``producer_factory(**config)`` returns a KafkaProducer-like object (``send``,
    ``flush``, ``close``); by default a kafka-python KafkaProducer, or with
    ``kafka_client="confluent"`` a librdkafka producer (``ConfluentPusher``, same key,
    timestamp and raw bytes; ``producer_config`` then takes librdkafka setting names).
    """
    if kafka_client not in KAFKA_CLIENTS:
        raise ValueError(f"kafka client {kafka_client!r}: expected one of "
                         f"{', '.join(KAFKA_CLIENTS)}")
    speed = parse_speed(speed)
    inputs = expand_inputs(inputs)  # a directory (a tape) stands for its Parquet files
    for p in inputs:
        detect_format(p)
        if not Path(p).exists():
            raise InputError(f"{p}: no such file")
    sources = [str(p) for p in inputs]
    summary = PushSummary(topic=topic, bootstrap=bootstrap, speed=speed)
    if producer_factory is None:  # a real broker: the topic must exist (no auto-creation)
        summary.partitions = topic_partitions(bootstrap, topic)
        if summary.partitions is None:
            raise PushError(f"topic {topic!r} does not exist on {bootstrap}; create it first "
                            "(or pass --create-topic PARTITIONS)")
    lock = threading.Lock()

    def failed(exc: BaseException) -> None:
        with lock:
            summary.failed[_error_name(exc)] += 1

    if kafka_client == "confluent" and producer_factory is None:
        producer: Any = ConfluentPusher(on_failure=failed, **{
            **CONFLUENT_PRODUCER_CONFIG, **(producer_config or {}),
            "bootstrap.servers": bootstrap})
    else:
        config = {**PRODUCER_CONFIG, **(producer_config or {}), "bootstrap_servers": bootstrap}
        producer = (producer_factory or _default_producer)(**config)

    def skip(item: Item, reason: str, detail: str) -> None:
        summary.skipped[reason] += 1
        if len(summary.skipped_examples) < MAX_EXAMPLES:
            summary.skipped_examples.append(
                {"source": sources[item.source], "row": item.row, "reason": reason,
                 "detail": detail})

    totals = [count_rows(p) for p in inputs]
    bar = _progress(sum(t for t in totals if t) if all(totals) else None, progress)
    t0 = time.perf_counter()
    ok = False
    try:
        if summary.partitions is None:
            summary.partitions = _check_topic(producer, topic, bootstrap)
        wall0 = 0.0
        first: int | None = None
        for item in _ordered_items(inputs, assume_delay_s, sort):
            summary.rows_read += 1
            bar.update(1)
            arrival = item.arrival_ms
            if arrival is None:
                why = item.value.detail if isinstance(item.value, Rejection) else ""
                skip(item, NO_ARRIVAL, why or "no usable arrival time")
                continue
            if first is None:
                first, wall0 = arrival, clock()
            elif speed is not None:
                wait = wall0 + (arrival - first) / 1000 / speed - clock()
                if wait > 0:
                    sleep(wait)
            key, value = record_of(item)
            try:
                future = producer.send(topic, key=key, value=value, timestamp_ms=arrival)
            except Exception as exc:  # e.g. a record larger than the broker takes
                if not _is_kafka_error(exc):
                    raise
                skip(item, SEND_ERROR_PREFIX + _error_name(exc), str(exc))
                continue
            if hasattr(future, "add_errback"):
                future.add_errback(failed)
            summary.sent += 1
            if summary.sent % FLUSH_EVERY == 0:
                producer.flush()
            if isinstance(item.value, Rejection):
                summary.sent_invalid[item.value.reason] += 1
            if summary.first_arrival_ms is None:
                summary.first_arrival_ms = arrival
            summary.last_arrival_ms = arrival
        producer.flush()
        if getattr(producer, "undelivered", 0):
            summary.failed["not_acknowledged"] += producer.undelivered
        ok = True
    finally:
        bar.close()
        try:
            producer.close(timeout=10) if ok else producer.close(timeout=0)
        except TypeError:  # a producer-like object whose close takes no timeout
            producer.close()
    summary.seconds = time.perf_counter() - t0
    return summary


def _is_kafka_error(exc: Exception) -> bool:
    try:
        from kafka.errors import KafkaError
    except ImportError:  # pragma: no cover - kafka-python is a dependency
        return False
    if isinstance(exc, KafkaError):
        return True
    try:
        from confluent_kafka import KafkaException
    except ImportError:
        return False
    return isinstance(exc, KafkaException)


def _error_name(exc: BaseException) -> str:
    """A confluent KafkaException's code name (e.g. MSG_SIZE_TOO_LARGE), else the class name."""
    inner = exc.args[0] if exc.args else None
    try:
        return str(inner.name())  # type: ignore[union-attr]
    except Exception:  # noqa: BLE001 - not a confluent KafkaError
        return type(exc).__name__


class ConfluentPusher:
    """A librdkafka producer with the small interface ``push_to_kafka`` uses (``send``,
    ``flush``, ``close``, ``partitions_for``). Delivery reports come only for failures
    (``on_failure(exc)``); records a flush could not deliver in time count as failed too."""

    def __init__(self, on_failure: Callable[[BaseException], None] | None = None,
                 **config: Any) -> None:
        from ingest.confluent_source import ConfluentWatch, load_confluent
        from ingest.sources import SourceError

        try:
            ck = load_confluent()
        except SourceError as exc:
            raise PushError(f"--kafka-client confluent: {exc}") from None
        self._ck = ck
        self.bootstrap = config.get("bootstrap.servers", "")
        self.on_failure = on_failure
        self.stats: dict[str, Any] | None = None  # the latest librdkafka statistics
        watch = ConfluentWatch(self.bootstrap, 10.0)
        conf = {**config, "delivery.report.only.error": True, "on_delivery": self._delivered,
                "error_cb": watch.on_error, "logger": watch.config()["logger"]}
        if conf.get("statistics.interval.ms"):
            conf["stats_cb"] = self._keep_stats
        try:
            self._p = ck.Producer(conf)
        except ck.KafkaException as exc:
            raise PushError(f"invalid producer settings: {_error_name(exc)}: {exc}") from None
        self._since_poll = 0
        self.undelivered = 0

    def _delivered(self, err: Any, msg: Any) -> None:
        if err is not None and self.on_failure is not None:
            self.on_failure(self._ck.KafkaException(err))

    def _keep_stats(self, text: str) -> None:
        self.stats = orjson.loads(text)

    def send(self, topic: str, key: bytes | None = None, value: bytes | None = None,
             timestamp_ms: int | None = None) -> None:
        while True:
            try:
                self._p.produce(topic, value=value, key=key, timestamp=timestamp_ms or 0)
                break
            except BufferError:  # the local queue is full: serve deliveries, try again
                self._p.poll(0.05)
        self._since_poll += 1
        if self._since_poll >= 1000:
            self._since_poll = 0
            self._p.poll(0)

    def flush(self, timeout: float | None = None) -> None:
        left = self._p.flush(60.0 if timeout is None else timeout)
        if left:
            self.undelivered = left

    def close(self, timeout: float | None = None) -> None:
        try:
            self.flush(timeout if timeout is not None else 10.0)
        finally:
            # its callbacks refer back to this object: drop the cycle so that librdkafka's
            # handle (threads, connections) is destroyed now, not at some later collection
            self._p = None

    def partitions_for(self, topic: str) -> set[int] | None:
        md = self._p.list_topics(timeout=15.0)  # every topic: naming one may create it
        info = md.topics.get(topic)
        if info is None or info.error is not None:
            return None
        return set(info.partitions)


def _check_topic(producer: Any, topic: str, bootstrap: str) -> int | None:
    """The topic's partition count, or a readable error when the broker does not have it."""
    partitions_for = getattr(producer, "partitions_for", None)
    if partitions_for is None:
        return None
    try:
        parts = partitions_for(topic)
    except Exception as exc:
        if not _is_kafka_error(exc):
            raise
        parts = None
    if not parts:
        raise PushError(f"topic {topic!r} does not exist on {bootstrap}; create it first "
                        "(or pass --create-topic PARTITIONS)")
    return len(parts)
