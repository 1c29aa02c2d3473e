"""Per-vehicle state records (the engine's only mutable memory besides counters).

Immutable named tuples (cheap to build on every fix) that serialise to JSON-compatible
dicts, so any store can hold them.
"""

from __future__ import annotations

from typing import Any, NamedTuple


class TripState(NamedTuple):
    """A trip in progress, from its pickup fix on."""

    trip_id: str
    pickup_event_ms: int
    pickup_arrival_ms: int
    pickup_lat: float
    pickup_lon: float
    start_cell: str
    origin_route_cell: str
    distance_m: float
    fixes: int
    initial_bearings: tuple[float, ...]

    def to_dict(self) -> dict[str, Any]:
        d = self._asdict()
        d["initial_bearings"] = list(self.initial_bearings)
        return d

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> TripState:
        return cls(**{**d, "initial_bearings": tuple(d["initial_bearings"])})


class VehicleState(NamedTuple):
    """What the engine knows of one vehicle: its latest in-order fix and recent history."""

    vehicle_id: str
    event_ms: int  # latest in-order fix
    arrival_ms: int  # arrival of that fix
    seen_ms: int  # latest arrival of any accepted fix (expiry and duplicate horizon)
    lat: float
    lon: float
    cell: str
    status: str
    speed_mps: float
    bearings: tuple[float, ...]  # last moving-step bearings, oldest first
    recent: tuple[int, ...]  # event_ms of accepted fixes within the maximum delay, sorted
    trip: TripState | None

    def to_dict(self) -> dict[str, Any]:
        d = self._asdict()
        d["bearings"] = list(self.bearings)
        d["recent"] = list(self.recent)
        d["trip"] = self.trip.to_dict() if self.trip is not None else None
        return d

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> VehicleState:
        trip = d.get("trip")
        return cls(
            **{
                **d,
                "bearings": tuple(d["bearings"]),
                "recent": tuple(d["recent"]),
                "trip": TripState.from_dict(trip) if trip else None,
            }
        )
