"""The optional librdkafka client (confluent-kafka) behind the same ``Source`` interface as the
kafka-python ``KafkaSource``: ``cellpulse ingest --kafka-client confluent``.

It behaves like ``KafkaSource``: a consumer group (``subscribe`` with assign/revoke/lost
callbacks) or static partitions; every new assignment stays paused until the loop seeks it to
the offsets stored with the state (nothing is read from a position the store did not choose);
end offsets are the high watermarks of the latest fetch responses (the Tansu test broker
answers ListOffsets(latest) wrongly, so no query is made); auto-commit is off and commits are
only written for lag tools; a lost broker gives one readable line per failed attempt and one
when it answers again, while librdkafka reconnects with capped exponential backoff.

librdkafka prefetches into a local queue. Its default ``fetch.queue.backoff.ms`` (1 s) makes a
fetcher that found the queue full wait a whole second, which stalls consumption against the
test broker; ``fetch.queue.backoff.ms=1`` and a large ``queued.min.messages`` avoid that
(measured: see bench/ingest_throughput.py). librdkafka's callbacks (rebalance, errors,
statistics, its log) all run inside ``consume()`` on the calling thread, so the source needs no
lock.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable, Collection, Mapping
from types import ModuleType
from typing import Any

import orjson

from ingest.records import SourceRecord
from ingest.sources import (
    Backoff,
    KafkaSettings,
    SourceError,
    SourceUnavailable,
    TopicConsumer,
    partition_name,
)

log = logging.getLogger("cellpulse.ingest")
# librdkafka's own log lines go here (quiet unless --log-level debug, like kafka-python's)
RDKAFKA_LOG = logging.getLogger("kafka.rdkafka")

KAFKA_CLIENTS = ("kafka-python", "confluent")
DEFAULT_KAFKA_CLIENT = "kafka-python"
INSTALL_HINT = ('the confluent Kafka client needs the confluent-kafka package: '
                'pip install "cellpulse[fast]" (in a checkout: pip install -e ".[fast]")')

# librdkafka settings that keep its fetcher from stalling against the test broker (see above)
FETCH_TUNING: dict[str, Any] = {
    "fetch.queue.backoff.ms": 1,
    "queued.min.messages": 1_000_000,
}
STATS_INTERVAL_MS = 1000  # broker states, to say when a lost broker answers again


def load_confluent() -> ModuleType:
    """The ``confluent_kafka`` module, or a readable ``SourceError`` telling how to install it."""
    try:
        import confluent_kafka
    except ImportError as exc:
        raise SourceError(f"{INSTALL_HINT} ({exc})") from None
    return confluent_kafka


def confluent_available() -> bool:
    try:
        load_confluent()
    except SourceError:
        return False
    return True


def check_client(name: str) -> str:
    """``name`` if it is a known client (and, for confluent, installed); readable error else."""
    if name not in KAFKA_CLIENTS:
        raise SourceError(f"--kafka-client {name!r}: expected one of {', '.join(KAFKA_CLIENTS)}")
    if name == "confluent":
        load_confluent()
    return name


def consumer_config(bootstrap: str, group: str | None, client_id: str, start: str,
                    settings: KafkaSettings) -> dict[str, Any]:
    """librdkafka consumer settings equivalent to ``KafkaSettings.consumer_kwargs`` (same
    session, heartbeat, fetch wait, request timeout and reconnect backoff)."""
    s = settings
    conf: dict[str, Any] = {
        "bootstrap.servers": bootstrap,
        "client.id": client_id,
        "enable.auto.commit": False,
        "enable.auto.offset.store": False,
        "auto.offset.reset": start,
        "allow.auto.create.topics": False,
        "enable.partition.eof": False,
        "session.timeout.ms": s.session_timeout_ms,
        "heartbeat.interval.ms": s.heartbeat_interval_ms,
        "fetch.wait.max.ms": s.fetch_max_wait_ms,
        "socket.timeout.ms": max(s.request_timeout_ms, s.fetch_max_wait_ms + 1000),
        "reconnect.backoff.ms": s.reconnect_backoff_ms,
        "reconnect.backoff.max.ms": s.reconnect_backoff_max_ms,
        "log.connection.close": False,  # a broker closing an idle connection is no outage
        "statistics.interval.ms": STATS_INTERVAL_MS,
        **FETCH_TUNING,
    }
    if group is not None:
        conf["group.id"] = group
    return conf


class ConfluentWatch:
    """One readable line per failed connection attempt (librdkafka's error callback), and one
    when a broker is up again (its statistics callback), like ``sources.BrokerWatch``."""

    DOWN_CODES = ("_TRANSPORT", "_ALL_BROKERS_DOWN", "_RESOLVE")

    def __init__(self, bootstrap: str, cap_s: float, what: str = "broker") -> None:
        self.bootstrap = bootstrap
        self.cap_s = cap_s
        self.what = what
        self.down_since: float | None = None
        self.attempts = 0
        self.outages = 0

    def on_error(self, err: Any) -> None:
        name = _code_name(err)
        text = _err_text(err)
        if name in self.DOWN_CODES:
            if self.down_since is None:
                self.down_since = time.monotonic()
                self.attempts = 0
                self.outages += 1
            self.attempts += 1
            log.warning("%s %s unreachable (%s); reconnecting with backoff doubling up to "
                        "%.0f s (attempt %d)", self.what, self.bootstrap, text, self.cap_s,
                        self.attempts)
        else:
            log.error("%s %s: %s", self.what, self.bootstrap, text)

    def on_stats(self, text: str) -> None:
        if self.down_since is None:
            return
        try:
            brokers = orjson.loads(text).get("brokers", {})
        except (orjson.JSONDecodeError, AttributeError):
            return
        if any(b.get("state") == "UP" and b.get("nodeid", -1) >= 0 for b in brokers.values()):
            log.info("%s %s is back after %.1f s", self.what, self.bootstrap,
                     time.monotonic() - self.down_since)
            self.down_since = None

    def config(self) -> dict[str, Any]:
        return {"error_cb": self.on_error, "stats_cb": self.on_stats, "logger": RDKAFKA_LOG}


def _code_name(err: Any) -> str:
    try:
        return str(err.name())
    except Exception:  # noqa: BLE001 - not a KafkaError
        return type(err).__name__


def _err_text(err: Any) -> str:
    try:
        return str(err.str())
    except Exception:  # noqa: BLE001 - not a KafkaError
        return str(err) or type(err).__name__


def _exc_text(exc: BaseException) -> str:
    """The readable text of a confluent KafkaException (its KafkaError), or of any exception."""
    args = getattr(exc, "args", ())
    if args and hasattr(args[0], "str"):
        return _err_text(args[0])
    return str(exc) or type(exc).__name__


class ConfluentSource(TopicConsumer):
    """A confluent-kafka (librdkafka) consumer over one topic; see the module doc and
    ``KafkaSource``, whose behaviour it keeps. ``consumer_factory(config)`` builds the consumer
    (``confluent_kafka.Consumer`` by default; tests pass fakes)."""

    keyed = True

    def __init__(self, bootstrap: str, topic: str, group: str | None = "cellpulse", *,
                 partitions: Collection[int] | None = None, start: str = "earliest",
                 settings: KafkaSettings | None = None, client_id: str | None = None,
                 should_stop: Callable[[], bool] = lambda: False,
                 backoff: Backoff | None = None,
                 consumer_factory: Callable[[dict[str, Any]], Any] | None = None) -> None:
        super().__init__(bootstrap, topic, group, partitions, start, settings, client_id)
        ck = load_confluent() if consumer_factory is None else None
        self._ck = ck
        self.watch = ConfluentWatch(bootstrap, self.settings.reconnect_backoff_max_ms / 1000)
        self._pending: set[int] = set()  # assigned partitions waiting for a seek (paused)
        self._next: dict[int, int] = {}  # partition -> next offset to hand out
        self._exact: set[int] = set()  # seeked to a stored offset, no record read since
        self._assigned: set[int] = set()
        self._assigned_names: frozenset[str] = frozenset()
        self._names: dict[int, str] = {}
        self._tps: dict[int, Any] = {}
        self._warned: dict[str, float] = {}
        config = consumer_config(bootstrap, group, self.client_id, start, self.settings)
        config.update(self.watch.config())
        config["on_commit"] = _commit_done
        factory = consumer_factory or ck.Consumer  # type: ignore[union-attr]
        backoff = backoff or Backoff()
        try:
            self._consumer = factory(config)
        except Exception as exc:  # noqa: BLE001 - KafkaException/ValueError on bad settings
            raise SourceError(f"invalid Kafka consumer settings: {_exc_text(exc)}") from None
        try:
            known = self._wait_for_broker(should_stop, backoff)
            if partitions is not None:
                self._assign_static(list(partitions), known, should_stop, backoff)
            else:
                self._consumer.subscribe([topic], on_assign=self._on_assign,
                                         on_revoke=self._on_revoke, on_lost=self._on_revoke)
        except BaseException:
            self.close()
            raise
        log.info("connected to broker %s with librdkafka (topic %s, %s)", bootstrap, topic,
                 "partitions assigned statically" if self.static
                 else f"consumer group {group!r}")

    # --- helpers of the confluent_kafka module (a fake consumer brings no module) ----------
    def _tp(self, partition: int, offset: int | None = None) -> Any:
        from confluent_kafka import TopicPartition

        if offset is None:
            return TopicPartition(self.topic, partition)
        return TopicPartition(self.topic, partition, offset)

    def _name(self, partition: int) -> str:
        name = self._names.get(partition)
        if name is None:
            name = self._names[partition] = partition_name(self.topic, partition)
        return name

    # --- connection ------------------------------------------------------------------------
    def _topic_partitions(self, timeout_s: float) -> list[int] | None:
        """The topic's partitions from the broker's metadata (all topics are asked for, so a
        broker that creates the topics that metadata requests name creates none), None when
        the broker does not have it. Raises the client's exception when no broker answers."""
        md = self._consumer.list_topics(timeout=timeout_s)
        info = md.topics.get(self.topic)
        if info is None or getattr(info, "error", None) is not None:
            return None
        return sorted(info.partitions)

    def _wait_for_broker(self, should_stop: Callable[[], bool], backoff: Backoff
                         ) -> list[int] | None:
        """Wait until the broker answers (librdkafka connects in the background and never
        fails at creation), retrying with backoff like KafkaSource. Returns the topic's
        partitions (None when the topic is missing)."""
        timeout_s = self.settings.bootstrap_timeout_ms / 1000
        while True:
            try:
                known = self._topic_partitions(timeout_s)
            except Exception as exc:  # noqa: BLE001 - KafkaException: no broker answered
                if should_stop():
                    raise SourceUnavailable(f"broker {self.bootstrap} unreachable") from None
                wait = backoff.next()
                log.warning("broker %s unreachable: no answer within %.0f s (%s); trying "
                            "again in %.1f s", self.bootstrap, timeout_s, _exc_text(exc), wait)
                backoff.sleep(wait, should_stop)
                continue
            backoff.reset()
            return known

    def _assign_static(self, partitions: list[int], known: list[int] | None,
                       should_stop: Callable[[], bool], backoff: Backoff) -> None:
        timeout_s = self.settings.bootstrap_timeout_ms / 1000
        while not known:
            if should_stop():
                raise SourceUnavailable(f"topic {self.topic!r} not found")
            wait = backoff.next()
            log.warning("topic %r not found on %s; retrying in %.1f s", self.topic,
                        self.bootstrap, wait)
            backoff.sleep(wait, should_stop)
            try:
                known = self._topic_partitions(timeout_s)
            except Exception:  # noqa: BLE001 - broker gone again: keep waiting
                known = None
        backoff.reset()
        missing = sorted(set(partitions) - set(known))
        if missing:
            raise SourceError(f"topic {self.topic!r} has partitions {sorted(known)}; "
                              f"{missing} do not exist")
        tps = [self._tp(p) for p in partitions]
        self._consumer.assign(tps)
        self._mark_assigned(tps)

    # --- rebalance callbacks (run inside consume(), on this thread) -------------------------
    def _on_assign(self, consumer: Any, tps: list[Any]) -> None:
        consumer.assign(tps)
        self._mark_assigned(tps)

    def _mark_assigned(self, tps: list[Any]) -> None:
        if tps:
            self._consumer.pause(tps)
        for tp in tps:
            p = tp.partition
            self._pending.add(p)
            self._assigned.add(p)
            self._next.pop(p, None)
            self._exact.discard(p)
            self._tps[p] = self._tp(p)
        self._assigned_names = frozenset(self._name(p) for p in self._assigned)
        if tps:
            log.info("assigned %s", ", ".join(sorted(self._name(tp.partition) for tp in tps)))

    def _on_revoke(self, consumer: Any, tps: list[Any]) -> None:
        for tp in tps:
            p = tp.partition
            self._pending.discard(p)
            self._assigned.discard(p)
            self._next.pop(p, None)
            self._exact.discard(p)
        self._assigned_names = frozenset(self._name(p) for p in self._assigned)
        try:
            consumer.unassign()
        except Exception as exc:  # noqa: BLE001 - already unassigned (lost)
            log.debug("unassign after revocation: %s", _exc_text(exc))
        if tps:
            log.info("revoked %s", ", ".join(sorted(self._name(tp.partition) for tp in tps)))

    # --- Source ------------------------------------------------------------------------------
    def poll(self, timeout_s: float, max_records: int) -> list[SourceRecord]:
        """As kafka-python's poll: what is ready now, else wait up to ``timeout_s`` for the
        first record and take what is ready with it (librdkafka's ``consume(n, timeout)``
        alone would wait for n records or the whole timeout)."""
        n = max(1, max_records)
        consume = self._consumer.consume
        try:
            msgs = consume(n, 0)
            if not msgs and timeout_s > 0:
                msgs = consume(1, timeout_s)
                if msgs and n > 1:
                    msgs += consume(n - 1, 0)
        except Exception as exc:  # noqa: BLE001 - KafkaException, or RuntimeError when closed
            raise SourceUnavailable(f"broker {self.bootstrap}: {_exc_text(exc)}") from exc
        out: list[SourceRecord] = []
        append = out.append
        nexts = self._next
        pending = self._pending
        names = self._names
        for m in msgs:
            if m.error() is not None:
                self._message_error(m)
                continue
            p = m.partition()
            nxt = nexts.get(p)
            if nxt is None or p in pending:
                continue  # not positioned from the store yet: fetched before the seek
            off = m.offset()
            if off != nxt:
                if off < nxt:
                    self._warn(names[p], f"the broker sent offset {off} but the state has "
                               f"applied up to {nxt - 1}; skipping what is applied (was the "
                               "topic deleted and created again? then the offsets in Redis no "
                               "longer match it)")
                    continue
                if nxt > 0 and p in self._exact:
                    self._warn(names[p], f"offsets {nxt}..{off - 1} are not on the broker "
                               "(deleted by retention before they were applied, or "
                               f"transaction markers); continuing at {off}")
            if self._exact:
                self._exact.discard(p)
            kind, ts = m.timestamp()
            value = m.value()
            append(SourceRecord(names[p], off, ts if kind and ts >= 0 else None, m.key(),
                                value if value is not None else b""))
            nexts[p] = off + 1
        return out

    def _message_error(self, m: Any) -> None:
        err = m.error()
        name = _code_name(err)
        if name in ConfluentWatch.DOWN_CODES:
            self.watch.on_error(err)
        elif name == "_PARTITION_EOF":
            return
        else:
            where = self.topic if m.partition() is None or m.partition() < 0 else \
                self._name(m.partition())
            self._warn(f"error:{name}", f"{where}: {_err_text(err)}", name=where)

    def _warn(self, key: str, text: str, name: str | None = None) -> None:
        now = time.monotonic()
        if now - self._warned.get(key, float("-inf")) >= 60.0:  # at most once a minute
            self._warned[key] = now
            if name is None:
                log.warning("%s: %s", key, text)
            else:
                log.warning("%s", text)

    def seek(self, offsets: Mapping[str, int]) -> None:
        from confluent_kafka import OFFSET_BEGINNING, OFFSET_END

        done: list[tuple[int, int | None]] = []
        for p in sorted(self._assigned):
            off = offsets.get(self._name(p))
            where = int(off) if off is not None else (
                OFFSET_BEGINNING if self.start == "earliest" else OFFSET_END)
            try:
                self._consumer.seek(self._tp(p, where))
                if p in self._pending:
                    self._consumer.resume([self._tps[p]])
            except Exception as exc:  # noqa: BLE001 - revoked meanwhile, or not ready yet
                log.debug("%s: seek to %s not done (%s); trying again", self._name(p), where,
                          _exc_text(exc))
                continue
            # with the start policy the broker resolves the offset: any offset >= 0 is next
            self._next[p] = int(off) if off is not None else 0
            if off is not None:
                self._exact.add(p)  # the first records must start there
            else:
                self._exact.discard(p)
            self._pending.discard(p)
            done.append((p, off))
        for p, off in done:
            log.info("%s: reading from %s", self._name(p),
                     f"offset {off} (stored with the state)" if off is not None
                     else f"the {self.start} offset (nothing stored yet)")

    def assignment(self) -> frozenset[str]:
        return self._assigned_names

    def unpositioned(self) -> frozenset[str]:
        if not self._pending:
            return frozenset()
        return frozenset(self._name(p) for p in self._pending)

    def end_offsets(self) -> dict[str, int]:
        """High watermarks of the latest fetch responses (cached by librdkafka; no request).
        The Tansu test broker answers ListOffsets(latest) wrongly, so none is made."""
        out: dict[str, int] = {}
        for p in self._assigned:
            tp = self._tps.get(p)
            if tp is None:
                continue
            try:
                _low, high = self._consumer.get_watermark_offsets(tp, cached=True)
            except Exception:  # noqa: BLE001 - revoked meanwhile
                continue
            if high is None or high < 0:
                continue  # not known yet (no fetch response)
            name = self._name(p)
            out[name] = int(high)
            nxt = self._next.get(p)
            if nxt is not None and high < nxt:
                self._warn(name, f"the broker's end offset {high} is below the offset {nxt} "
                           "the state has applied up to (was the topic deleted and created "
                           "again? then the offsets in Redis no longer match it)")
        return out

    def commit(self, offsets: Mapping[str, int]) -> None:
        if self.group is None:
            return
        todo = []
        for name, off in offsets.items():
            topic, _, num = name.rpartition(":")
            if topic == self.topic and num.isdigit() and int(num) in self._assigned:
                todo.append(self._tp(int(num), int(off)))
        if not todo:
            return
        try:
            self._consumer.commit(offsets=todo, asynchronous=True)
        except Exception as exc:  # noqa: BLE001 - lag monitoring only; never stops ingest
            log.debug("commit of offsets for lag monitoring failed: %s", _exc_text(exc))

    def finished(self) -> bool:
        return False

    def close(self) -> None:
        consumer = getattr(self, "_consumer", None)
        if consumer is None:
            return
        try:
            consumer.close()  # leaves the group at once; auto-commit is off
        except Exception as exc:  # noqa: BLE001 - closing anyway
            log.debug("closing the Kafka consumer: %s", _exc_text(exc))


def _commit_done(err: Any, partitions: Any) -> None:
    if err is not None:
        log.debug("commit of offsets for lag monitoring failed: %s", _err_text(err))
