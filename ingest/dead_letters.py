"""Dead letters of the live path: every rejected message, its raw bytes kept exactly.

The consumer loop sends (and flushes) a batch's dead letters BEFORE it applies the batch's
state, so a crash can repeat a dead letter but never lose one. Readers dedupe on the source
coordinates every letter carries: ``source_partition`` + ``source_offset`` identify the
message exactly once (a repeat has the same reason and raw bytes).

- Kafka (``KafkaDeadLetters``): topic ``<topic>-dead-letters`` by default; value = the raw
  bytes as received, key = the original key, headers ``reason``, ``detail``,
  ``source_partition`` (e.g. ``fixes:3``), ``source_offset``, ``source_timestamp`` (epoch ms
  of the source record, empty when it had none), all UTF-8 text.
- Kafka through librdkafka (``ConfluentDeadLetters``, ``--kafka-client confluent``): the same
  records and headers.
- File (``FileDeadLetters``): JSON Lines with the same fields plus ``key``; ``raw`` is the
  text of the raw bytes when they are valid UTF-8, else null with ``raw_base64`` holding them.
"""

from __future__ import annotations

import base64
import logging
import os
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import orjson

from featurestore.schema import Rejection
from ingest.records import SourceRecord

log = logging.getLogger("cellpulse.ingest")

HEADERS = ("reason", "detail", "source_partition", "source_offset", "source_timestamp")


@dataclass(frozen=True, slots=True)
class DeadLetter:
    """A rejected record and why."""

    record: SourceRecord
    reason: str
    detail: str

    @classmethod
    def of(cls, record: SourceRecord, rejection: Rejection) -> DeadLetter:
        return cls(record, rejection.reason, rejection.detail)

    def headers(self) -> list[tuple[str, bytes]]:
        r = self.record
        ts = "" if r.timestamp_ms is None else str(r.timestamp_ms)
        return [("reason", self.reason.encode()), ("detail", self.detail.encode()),
                ("source_partition", r.partition.encode()),
                ("source_offset", str(r.offset).encode()), ("source_timestamp", ts.encode())]


class DeadLetterError(RuntimeError):
    """Dead letters could not be stored durably (the batch must not be applied)."""


class DeadLetterSink(Protocol):
    def send(self, letters: Sequence[DeadLetter]) -> None:
        """Store every letter durably before returning, or raise DeadLetterError."""
        ...

    def close(self) -> None:
        ...


def _topic_missing(topic: str, bootstrap: str, why: str) -> DeadLetterError:
    """The start-up error of both Kafka clients when the dead-letter topic is not there."""
    return DeadLetterError(f"dead-letter topic {topic!r} not found on {bootstrap} ({why}): "
                           "create it, or name another with --dead-letter-topic")


class KafkaDeadLetters:
    """Dead letters to a Kafka topic (acks from all in-sync replicas, flushed per batch)."""

    def __init__(self, bootstrap: str, topic: str, *, timeout_s: float = 10.0,
                 max_request_size: int = 8 * 1024 * 1024, producer: Any = None) -> None:
        self.topic = topic
        self.timeout_s = timeout_s
        self.sent = 0
        if producer is None:
            from kafka import KafkaProducer

            producer = KafkaProducer(
                bootstrap_servers=bootstrap.split(","), acks="all", linger_ms=5,
                max_request_size=max_request_size, request_timeout_ms=int(timeout_s * 1000),
                max_block_ms=int(timeout_s * 1000),
                client_id=f"cellpulse-dead-letters-{os.getpid()}",
            )
        self._producer = producer
        self._check_topic(bootstrap)

    def _check_topic(self, bootstrap: str) -> None:
        """Fail at start, readably, when the topic does not exist (and the broker does not
        create topics on first use)."""
        from kafka.errors import KafkaError

        try:
            found = self._producer.partitions_for(self.topic)
        except KafkaError as exc:
            found = None
            why = _text(exc)
        else:
            why = "no partitions"
        if not found:
            self._producer.close(timeout=1)
            raise _topic_missing(self.topic, bootstrap, why)

    def send(self, letters: Sequence[DeadLetter]) -> None:
        if not letters:
            return
        from kafka.errors import KafkaError, MessageSizeTooLargeError

        futures = []
        failed: list[tuple[DeadLetter, BaseException]] = []
        try:
            for d in letters:
                try:
                    futures.append((d, self._producer.send(
                        self.topic, key=d.record.key, value=d.record.value,
                        headers=d.headers())))
                except MessageSizeTooLargeError as exc:  # over the client's request limit
                    failed.append((d, exc))
            self._producer.flush(timeout=self.timeout_s)
        except KafkaError as exc:
            raise DeadLetterError(f"dead-letter topic {self.topic!r}: {_text(exc)}") from exc
        for d, fut in futures:
            if not fut.is_done:
                raise DeadLetterError(f"dead-letter topic {self.topic!r}: not acknowledged "
                                      f"within {self.timeout_s} s")
            if fut.failed():
                failed.append((d, fut.exception))
        for d, exc in failed:
            if isinstance(exc, MessageSizeTooLargeError):
                self._send_truncated(d, exc)
            else:
                raise DeadLetterError(f"dead-letter topic {self.topic!r}: {_text(exc)}")
        self.sent += len(letters)

    def _send_truncated(self, d: DeadLetter, exc: BaseException) -> None:
        """A raw message too large for the dead-letter topic: keep its first 64 KiB and say
        so (header ``truncated_from`` = the full size), rather than stop the consumer."""
        size = len(d.record.value)
        log.error("dead letter %s@%d (%d bytes) too large for %r (%s): keeping its first "
                  "64 KiB", d.record.partition, d.record.offset, size, self.topic, exc)
        fut = self._producer.send(self.topic, key=d.record.key, value=d.record.value[:65536],
                                  headers=[*d.headers(), ("truncated_from", str(size).encode())])
        self._producer.flush(timeout=self.timeout_s)
        if not fut.is_done:
            raise DeadLetterError(f"dead-letter topic {self.topic!r}: not acknowledged within "
                                  f"{self.timeout_s} s")
        if fut.failed():
            raise DeadLetterError(f"dead-letter topic {self.topic!r}: {_text(fut.exception)}")

    def close(self) -> None:
        try:
            self._producer.flush(timeout=self.timeout_s)
            self._producer.close(timeout=5)
        except Exception as exc:  # noqa: BLE001 - closing anyway
            log.debug("closing the dead-letter producer: %s", exc)


class ConfluentDeadLetters:
    """Dead letters to a Kafka topic through librdkafka (confluent-kafka): the same records and
    headers as ``KafkaDeadLetters``, acks from all in-sync replicas, flushed per batch (a batch
    whose letters are not all acknowledged raises and is not applied)."""

    def __init__(self, bootstrap: str, topic: str, *, timeout_s: float = 10.0,
                 max_request_size: int = 8 * 1024 * 1024, producer: Any = None) -> None:
        self.topic = topic
        self.timeout_s = timeout_s
        self.sent = 0
        if producer is None:
            from ingest.confluent_source import ConfluentWatch, load_confluent

            ck = load_confluent()
            watch = ConfluentWatch(bootstrap, 10.0, what="dead-letter broker")
            producer = ck.Producer({
                "bootstrap.servers": bootstrap, "acks": "all", "linger.ms": 5,
                "message.max.bytes": max_request_size,
                "message.timeout.ms": int(timeout_s * 1000),
                "client.id": f"cellpulse-dead-letters-{os.getpid()}",
                "log.connection.close": False, **watch.config(),
            })
        self._producer = producer
        self._check_topic(bootstrap)

    def _check_topic(self, bootstrap: str) -> None:
        try:
            md = self._producer.list_topics(timeout=self.timeout_s)
            info = md.topics.get(self.topic)
            found = info is not None and getattr(info, "error", None) is None \
                and bool(info.partitions)
            why = "no such topic"
        except Exception as exc:  # noqa: BLE001 - KafkaException: no broker answered
            found, why = False, _confluent_text(exc)
        if not found:
            self._producer.flush(0)
            self._producer = None  # destroys librdkafka's handle (threads, connections) now
            raise _topic_missing(self.topic, bootstrap, why)

    def _produce(self, key: bytes | None, value: bytes, headers: list[tuple[str, bytes]],
                 on_delivery: Any) -> None:
        while True:
            try:
                self._producer.produce(self.topic, value=value, key=key, headers=headers,
                                       on_delivery=on_delivery)
                return
            except BufferError:  # the local queue is full: let deliveries drain it
                self._producer.poll(0.05)

    def send(self, letters: Sequence[DeadLetter]) -> None:
        if not letters:
            return
        errors: dict[int, Any] = {}
        acked: set[int] = set()
        too_large: list[tuple[DeadLetter, str]] = []

        def delivered(i: int) -> Any:
            def done(err: Any, msg: Any) -> None:
                if err is None:
                    acked.add(i)
                else:
                    errors[i] = err
            return done

        for i, d in enumerate(letters):
            try:
                self._produce(d.record.key, d.record.value, d.headers(), delivered(i))
            except Exception as exc:  # noqa: BLE001 - KafkaException from produce()
                if _confluent_code(exc) == "MSG_SIZE_TOO_LARGE":  # over message.max.bytes
                    acked.add(i)
                    too_large.append((d, _confluent_text(exc)))
                    continue
                raise DeadLetterError(f"dead-letter topic {self.topic!r}: "
                                      f"{_confluent_text(exc)}") from exc
        left = self._producer.flush(self.timeout_s)
        if left or len(acked) + len(errors) < len(letters):
            raise DeadLetterError(f"dead-letter topic {self.topic!r}: not acknowledged within "
                                  f"{self.timeout_s} s")
        for i, err in sorted(errors.items()):
            name = _confluent_code(err)
            if name in ("MSG_SIZE_TOO_LARGE", "MESSAGE_TOO_LARGE"):
                too_large.append((letters[i], _confluent_text(err)))
            else:
                raise DeadLetterError(f"dead-letter topic {self.topic!r}: "
                                      f"{_confluent_text(err)}")
        for d, why in too_large:
            self._send_truncated(d, why)
        self.sent += len(letters)

    def _send_truncated(self, d: DeadLetter, why: str) -> None:
        """As ``KafkaDeadLetters._send_truncated``: keep the first 64 KiB, header
        ``truncated_from`` = the full size."""
        size = len(d.record.value)
        log.error("dead letter %s@%d (%d bytes) too large for %r (%s): keeping its first "
                  "64 KiB", d.record.partition, d.record.offset, size, self.topic, why)
        result: list[Any] = []
        self._produce(d.record.key, d.record.value[:65536],
                      [*d.headers(), ("truncated_from", str(size).encode())],
                      lambda err, msg: result.append(err))
        if self._producer.flush(self.timeout_s) or not result:
            raise DeadLetterError(f"dead-letter topic {self.topic!r}: not acknowledged within "
                                  f"{self.timeout_s} s")
        if result[0] is not None:
            raise DeadLetterError(f"dead-letter topic {self.topic!r}: "
                                  f"{_confluent_text(result[0])}")

    def close(self) -> None:
        if self._producer is None:
            return
        try:
            self._producer.flush(self.timeout_s)
        except Exception as exc:  # noqa: BLE001 - closing anyway
            log.debug("closing the dead-letter producer: %s", exc)
        finally:
            self._producer = None  # destroys librdkafka's handle (threads, connections) now


def _confluent_code(err: Any) -> str:
    """The code name of a confluent KafkaError or KafkaException (e.g. MSG_SIZE_TOO_LARGE)."""
    err = err.args[0] if isinstance(err, BaseException) and err.args else err
    try:
        return str(err.name())
    except Exception:  # noqa: BLE001 - not a KafkaError
        return ""


def _confluent_text(err: Any) -> str:
    inner = err.args[0] if isinstance(err, BaseException) and err.args else err
    try:
        return str(inner.str())
    except Exception:  # noqa: BLE001 - not a KafkaError
        return str(err) or type(err).__name__


def _text(exc: BaseException) -> str:
    return str(exc) or type(exc).__name__


def letter_json(d: DeadLetter) -> dict[str, Any]:
    """One dead letter as a JSON object (the file form)."""
    r = d.record
    out: dict[str, Any] = {
        "reason": d.reason, "detail": d.detail, "source_partition": r.partition,
        "source_offset": r.offset, "source_timestamp": r.timestamp_ms,
        "key": None if r.key is None else r.key.decode("utf-8", "replace"),
    }
    try:
        out["raw"] = r.value.decode("utf-8")
    except UnicodeDecodeError:
        out["raw"] = None
        out["raw_base64"] = base64.b64encode(r.value).decode()
    return out


def letter_raw(obj: dict[str, Any]) -> bytes:
    """The exact raw bytes of a dead letter read back from a file."""
    if obj.get("raw") is not None:
        return obj["raw"].encode("utf-8")
    return base64.b64decode(obj["raw_base64"])


class FileDeadLetters:
    """Dead letters appended to a JSON Lines file, flushed and fsynced per batch."""

    def __init__(self, path: str) -> None:
        self.path = path
        self.sent = 0
        self._fh = open(path, "ab")  # noqa: SIM115 - kept open for the run

    def send(self, letters: Sequence[DeadLetter]) -> None:
        if not letters:
            return
        try:
            self._fh.write(b"".join(orjson.dumps(letter_json(d)) + b"\n" for d in letters))
            self._fh.flush()
            os.fsync(self._fh.fileno())
        except OSError as exc:
            raise DeadLetterError(f"dead-letter file {self.path}: {exc}") from exc
        self.sent += len(letters)

    def close(self) -> None:
        self._fh.close()
