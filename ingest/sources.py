"""Where live records come from: a Kafka topic (consumer group or static partitions), or a JSON
Lines file or stdin.

A source hands out ``SourceRecord``s in offset order per partition and is positioned by the
consumer loop from the offsets stored with the state in Redis (the truth; Kafka's committed
offsets are only written for lag monitoring). Newly assigned partitions wait, paused, until the
loop has positioned them, so no record is read from a position the store did not choose.
"""

from __future__ import annotations

import gzip
import logging
import os
import queue
import sys
import threading
import time
from collections import deque
from collections.abc import Callable, Collection, Iterable, Mapping
from dataclasses import dataclass
from typing import IO, Any, Protocol, runtime_checkable

from ingest.records import SourceRecord

log = logging.getLogger("cellpulse.ingest")

START_POLICIES = ("earliest", "latest")


class SourceError(RuntimeError):
    """A source cannot be used as configured (readable message for the user)."""


class SourceUnavailable(RuntimeError):
    """The source's server cannot be reached right now (the loop backs off and retries)."""


@runtime_checkable
class Source(Protocol):
    """What the consumer loop reads from. Partition names: ``<topic>:<n>``, ``file:<path>``."""

    keyed: bool  # records carry the vehicle_id as their key (checked when decoding)

    def poll(self, timeout_s: float, max_records: int) -> list[SourceRecord]:
        """Up to ``max_records`` records (offset order within each partition); waits at most
        ``timeout_s`` when none is ready. Records of partitions that wait for a position are
        never returned."""
        ...

    def seek(self, offsets: Mapping[str, int]) -> None:
        """Position every assigned partition: at ``offsets[partition]`` (the next offset to
        read), or by the start policy when the mapping has no entry for it."""
        ...

    def assignment(self) -> frozenset[str]:
        """The partitions this source reads now."""
        ...

    def unpositioned(self) -> frozenset[str]:
        """Assigned partitions that wait for ``seek`` (new assignments)."""
        ...

    def end_offsets(self) -> dict[str, int]:
        """Partition -> end offset (the offset the next new record will get), where known."""
        ...

    def commit(self, offsets: Mapping[str, int]) -> None:
        """Tell the broker how far the state has applied (for lag monitoring only)."""
        ...

    def finished(self) -> bool:
        """True when no record will ever come again (the end of a file)."""
        ...

    def close(self) -> None:
        ...


# --- Kafka ---------------------------------------------------------------------------------

@dataclass(frozen=True)
class KafkaSettings:
    """Consumer settings exposed on the command line (kafka-python names)."""

    session_timeout_ms: int = 10_000
    heartbeat_interval_ms: int = 3_000
    max_poll_records: int = 500
    fetch_max_wait_ms: int = 500
    request_timeout_ms: int = 30_000
    bootstrap_timeout_ms: int = 3_000
    reconnect_backoff_ms: int = 100
    reconnect_backoff_max_ms: int = 10_000

    def consumer_kwargs(self) -> dict[str, Any]:
        return {
            "session_timeout_ms": self.session_timeout_ms,
            "heartbeat_interval_ms": self.heartbeat_interval_ms,
            "max_poll_records": self.max_poll_records,
            "fetch_max_wait_ms": self.fetch_max_wait_ms,
            "request_timeout_ms": max(self.request_timeout_ms, self.fetch_max_wait_ms + 1000),
            "bootstrap_timeout_ms": self.bootstrap_timeout_ms,
            "reconnect_backoff_ms": self.reconnect_backoff_ms,
            "reconnect_backoff_max_ms": self.reconnect_backoff_max_ms,
        }


def partition_name(topic: str, partition: int) -> str:
    return f"{topic}:{partition}"


def parse_partitions(text: str) -> list[int]:
    """``"0,1,3"`` -> [0, 1, 3]; readable error otherwise."""
    try:
        parts = sorted({int(p) for p in text.replace(" ", "").split(",") if p})
    except ValueError:
        raise ValueError(f"--partitions {text!r}: expected comma-separated partition numbers"
                         ) from None
    if not parts or parts[0] < 0:
        raise ValueError(f"--partitions {text!r}: expected partition numbers >= 0")
    return parts


def _listener(source: KafkaSource) -> Any:
    from kafka import ConsumerRebalanceListener

    class Listener(ConsumerRebalanceListener):
        """Runs on kafka-python's IO thread; only marks partitions (no Redis call there)."""

        def on_partitions_revoked(self, revoked):
            source._revoked(revoked)

        def on_partitions_assigned(self, assigned):
            source._assigned(assigned)

    return Listener()


class TopicConsumer:
    """What both Kafka clients' sources hold: the topic, group, start policy and settings."""

    def __init__(self, bootstrap: str, topic: str, group: str | None,
                 partitions: Collection[int] | None, start: str,
                 settings: KafkaSettings | None, client_id: str | None) -> None:
        if start not in START_POLICIES:
            raise ValueError(f"start must be one of {START_POLICIES}, not {start!r}")
        self.bootstrap = bootstrap
        self.topic = topic
        self.group = group
        self.static = partitions is not None
        self.start = start
        self.settings = settings or KafkaSettings()
        self.client_id = client_id or f"cellpulse-ingest-{os.getpid()}"


class KafkaSource(TopicConsumer):
    """A kafka-python consumer over one topic.

    With ``partitions`` None it joins the consumer group ``group`` (``subscribe`` with a
    rebalance listener); otherwise it reads exactly those partitions (``assign``; ``group`` is
    then only used for the lag-monitoring commits). Auto-commit is off: the state store holds
    the applied offsets, and every new assignment stays paused until the loop seeks it to
    them. Partitions the store has never applied start at the ``start`` policy.
    """

    keyed = True

    def __init__(self, bootstrap: str, topic: str, group: str | None = "cellpulse", *,
                 partitions: Collection[int] | None = None, start: str = "earliest",
                 settings: KafkaSettings | None = None, client_id: str | None = None,
                 should_stop: Callable[[], bool] = lambda: False,
                 backoff: Backoff | None = None) -> None:
        super().__init__(bootstrap, topic, group, partitions, start, settings, client_id)
        self._lock = threading.Lock()
        self._pending: set[Any] = set()  # TopicPartitions waiting for a seek (paused)
        self._next: dict[Any, int] = {}  # TopicPartition -> next offset to hand out
        self._warned: dict[str, float] = {}
        self._exact: set[Any] = set()  # seeked to a stored offset, no record read since
        self.watch = BrokerWatch(bootstrap, self.settings.reconnect_backoff_max_ms / 1000)
        self.watch.attach()
        try:
            self._consumer = self._connect(should_stop, backoff or Backoff())
        except BaseException:
            self.watch.detach()
            raise
        try:
            if partitions is not None:
                self._assign_static(list(partitions), should_stop, backoff or Backoff())
            else:
                self._consumer.subscribe([topic], listener=_listener(self))
        except BaseException:
            self.close()
            raise

    # --- connection ----------------------------------------------------------------------
    def _connect(self, should_stop: Callable[[], bool], backoff: Backoff) -> Any:
        from kafka import KafkaConsumer
        from kafka.errors import KafkaConfigurationError, KafkaError

        while True:
            try:
                consumer = KafkaConsumer(
                    bootstrap_servers=self.bootstrap.split(","), group_id=self.group,
                    client_id=self.client_id, enable_auto_commit=False,
                    auto_offset_reset=self.start, allow_auto_create_topics=False,
                    **self.settings.consumer_kwargs(),
                )
            except KafkaConfigurationError as exc:
                raise SourceError(f"invalid Kafka consumer settings: {exc}") from None
            except KafkaError as exc:
                if should_stop():
                    raise SourceUnavailable(f"broker {self.bootstrap} unreachable") from None
                wait = backoff.next()
                log.warning("no answer from broker %s within %.0f s (%s); trying again in %.1f s",
                            self.bootstrap, self.settings.bootstrap_timeout_ms / 1000,
                            _describe(exc), wait)
                backoff.sleep(wait, should_stop)
                continue
            backoff.reset()
            log.info("connected to broker %s (topic %s, %s)", self.bootstrap, self.topic,
                     "partitions assigned statically" if self.static
                     else f"consumer group {self.group!r}")
            return consumer

    def _assign_static(self, partitions: list[int], should_stop: Callable[[], bool],
                       backoff: Backoff) -> None:
        from kafka import TopicPartition

        while True:
            known = self._consumer.partitions_for_topic(self.topic)
            if known:
                break
            if should_stop():
                raise SourceUnavailable(f"topic {self.topic!r} not found")
            wait = backoff.next()
            log.warning("topic %r not found on %s; retrying in %.1f s", self.topic,
                        self.bootstrap, wait)
            backoff.sleep(wait, should_stop)
        backoff.reset()
        missing = sorted(set(partitions) - set(known))
        if missing:
            raise SourceError(f"topic {self.topic!r} has partitions {sorted(known)}; "
                              f"{missing} do not exist")
        tps = [TopicPartition(self.topic, p) for p in partitions]
        self._consumer.assign(tps)
        self._assigned(tps)

    # --- rebalance listener (called on kafka-python's IO thread) ----------------------------
    def _assigned(self, tps: Iterable[Any]) -> None:
        tps = list(tps)
        with self._lock:
            self._pending.update(tps)
            for tp in tps:
                self._next.pop(tp, None)
                self._exact.discard(tp)
            if tps:
                self._consumer.pause(*tps)
        if tps:
            log.info("assigned %s", ", ".join(sorted(_tp_name(tp) for tp in tps)))

    def _revoked(self, tps: Iterable[Any]) -> None:
        tps = list(tps)
        with self._lock:
            for tp in tps:
                self._pending.discard(tp)
                self._next.pop(tp, None)
                self._exact.discard(tp)
        if tps:
            log.info("revoked %s", ", ".join(sorted(_tp_name(tp) for tp in tps)))

    # --- Source --------------------------------------------------------------------------
    def poll(self, timeout_s: float, max_records: int) -> list[SourceRecord]:
        from kafka.errors import KafkaError

        try:
            got = self._consumer.poll(timeout_ms=max(0, int(timeout_s * 1000)),
                                      max_records=max_records)
        except KafkaError as exc:
            raise SourceUnavailable(f"broker {self.bootstrap}: {_describe(exc)}") from exc
        out: list[SourceRecord] = []
        with self._lock:
            for tp, recs in got.items():
                nxt = self._next.get(tp)
                if nxt is None or tp in self._pending:
                    continue  # not positioned from the store yet: fetched before the seek
                name = partition_name(tp.topic, tp.partition)
                if recs and recs[-1].offset < nxt:
                    self._warn(name, f"the broker sent offset {recs[0].offset} but the state "
                               f"has applied up to {nxt - 1}; skipping what is applied (was the "
                               "topic deleted and created again? then the offsets in Redis no "
                               "longer match it)")
                elif recs and nxt > 0 and recs[0].offset > nxt and tp in self._exact:
                    self._warn(name, f"offsets {nxt}..{recs[0].offset - 1} are not on the broker "
                               "(deleted by retention before they were applied, or transaction "
                               f"markers); continuing at {recs[0].offset}")
                self._exact.discard(tp)
                for r in recs:
                    if r.offset < nxt:
                        continue  # already handed out (a fetch from before a seek)
                    ts = r.timestamp if r.timestamp is not None and r.timestamp >= 0 else None
                    value = r.value if r.value is not None else b""
                    out.append(SourceRecord(name, r.offset, ts, r.key, value))
                    nxt = r.offset + 1
                self._next[tp] = nxt
        return out

    def _warn(self, name: str, text: str) -> None:
        now = time.monotonic()
        if now - self._warned.get(name, float("-inf")) >= 60.0:  # at most once a minute
            self._warned[name] = now
            log.warning("%s: %s", name, text)

    def seek(self, offsets: Mapping[str, int]) -> None:
        # Holds the lock across the consumer calls: a rebalance that lands meanwhile runs its
        # listener after this and marks its partitions as waiting again (lock order: ours,
        # then kafka-python's subscription lock; the listener is never called under the latter).
        done: list[tuple[Any, int | None]] = []
        with self._lock:
            for tp in sorted(self._consumer.assignment() or (), key=lambda t: t.partition):
                off = offsets.get(partition_name(tp.topic, tp.partition))
                try:
                    if off is not None:
                        self._consumer.seek(tp, int(off))
                    elif self.start == "earliest":
                        self._consumer.seek_to_beginning(tp)
                    else:
                        self._consumer.seek_to_end(tp)
                    if tp in self._pending:
                        self._consumer.resume(tp)
                except (ValueError, KeyError):
                    continue  # revoked meanwhile
                # with the start policy the broker resolves the offset: any offset >= 0 is next
                self._next[tp] = int(off) if off is not None else 0
                if off is not None:
                    self._exact.add(tp)  # the first records must start there
                self._pending.discard(tp)
                done.append((tp, off))
        for tp, off in done:
            log.info("%s: reading from %s", _tp_name(tp),
                     f"offset {off} (stored with the state)" if off is not None
                     else f"the {self.start} offset (nothing stored yet)")

    def assignment(self) -> frozenset[str]:
        return frozenset(_tp_name(tp) for tp in (self._consumer.assignment() or ()))

    def unpositioned(self) -> frozenset[str]:
        with self._lock:
            return frozenset(_tp_name(tp) for tp in self._pending)

    def end_offsets(self) -> dict[str, int]:
        """End offsets from the latest fetch responses (free; no request). Note: the Tansu
        test broker answers ListOffsets(latest) with the last batch's base offset + 1, not the
        log end, so the fetch high watermark is the one to trust."""
        out: dict[str, int] = {}
        for tp in list(self._consumer.assignment() or ()):
            try:
                hw = self._consumer.highwater(tp)
            except Exception:  # noqa: BLE001 - revoked between the two calls
                continue
            if hw is None:
                continue
            out[_tp_name(tp)] = int(hw)
            nxt = self._next.get(tp)
            if nxt is not None and hw < nxt:
                self._warn(_tp_name(tp), f"the broker's end offset {hw} is below the offset "
                           f"{nxt} the state has applied up to (was the topic deleted and "
                           "created again? then the offsets in Redis no longer match it)")
        return out

    def commit(self, offsets: Mapping[str, int]) -> None:
        if self.group is None:
            return
        from kafka import TopicPartition
        from kafka.structs import OffsetAndMetadata

        mine = {tp for tp in (self._consumer.assignment() or ())}
        todo = {}
        for name, off in offsets.items():
            topic, _, num = name.rpartition(":")
            tp = TopicPartition(topic, int(num)) if num.isdigit() else None
            if tp in mine:
                todo[tp] = OffsetAndMetadata(int(off), "", -1)
        if not todo:
            return
        try:
            self._consumer.commit_async(todo, callback=_commit_done)
        except Exception as exc:  # noqa: BLE001 - lag monitoring only; never stops ingest
            log.debug("commit of offsets for lag monitoring failed: %s", exc)

    def finished(self) -> bool:
        return False

    def close(self) -> None:
        try:
            self._consumer.close(autocommit=False, timeout_ms=5000)
        except Exception as exc:  # noqa: BLE001 - closing anyway
            log.debug("closing the Kafka consumer: %s", exc)
        finally:
            self.watch.detach()


class BrokerWatch(logging.Handler):
    """One readable line per failed connection attempt to the broker, and one when it answers
    again. kafka-python reconnects by itself (capped exponential backoff, ``reconnect_backoff_ms``
    doubling up to ``reconnect_backoff_max_ms``, with jitter) and reports each attempt only in
    its own loggers; this handler listens to them."""

    LOGGERS = ("kafka.net.manager", "kafka.cluster")

    def __init__(self, bootstrap: str, cap_s: float) -> None:
        super().__init__(logging.INFO)
        self.bootstrap = bootstrap
        self.cap_s = cap_s
        self.address = bootstrap
        self.down_since: float | None = None
        self.attempts = 0
        self.outages = 0

    def attach(self) -> None:
        for name in self.LOGGERS:
            logger = logging.getLogger(name)
            if logger.getEffectiveLevel() > logging.INFO:
                logger.setLevel(logging.INFO)
            logger.addHandler(self)

    def detach(self) -> None:
        for name in self.LOGGERS:
            logging.getLogger(name).removeHandler(self)

    def emit(self, record: logging.LogRecord) -> None:
        try:
            msg = record.getMessage()
        except Exception:  # noqa: BLE001 - a malformed record of the library
            return
        if msg.startswith("Initializing connection for node_id") and " at " in msg:
            self.address = msg.split(" at ", 1)[1].split(" ", 1)[0]
        elif msg.startswith(("Connection failed:", "Bootstrap attempt to")):
            if self.down_since is None:
                self.down_since = time.monotonic()
                self.attempts = 0
                self.outages += 1
            self.attempts += 1
            why = msg.split(": ", 1)[-1] if msg.startswith("Connection failed") else msg
            log.warning("broker %s unreachable (%s); reconnecting with backoff doubling up to "
                        "%.0f s (attempt %d)", self.address, why, self.cap_s, self.attempts)
        elif self.down_since is not None and msg.startswith(("Updated metadata",
                                                              "Bootstrap complete")):
            log.info("broker %s is back after %.1f s", self.address,
                     time.monotonic() - self.down_since)
            self.down_since = None


def _commit_done(offsets: Any, response: Any) -> None:
    if isinstance(response, Exception):
        log.debug("commit of offsets for lag monitoring failed: %s", response)


def _tp_name(tp: Any) -> str:
    return partition_name(tp.topic, tp.partition)


def _describe(exc: BaseException) -> str:
    text = str(exc)
    name = type(exc).__name__
    if not text or text == name:
        return name
    return text if text.startswith(name) else f"{name}: {text}"


# --- files and stdin -------------------------------------------------------------------------

class FileSource:
    """JSON Lines from a file (``.gz`` too) or stdin (``-``), one fix per line.

    Partition ``file:<absolute path>`` (``file:-`` for stdin); offset = the 0-based line
    number (blank lines are skipped but keep their number, as ``cellpulse replay`` counts
    them). Arrival time = the wall-clock time the line was read, in ms, or with
    ``arrival_from_message`` the message's own ``arrival_ts`` (recorded days). A file resumes
    after the lines the store has applied; stdin is a stream whose line numbers continue from
    the stored offset (lines since the last applied batch are kept, so a rewind to them works).
    The source is finished at the end of the input.
    """

    keyed = False

    def __init__(self, path: str, *, arrival_from_message: bool = False,
                 clock: Callable[[], float] = time.time, stdin: IO[bytes] | None = None) -> None:
        self.path = path
        self.stdin = path == "-"
        if not self.stdin and not os.path.isfile(path):
            raise SourceError(f"--from-file {path}: no such file")
        self.partition = "file:-" if self.stdin else f"file:{os.path.abspath(path)}"
        self.arrival_from_message = arrival_from_message
        self.clock = clock
        self._stdin_stream = stdin
        self._fh: IO[bytes] | None = None
        self._reader: _LineQueue | None = None
        self._positioned = False
        self._line = 0  # number of the next line to read from the input
        self._replay: deque[tuple[int, bytes, int | None]] = deque()  # handed out, unconfirmed
        self._redo: deque[tuple[int, bytes, int | None]] = deque()  # to hand out again
        self._last_record: int | None = None  # offset of the last non-blank line read
        self._eof = False

    # --- reading ---------------------------------------------------------------------------
    def _open(self) -> None:
        if self.stdin:
            if self._reader is None:
                stream = self._stdin_stream or sys.stdin.buffer
                self._reader = _LineQueue(stream)
            return
        if self._fh is not None:
            self._fh.close()
        opener = gzip.open if self.path.endswith(".gz") else open
        self._fh = opener(self.path, "rb")  # type: ignore[operator]
        self._line = 0
        self._eof = False

    def _read_line(self, timeout_s: float) -> bytes | None:
        """The next line (with its newline), b"" at the end, None when none came in time."""
        if self.stdin:
            assert self._reader is not None
            return self._reader.get(timeout_s)
        assert self._fh is not None
        return self._fh.readline()

    def poll(self, timeout_s: float, max_records: int) -> list[SourceRecord]:
        if not self._positioned:
            return []
        out: list[SourceRecord] = []
        while self._redo and len(out) < max_records:
            item = self._redo.popleft()
            self._replay.append(item)
            out.append(self._record(*item))
        deadline = time.monotonic() + timeout_s
        while len(out) < max_records and not self._eof:
            wait = 0.0 if out else max(0.0, deadline - time.monotonic())
            line = self._read_line(wait)
            if line is None:
                break  # nothing within the timeout (stdin)
            if line == b"":
                self._eof = True
                break
            num = self._line
            self._line += 1
            raw = line.rstrip(b"\r\n")
            if not raw.strip():
                continue
            self._last_record = num
            ts = None if self.arrival_from_message else int(self.clock() * 1000)
            item = (num, raw, ts)
            if self.stdin:
                self._replay.append(item)
            out.append(self._record(*item))
        return out

    def _record(self, num: int, raw: bytes, ts: int | None) -> SourceRecord:
        return SourceRecord(self.partition, num, ts, None, raw)

    # --- positioning -----------------------------------------------------------------------
    def seek(self, offsets: Mapping[str, int]) -> None:
        stored = offsets.get(self.partition)
        if self.stdin:
            self._seek_stream(stored)
        else:
            self._open()
            target = stored or 0
            while self._line < target:
                line = self._fh.readline()  # type: ignore[union-attr]
                if line == b"":
                    self._eof = True
                    break
                if line.rstrip(b"\r\n").strip():
                    self._last_record = self._line
                self._line += 1
            log.info("%s: reading from line %d%s", self.partition, self._line,
                     " (stored with the state)" if stored else "")
        self._positioned = True

    def _seek_stream(self, stored: int | None) -> None:
        self._open()
        if not self._positioned and not self._replay and self._line == 0:
            self._line = stored or 0  # a pipe continues the stored numbering
            log.info("%s: numbering lines from %d", self.partition, self._line)
            return
        target = self._line if stored is None else stored
        kept = list(self._replay) + list(self._redo)
        self._replay.clear()
        self._redo = deque(item for item in kept if item[0] >= target)
        first = kept[0][0] if kept else self._line
        if target < first:
            log.error("%s: cannot rewind stdin to line %d; continuing at line %d (the lines "
                      "between are lost from the state)", self.partition, target, first)
        elif not kept and target > self._line:
            self._line = target

    def assignment(self) -> frozenset[str]:
        return frozenset({self.partition})

    def unpositioned(self) -> frozenset[str]:
        return frozenset() if self._positioned else frozenset({self.partition})

    def end_offsets(self) -> dict[str, int]:
        """Known only at the end of the input: the offset after its last record."""
        if self._eof and self._positioned and not self._redo:
            end = self._last_record + 1 if self._last_record is not None else self._line
            return {self.partition: end}
        return {}

    def commit(self, offsets: Mapping[str, int]) -> None:
        nxt = offsets.get(self.partition)
        if nxt is None:
            return
        while self._replay and self._replay[0][0] < nxt:
            self._replay.popleft()

    def finished(self) -> bool:
        return self._eof and not self._redo

    def close(self) -> None:
        if self._fh is not None:
            self._fh.close()
            self._fh = None


class _LineQueue:
    """Lines of a blocking stream, read by a daemon thread, taken with a timeout."""

    def __init__(self, stream: IO[bytes], capacity: int = 10_000) -> None:
        self._q: queue.Queue[bytes] = queue.Queue(maxsize=capacity)
        self._thread = threading.Thread(target=self._run, args=(stream,), daemon=True,
                                        name="cellpulse-stdin")
        self._thread.start()

    def _run(self, stream: IO[bytes]) -> None:
        try:
            for line in stream:
                self._q.put(line)
        finally:
            self._q.put(b"")

    def get(self, timeout_s: float) -> bytes | None:
        try:
            if timeout_s <= 0:
                return self._q.get_nowait()
            return self._q.get(timeout=timeout_s)
        except queue.Empty:
            return None


# --- waiting ----------------------------------------------------------------------------------

class Backoff:
    """Capped exponential backoff: ``initial_s``, doubling, at most ``max_s``."""

    def __init__(self, initial_s: float = 0.2, max_s: float = 10.0) -> None:
        self.initial_s = initial_s
        self.max_s = max_s
        self._next = initial_s

    def next(self) -> float:
        wait = self._next
        self._next = min(self.max_s, self._next * 2)
        return wait

    def reset(self) -> None:
        self._next = self.initial_s

    @staticmethod
    def sleep(seconds: float, should_stop: Callable[[], bool] = lambda: False) -> None:
        """Sleep in short slices, returning early once ``should_stop()`` is true."""
        end = time.monotonic() + seconds
        while not should_stop():
            left = end - time.monotonic()
            if left <= 0:
                return
            time.sleep(min(left, 0.05))
