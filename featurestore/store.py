"""The state store interface: what the engine writes and what lookups read.

Stores hold counters, vehicle records and a presence index; they know nothing about
features. Every store (in memory, Redis) implements ``StateStore`` and passes the same
parametrized test suite.
"""

from __future__ import annotations

from collections.abc import Collection, Mapping
from dataclasses import dataclass, field
from typing import Protocol, runtime_checkable

from featurestore.state import VehicleState

# Counter columns of a (cell, bucket) entry, in this order.
CELL_FIELDS = ("fixes", "pickups", "dropoffs")
# Counter columns of a (origin, dest, hour, day) route entry: trips, sum and sum of squares of
# durations in integer milliseconds (exact in any order of addition).
ROUTE_FIELDS = ("trips", "dur_sum_ms", "dur_sq_sum_ms2")

CellKey = tuple[str, int]  # (cell, bucket)
RouteKey = tuple[str, str, int]  # (origin route cell, destination route cell, pickup hour)
RouteDayKey = tuple[str, str, int, int]  # RouteKey + day of the dropoff's arrival


@dataclass(frozen=True, slots=True)
class PresenceMove:
    """A vehicle's latest in-order fix moved: leave (old cell, old status), enter the new ones.

    ``arrival_ms`` is when the new position became known; ``old_event_ms`` and
    ``old_arrival_ms`` identify the entry being left (stores that keep presence intervals
    need them).
    """

    old_cell: str | None
    old_status: str | None
    cell: str
    status: str
    event_ms: int
    arrival_ms: int = 0
    old_event_ms: int | None = None
    old_arrival_ms: int | None = None


@dataclass(frozen=True, slots=True)
class SourceSpan:
    """The records of one source partition in a batch: offsets ``first_offset`` up to (not
    including) ``next_offset``, the latest arrival among them."""

    first_offset: int
    next_offset: int
    last_arrival_ms: int | None = None


@dataclass(frozen=True, slots=True)
class SourcePosition:
    """What a store has applied of one source partition."""

    next_offset: int
    last_arrival_ms: int | None


class StaleBatchError(RuntimeError):
    """A batch starts before what the store has already applied for one of its partitions
    (another consumer applied it): nothing of the batch was written."""


@dataclass(frozen=True, slots=True)
class Retention:
    """Horizons before which a store may forget entries (no lookup at or after the watermark
    needs them)."""

    bucket_min: int
    presence_min_event_ms: int
    vehicle_min_seen_ms: int
    route_day_min: int


class AsOfError(ValueError):
    """A lookup asked for a moment the store can no longer (or cannot) answer exactly."""


# History entries, one per accepted fix (stores that keep history answer as of earlier T):
CellLogEntry = tuple[int, str, int, int, int, int]  # arrival, cell, bucket, fixes, pick, drop
RouteLogEntry = tuple[int, str, str, int, int, int]  # arrival, origin, dest, hour, day, dur_ms
VehicleLogEntry = tuple[int, str, "VehicleState | None"]  # arrival, vehicle, state before it


@dataclass(slots=True)
class Delta:
    """Everything one batch changes, coalesced: one entry per counter key and per vehicle.

    The ``*_log`` lists are filled only for stores with ``history_ms > 0``: they tag each
    change with its arrival time so such stores can answer as of an earlier moment.
    """

    vehicles: dict[str, VehicleState] = field(default_factory=dict)
    cells: dict[CellKey, list[int]] = field(default_factory=dict)
    routes: dict[RouteDayKey, list[int]] = field(default_factory=dict)
    presence: dict[str, PresenceMove] = field(default_factory=dict)
    watermark_ms: int | None = None
    retention: Retention | None = None
    spans: dict[str, SourceSpan] = field(default_factory=dict)  # source partition -> span
    counts: dict[str, int] = field(default_factory=dict)  # messages by outcome, this batch
    cell_log: list[CellLogEntry] = field(default_factory=list)
    route_log: list[RouteLogEntry] = field(default_factory=list)
    vehicle_log: list[VehicleLogEntry] = field(default_factory=list)

    def is_empty(self) -> bool:
        return not (self.vehicles or self.cells or self.routes or self.presence or self.spans)


@dataclass(frozen=True, slots=True)
class ReadRequest:
    """One batched read: everything a set of lookups needs, fetched together."""

    vehicles: Collection[str] = ()
    cells: Mapping[str, int] = field(default_factory=dict)  # cell -> first bucket wanted
    bucket_hi: int = -1  # last bucket wanted (inclusive), for every cell
    presence_cells: Collection[str] = ()
    presence_min_event_ms: int = 0
    routes: Collection[RouteKey] = ()
    day_lo: int = 0  # inclusive
    day_hi: int = -1  # inclusive
    as_of_ms: int | None = None  # None: the current state; else what was known at that time
    with_progress: bool = False  # also return the source positions and end offsets


@dataclass(slots=True)
class ReadResult:
    """Raw values for a ReadRequest; absent keys are simply missing."""

    vehicles: dict[str, VehicleState] = field(default_factory=dict)
    cells: dict[str, dict[int, tuple[int, int, int]]] = field(default_factory=dict)
    presence: dict[str, tuple[int, int]] = field(default_factory=dict)  # (vacant, occupied)
    routes: dict[RouteKey, tuple[int, int, int]] = field(default_factory=dict)
    watermark_ms: int | None = None
    positions: dict[str, SourcePosition] | None = None  # with_progress only
    highwaters: dict[str, int] | None = None  # with_progress only: partition -> end offset
    history_ms: int | None = None  # the history the writers keep, where the store records it
    counts: dict[str, int] | None = None  # with_progress only: messages applied by outcome


@runtime_checkable
class StateStore(Protocol):
    """Storage for engine state. Implementations: MemoryStore, RedisStore.

    ``history_ms``: how far before its watermark the store answers reads exactly (0: only at
    or after the watermark; earlier reads raise AsOfError).
    """

    history_ms: int

    def load_vehicles(self, vehicle_ids: Collection[str]) -> dict[str, VehicleState]:
        """The stored states of these vehicles (missing ones are absent)."""
        ...

    def apply(self, delta: Delta) -> None:
        """Apply a whole batch atomically: counters, vehicles, presence, offsets, watermark.

        Raises StaleBatchError, writing nothing, when a span starts before the stored next
        offset of its partition.
        """
        ...

    def read(self, request: ReadRequest) -> ReadResult:
        """Fetch the raw values for a batch of lookups."""
        ...

    def watermark_ms(self) -> int | None:
        """The latest arrival time applied (None before any)."""
        ...

    def offsets(self) -> Mapping[str, int]:
        """Source partition -> next offset to apply, as stored with the state."""
        ...

    def positions(self) -> Mapping[str, SourcePosition]:
        """Source partition -> next offset and latest arrival applied."""
        ...

    def set_highwaters(self, ends: Mapping[str, int]) -> None:
        """Record source partitions' end offsets as their consumers saw them; a stored end
        offset is never lowered (a member that just lost a partition may report an old one)."""
        ...

    def counters(self) -> dict[str, int]:
        """Messages applied by outcome since the state began (``received``, ``accepted``,
        ``in_order``, ``out_of_order``, ``rejected:<reason>``), counted once each."""
        ...

    def highwaters(self) -> dict[str, int]:
        """Source partition -> end offset, as last recorded."""
        ...


def check_spans(stored: Mapping[str, SourcePosition], spans: Mapping[str, SourceSpan]) -> None:
    """Raise StaleBatchError when a span starts before what is stored for its partition."""
    for part, span in spans.items():
        pos = stored.get(part)
        if pos is not None and pos.next_offset > span.first_offset:
            raise StaleBatchError(
                f"partition {part}: batch starts at offset {span.first_offset} but offsets up to "
                f"{pos.next_offset - 1} are already applied"
            )


def merge_position(old: SourcePosition | None, span: SourceSpan) -> SourcePosition:
    """The stored position after applying ``span``."""
    last = span.last_arrival_ms
    if old is not None and old.last_arrival_ms is not None:
        last = old.last_arrival_ms if last is None else max(last, old.last_arrival_ms)
    return SourcePosition(span.next_offset, last)
