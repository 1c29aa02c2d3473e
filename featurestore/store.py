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
    """A vehicle's latest in-order fix moved: leave (old cell, old status), enter the new ones."""

    old_cell: str | None
    old_status: str | None
    cell: str
    status: str
    event_ms: int


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
    offsets: dict[str, int] = field(default_factory=dict)  # source partition -> next offset
    cell_log: list[CellLogEntry] = field(default_factory=list)
    route_log: list[RouteLogEntry] = field(default_factory=list)
    vehicle_log: list[VehicleLogEntry] = field(default_factory=list)

    def is_empty(self) -> bool:
        return not (self.vehicles or self.cells or self.routes or self.presence or self.offsets)


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


@dataclass(slots=True)
class ReadResult:
    """Raw values for a ReadRequest; absent keys are simply missing."""

    vehicles: dict[str, VehicleState] = field(default_factory=dict)
    cells: dict[str, dict[int, tuple[int, int, int]]] = field(default_factory=dict)
    presence: dict[str, tuple[int, int]] = field(default_factory=dict)  # (vacant, occupied)
    routes: dict[RouteKey, tuple[int, int, int]] = field(default_factory=dict)
    watermark_ms: int | None = None


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
        """Apply a whole batch atomically: counters, vehicles, presence, offsets, watermark."""
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
