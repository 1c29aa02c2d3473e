"""The feature engine: acceptance rules and batched state transitions over a store.

Pure logic over a ``StateStore``; it imports neither Kafka nor Redis. Live ingest and
replay both call ``Engine.process`` with decoded fixes.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from operator import attrgetter

from featurestore.config import EngineConfig
from featurestore.schema import DUPLICATE, FROM_FUTURE, TOO_LATE, Fix, Rejection, row_raw
from featurestore.state import VehicleState
from featurestore.store import Delta, PresenceMove, Retention, SourceSpan, StateStore
from featurestore.transitions import DAY_MS, CompletedTrip, advance


def timing_reason(fix: Fix, cfg: EngineConfig) -> str | None:
    """The bitemporal acceptance rule; it depends on the message alone."""
    if fix.arrival_ms - fix.event_ms > cfg.max_delay_ms:
        return TOO_LATE
    if fix.event_ms > fix.arrival_ms + cfg.clock_skew_ms:
        return FROM_FUTURE
    return None


@dataclass(frozen=True, slots=True)
class TripEvent:
    """A trip milestone seen in a batch: the n-th fix of a trip (1 = the pickup fix)."""

    vehicle_id: str
    trip_id: str
    pickup_event_ms: int
    fix_number: int
    arrival_ms: int


@dataclass(slots=True)
class BatchResult:
    """What one batch did: accepted counts, rejections, and trip milestones."""

    consumed: int = 0
    accepted: int = 0
    in_order: int = 0
    out_of_order: int = 0
    rejected: list[tuple[int, Rejection]] = field(default_factory=list)  # (index in batch, why)
    trip_events: list[TripEvent] = field(default_factory=list)
    completed: list[CompletedTrip] = field(default_factory=list)
    pickup_cells: list[str] = field(default_factory=list)


@dataclass
class EngineStats:
    """Running totals since the engine started (exposed in reports and metrics)."""

    received: int = 0
    consumed: int = 0
    accepted: int = 0
    in_order: int = 0
    out_of_order: int = 0
    rejected: Counter = field(default_factory=Counter)

    def as_dict(self) -> dict[str, object]:
        return {
            "received": self.received,
            "accepted": self.accepted,
            "in_order": self.in_order,
            "out_of_order": self.out_of_order,
            "rejected": dict(sorted(self.rejected.items())),
            "rejected_total": sum(self.rejected.values()),
        }


_vehicle_id = attrgetter("vehicle_id")


def _fix_raw(fix: Fix) -> bytes:
    return row_raw(fix.to_record())


class Engine:
    """Applies batches of decoded messages to a store, one coalesced Delta per batch."""

    def __init__(self, store: StateStore, config: EngineConfig | None = None) -> None:
        self.store = store
        self.config = config or EngineConfig()
        self.stats = EngineStats()
        self.history_ms = int(getattr(store, "history_ms", 0) or 0)

    def retention(self, watermark_ms: int) -> Retention:
        """Horizons below which no lookup the store can still answer reads anything: at or
        after ``watermark_ms`` minus the store's history."""
        cfg = self.config
        watermark_ms -= self.history_ms
        return Retention(
            bucket_min=watermark_ms // cfg.bucket_ms - cfg.longest_window_buckets,
            presence_min_event_ms=watermark_ms - cfg.now_horizon_ms,
            vehicle_min_seen_ms=watermark_ms - cfg.vehicle_ttl_ms,
            route_day_min=watermark_ms // DAY_MS - cfg.route_days,
        )

    def process(
        self,
        items: Iterable[Fix | Rejection],
        raws: Mapping[int, bytes] | None = None,
        spans: Mapping[str, SourceSpan] | None = None,
        until: Callable[[TripEvent], bool] | None = None,
        start: int = 0,
    ) -> BatchResult:
        """Process one batch in order. ``raws`` maps batch index -> raw bytes for dead letters;
        ``spans`` the source partitions' offsets the batch covers (stored with its state, in
        the same atomic step; the store raises StaleBatchError if they were applied already).

        With ``until``, processing stops once a trip event satisfies it and every following
        message of the same arrival time is done; ``BatchResult.consumed`` says how many
        messages were taken (the caller feeds the rest again, or passes the same list with
        ``start`` moved on: processing begins at index ``start``, and the indexes in
        ``rejected`` and ``raws`` are always positions in ``items``).
        """
        cfg = self.config
        batch = items if type(items) is list else list(items)
        result = BatchResult()
        stats = self.stats
        # the vehicles named in the batch (a rejection's too: loading it changes nothing)
        ids = set(map(_vehicle_id, batch[start:] if start else batch))
        ids.discard(None)
        loaded = self.store.load_vehicles(ids)
        current: dict[str, VehicleState | None] = dict(loaded)
        delta = Delta()
        wm = self.store.watermark_ms()
        stop_at: int | None = None
        consumed = accepted = in_order = 0
        ttl = cfg.vehicle_ttl_ms
        cells = delta.cells
        vehicles = delta.vehicles
        rejected = result.rejected
        history = self.history_ms > 0
        for i in range(start, len(batch)):
            item = batch[i]
            arrival = item.arrival_ms
            if stop_at is not None and arrival is not None and arrival > stop_at:
                break
            consumed = i + 1 - start
            if type(item) is Rejection:
                rejected.append((i, item))
                continue
            fix = item
            vid = fix.vehicle_id
            if wm is None or arrival > wm:
                wm = arrival
            reason = timing_reason(fix, cfg)
            state = current.get(vid)
            if state is not None and arrival - state.seen_ms > ttl:
                state = None  # logically expired: the vehicle starts afresh
            if reason is None and state is not None and fix.event_ms in state.recent:
                reason = DUPLICATE
            if reason is not None:
                raw = raws.get(i) if raws is not None else None
                rej = Rejection(reason, _timing_detail(reason, fix, cfg), raw or _fix_raw(fix),
                                vid, fix.arrival_ms)
                rejected.append((i, rej))
                continue
            new, eff = advance(state, fix, cfg)
            if history:
                delta.vehicle_log.append((fix.arrival_ms, vid, current.get(vid)))
                delta.cell_log.append((fix.arrival_ms, eff.cell, eff.bucket, 1, int(eff.pickup),
                                       int(eff.dropoff)))
            current[vid] = new
            vehicles[vid] = new
            key = (eff.cell, eff.bucket)
            row = cells.get(key)
            if row is None:
                row = cells[key] = [0, 0, 0]
            row[0] += 1
            accepted += 1
            if not eff.in_order:
                continue
            in_order += 1
            if eff.pickup:
                row[1] += 1
                result.pickup_cells.append(eff.cell)
            elif eff.dropoff:
                row[2] += 1
            if eff.trip_fix and new.trip is not None:
                ev = TripEvent(vid, new.trip.trip_id, new.trip.pickup_event_ms, eff.trip_fix,
                               fix.arrival_ms)
                result.trip_events.append(ev)
                if until is not None and stop_at is None and until(ev):
                    stop_at = fix.arrival_ms
            if eff.completed is not None:
                c = eff.completed
                rkey = (c.origin_route_cell, c.dest_route_cell, c.pickup_hour,
                        c.dropoff_arrival_ms // DAY_MS)
                r = delta.routes.get(rkey)
                if r is None:
                    r = delta.routes[rkey] = [0, 0, 0]
                r[0] += 1
                r[1] += c.duration_ms
                r[2] += c.duration_ms * c.duration_ms
                result.completed.append(c)
                if history:
                    delta.route_log.append((fix.arrival_ms, *rkey, c.duration_ms))
        result.accepted = accepted
        result.in_order = in_order
        result.out_of_order = accepted - in_order
        for vid, new in delta.vehicles.items():
            old = loaded.get(vid)
            if old is None or (old.cell, old.status, old.event_ms) != (
                new.cell, new.status, new.event_ms
            ):
                delta.presence[vid] = PresenceMove(
                    old.cell if old else None, old.status if old else None,
                    new.cell, new.status, new.event_ms, new.arrival_ms,
                    old.event_ms if old else None, old.arrival_ms if old else None,
                )
        if spans:
            delta.spans.update(spans)
        counts = {"received": consumed, "accepted": accepted, "in_order": in_order,
                  "out_of_order": accepted - in_order}
        for _, rej in rejected:
            key = f"rejected:{rej.reason}"
            counts[key] = counts.get(key, 0) + 1
        delta.counts = {k: v for k, v in counts.items() if v}
        if wm is not None:
            delta.watermark_ms = wm
            delta.retention = self.retention(wm)
        if not delta.is_empty() or delta.watermark_ms is not None:
            self.store.apply(delta)
        result.consumed = consumed
        # running totals only once the store took the batch (a refused batch counts nothing)
        stats.rejected.update(rej.reason for _, rej in rejected)
        stats.received += consumed
        stats.accepted += result.accepted
        stats.in_order += result.in_order
        stats.out_of_order += result.out_of_order
        return result


def _timing_detail(reason: str, fix: Fix, cfg: EngineConfig) -> str:
    lag = (fix.arrival_ms - fix.event_ms) / 1000
    if reason == TOO_LATE:
        return f"arrived {lag:.3f} s after its event time; the maximum delay is {cfg.max_delay_s} s"
    if reason == FROM_FUTURE:
        return (f"event time is {-lag:.3f} s after its arrival; the allowed clock skew is "
                f"{cfg.clock_skew_s} s")
    return "same vehicle and event time as a fix accepted within the maximum delay"
