"""The consumer loop of the live path: poll -> decode -> engine -> dead letters -> state.

One iteration:

1. position partitions that wait for it (new assignments, or all of them after a stale batch
   or a lost connection) at the next offsets stored with the state (Redis is the truth);
2. poll a batch and record the partitions' end offsets in the store (for ``known_at``);
3. decode every record (``featurestore.schema``), run the shared engine over the batch, keep
   its coalesced state change (the batch's offsets included) without writing it yet;
4. send and flush the batch's dead letters (decode rejections and the engine's too_late,
   duplicate, from_future), so a crash can repeat a dead letter but never lose one (readers
   dedupe on ``source_partition`` + ``source_offset``);
5. apply the state change and the offsets in ONE atomic store step. If the store refuses it
   (``StaleBatchError``: another consumer applied these offsets), nothing was written: the
   loop re-positions every partition from the store and goes on.

A lost broker or Redis is retried with capped exponential backoff; every batch not applied
is read again from the stored offsets (a restarted Redis may have lost its latest writes).
Killing the process at any instant leaves the state equal to a replay of the messages whose
offsets are stored.
"""

from __future__ import annotations

import logging
import time
from collections import Counter
from collections.abc import Collection, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

from featurestore.config import EngineConfig
from featurestore.engine import Engine
from featurestore.schema import Fix, Rejection, decode_records
from featurestore.state import VehicleState
from featurestore.store import Delta, SourceSpan, StaleBatchError, StateStore
from ingest.dead_letters import DeadLetter, DeadLetterError, DeadLetterSink
from ingest.records import SourceRecord
from ingest.sources import Backoff, Source, SourceUnavailable
from ingest.stats import ConsumerStats

log = logging.getLogger("cellpulse.ingest")


class TapeSink(Protocol):
    """Where the applied stream is archived (``ingest.tape.TapeWriter``)."""

    def write(self, records: Sequence[SourceRecord], decoded: Sequence[Fix | Rejection]
              ) -> None: ...

    def close(self) -> None: ...


@dataclass(frozen=True)
class LoopOptions:
    """How the loop polls and when it stops."""

    max_poll_records: int = 500
    poll_timeout_s: float = 0.2  # also how soon a new assignment is positioned
    max_records: int | None = None  # stop once this many messages are applied
    idle_exit_s: float | None = None  # stop after this long without a message (while assigned)
    highwater_refresh_s: float = 1.0  # rewrite unchanged end offsets this often
    commit_interval_s: float = 1.0  # Kafka commits for lag monitoring, at most this often
    progress_interval_s: float = 10.0  # an INFO line with the counters this often
    backoff_initial_s: float = 0.2
    backoff_max_s: float = 10.0


class _HeldStore:
    """The store as the engine sees it, except that ``apply`` keeps the batch's Delta for the
    loop, which stores the dead letters first and then applies the Delta itself."""

    def __init__(self, store: StateStore) -> None:
        self.store = store
        self.history_ms = int(getattr(store, "history_ms", 0) or 0)
        self.delta: Delta | None = None

    def load_vehicles(self, vehicle_ids: Collection[str]) -> dict[str, VehicleState]:
        return self.store.load_vehicles(vehicle_ids)

    def watermark_ms(self) -> int | None:
        return self.store.watermark_ms()

    def apply(self, delta: Delta) -> None:
        self.delta = delta

    def __getattr__(self, name: str) -> Any:
        return getattr(self.store, name)


def spans_of(records: Sequence[SourceRecord], decoded: Sequence[Fix | Rejection]
             ) -> dict[str, SourceSpan]:
    """Per partition of a batch: first offset, last offset + 1, latest arrival."""
    first: dict[str, int] = {}
    last: dict[str, int] = {}
    arrival: dict[str, int | None] = {}
    for r, d in zip(records, decoded, strict=True):
        p = r.partition
        if p not in first:
            first[p] = r.offset
            arrival[p] = None
        last[p] = r.offset
        a = d.arrival_ms if d.arrival_ms is not None else r.timestamp_ms
        if a is not None and (arrival[p] is None or a > arrival[p]):
            arrival[p] = a
    return {p: SourceSpan(first[p], last[p] + 1, arrival[p]) for p in first}


def _redis_errors() -> tuple[type[BaseException], ...]:
    try:
        import redis
    except ImportError:  # pragma: no cover - redis is a dependency
        return ()
    return (redis.RedisError,)


class ConsumerLoop:
    """Applies a source's records to a store through the shared engine (see the module doc).

    ``stop()`` may be called from a signal handler: the loop finishes or drops the batch at
    hand (never half-applies one: the store applies a batch in one atomic step), then closes
    the source (a group member leaves the group at once), the dead letters and the tape.
    """

    def __init__(self, source: Source, store: StateStore, dead_letters: DeadLetterSink, *,
                 config: EngineConfig | None = None, tape: TapeSink | None = None,
                 stats: ConsumerStats | None = None, options: LoopOptions | None = None
                 ) -> None:
        self.source = source
        self.store = store
        self.dead_letters = dead_letters
        self.tape = tape
        self.stats = stats or ConsumerStats()
        self.options = options or LoopOptions()
        self._held = _HeldStore(store)
        self.engine = Engine(self._held, config)  # type: ignore[arg-type]
        self._stopping = False
        self._reposition = True  # position everything from the store before the first poll
        self._hw_written: dict[str, int] = {}
        self._hw_at = float("-inf")
        self._to_commit: dict[str, int] = {}
        self._commit_at = float("-inf")
        self._outage: str | None = None
        self._outage_since = 0.0
        self._backoff = Backoff(self.options.backoff_initial_s, self.options.backoff_max_s)
        self._redis_errors = _redis_errors()
        self.tape_errors = 0
        self._unconfirmed: tuple[dict[str, SourceSpan], int, int, Counter] | None = None

    # --- control ---------------------------------------------------------------------------
    def stop(self) -> None:
        """Ask the loop to stop after the batch at hand (safe in a signal handler)."""
        self._stopping = True

    @property
    def stopping(self) -> bool:
        return self._stopping

    def run(self) -> ConsumerStats:
        """Run until stopped, ``max_records`` applied, idle for ``idle_exit_s``, or the end of
        a file; then close everything. Returns the counters."""
        opts = self.options
        last_record = time.monotonic()
        progress_at = time.monotonic()
        unassigned_since: float | None = None
        try:
            while not self._stopping:
                if opts.max_records is not None and self.stats.received >= opts.max_records:
                    log.info("stopping: %d messages applied (--max-records)",
                             self.stats.received)
                    break
                if self.source.finished():
                    log.info("stopping: end of input")
                    break
                try:
                    n = self.step()
                except self._redis_errors as exc:
                    self._lost("redis", "Redis", exc)
                    continue
                except SourceUnavailable as exc:
                    self._lost("kafka", "the broker", exc)
                    continue
                except DeadLetterError as exc:
                    self._lost("dead_letters", "the dead-letter sink", exc)
                    continue
                self._recovered()
                now = time.monotonic()
                if n:
                    last_record = now
                elif (opts.idle_exit_s is not None and self.source.assignment()
                      and not self.source.unpositioned()
                      and now - last_record >= opts.idle_exit_s):
                    log.info("stopping: no message for %.1f s (--idle-exit)", now - last_record)
                    break
                if now - progress_at >= opts.progress_interval_s:
                    progress_at = now
                    self._log_progress()
                if self.source.assignment():
                    unassigned_since = None
                elif unassigned_since is None:
                    unassigned_since = now
                elif now - unassigned_since >= 30.0:
                    unassigned_since = now
                    log.warning("no partition assigned for 30 s: does the topic exist, or do "
                                "other members of the group hold every partition?")
        finally:
            self._close()
        return self.stats

    # --- one iteration -----------------------------------------------------------------------
    def step(self) -> int:
        """Position if needed, poll one batch, apply it. Returns the messages applied."""
        if self._reposition or self.source.unpositioned():
            self._position()
        opts = self.options
        limit = opts.max_poll_records
        if opts.max_records is not None:
            limit = max(1, min(limit, opts.max_records - self.stats.received))
        records = self.source.poll(opts.poll_timeout_s, limit)
        try:
            self._note_highwaters()
            if not records and self.tape is not None:
                self._tape_write([], [])  # lets the tape flush parts that waited long enough
            if not records or self._stopping:
                if records:
                    self.stats.dropped += len(records)
                    self._reposition = True
                return 0
            return self._apply(records)
        except BaseException:
            # Not applied (or not known to be): read the batch again from the stored offsets.
            self.stats.dropped += len(records)
            self._reposition = True
            raise

    def _position(self) -> None:
        offsets = dict(self.store.offsets())
        if self._unconfirmed is not None:
            spans, size, accepted, rejected = self._unconfirmed
            self._unconfirmed = None
            if all(offsets.get(p, -1) >= span.next_offset for p, span in spans.items()):
                # its reply was lost, but the store holds it: count it once
                self.stats.record_batch(size, accepted, rejected, 0.0)
                self.stats.dropped -= size
        self.source.seek(offsets)
        self._reposition = False
        self._hw_written.clear()  # a restarted Redis may have lost them
        for p in self.source.assignment():
            if p in offsets:
                self.stats.applied[p] = offsets[p]

    def _apply(self, records: list[SourceRecord]) -> int:
        t0 = time.perf_counter()
        # decode_record per record (decode_json for unkeyed sources), in one call
        decoded = decode_records(records, keyed=self.source.keyed)
        spans = spans_of(records, decoded)
        self._held.delta = None
        result = self.engine.process(decoded, raws={i: r.value for i, r in enumerate(records)},
                                     spans=spans)
        letters = [DeadLetter.of(records[i], rej) for i, rej in result.rejected]
        if letters:
            self.dead_letters.send(letters)  # durable before the state moves past them
            self.stats.dead_letters += len(letters)
        delta = self._held.delta
        rejected = Counter(rej.reason for _, rej in result.rejected)
        if delta is not None:
            # kept until confirmed: a lost reply may hide a batch that was applied
            self._unconfirmed = (spans, len(records), result.accepted, rejected)
            try:
                self.store.apply(delta)
            except StaleBatchError as exc:
                self._unconfirmed = None
                log.warning("batch of %d messages not applied: %s; re-reading every partition "
                            "from the offsets stored with the state", len(records), exc)
                self.stats.stale_batches += 1
                self.stats.dropped += len(records)
                self._reposition = True
                return 0
            self._unconfirmed = None
        self.stats.record_batch(len(records), result.accepted, rejected,
                                time.perf_counter() - t0)
        for p, span in spans.items():
            self.stats.applied[p] = span.next_offset
            self._to_commit[p] = span.next_offset
            end = self._hw_written.get(p)
            if end is not None:
                self.stats.lag[p] = max(0, end - span.next_offset)
        if self.tape is not None:
            self._tape_write(records, decoded)
        self._maybe_commit()
        return len(records)

    def _tape_write(self, records: list[SourceRecord], decoded: list[Fix | Rejection]) -> None:
        try:
            self.tape.write(records, decoded)  # type: ignore[union-attr]
        except Exception as exc:  # noqa: BLE001 - the archive never stops live features
            self.tape_errors += 1
            log.error("tape: could not write %d messages: %s", len(records), exc)

    def _note_highwaters(self) -> None:
        ends = self.source.end_offsets()
        if not ends:
            return
        now = time.monotonic()
        if now - self._hw_at >= self.options.highwater_refresh_s:
            changed = dict(ends)
        else:
            changed = {p: e for p, e in ends.items() if self._hw_written.get(p) != e}
        if changed:
            self.store.set_highwaters(changed)
            self._hw_written.update(changed)
            self._hw_at = now
        for p, e in ends.items():
            applied = self.stats.applied.get(p)
            self.stats.lag[p] = max(0, e - applied) if applied is not None else e

    def _maybe_commit(self, force: bool = False) -> None:
        now = time.monotonic()
        if self._to_commit and (force or now - self._commit_at >= self.options.commit_interval_s):
            self.source.commit(self._to_commit)
            self._to_commit = {}
            self._commit_at = now

    # --- outages -----------------------------------------------------------------------------
    def _lost(self, kind: str, what: str, exc: BaseException) -> None:
        if self._outage is None:
            self._outage = what
            self._outage_since = time.monotonic()
            self.stats.reconnects[kind] += 1
        wait = self._backoff.next()
        text = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        log.warning("%s unavailable (%s: %s); retrying in %.1f s", what, type(exc).__name__,
                    text, wait)
        Backoff.sleep(wait, lambda: self._stopping)

    def _recovered(self) -> None:
        if self._outage is not None:
            log.info("%s is back after %.1f s", self._outage,
                     time.monotonic() - self._outage_since)
            self._outage = None
            self._backoff.reset()

    def _log_progress(self) -> None:
        s = self.stats
        lag = sum(s.lag.values())
        log.info("applied %d messages (%d accepted, %d rejected) in %d batches; %.0f/s; lag %d",
                 s.received, s.accepted, s.rejected_total, s.batches, s.fixes_per_second(), lag)

    def _close(self) -> None:
        try:
            self._maybe_commit(force=True)
        except Exception as exc:  # noqa: BLE001 - lag monitoring only
            log.debug("final commit: %s", exc)
        for name, thing in (("source", self.source), ("dead letters", self.dead_letters),
                            ("tape", self.tape)):
            if thing is None:
                continue
            try:
                thing.close()
            except Exception as exc:  # noqa: BLE001 - closing the rest anyway
                log.error("closing the %s: %s", name, exc)
        s = self.stats
        log.info("stopped: %d messages applied (%d accepted, %d rejected: %s), %d dead letters",
                 s.received, s.accepted, s.rejected_total,
                 dict(sorted(s.rejected.items())) or "none", s.dead_letters)


def stats_summary(stats: ConsumerStats) -> Mapping[str, Any]:
    """The counters as JSON values (printed at the end of ``cellpulse ingest``)."""
    return stats.as_dict()
