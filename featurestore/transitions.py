"""Pure state transitions: one accepted fix applied to one vehicle's state.

No I/O. ``advance`` returns the vehicle's next state and what the fix contributes to the
shared counters; the engine gathers those per batch and hands them to a store.
"""

from __future__ import annotations

from bisect import bisect_left
from dataclasses import dataclass
from datetime import datetime, timezone
from functools import lru_cache
from typing import NamedTuple
from zoneinfo import ZoneInfo

from featurestore.cells import cell_of
from featurestore.config import EngineConfig
from featurestore.geometry import step_m_and_bearing
from featurestore.schema import Fix
from featurestore.state import TripState, VehicleState

DAY_MS = 86_400_000


@dataclass(frozen=True, slots=True)
class CompletedTrip:
    """A trip that ended with a dropoff fix."""

    vehicle_id: str
    trip_id: str
    pickup_event_ms: int
    pickup_arrival_ms: int
    dropoff_event_ms: int
    dropoff_arrival_ms: int
    start_cell: str
    dest_cell: str
    origin_route_cell: str
    dest_route_cell: str
    pickup_hour: int
    duration_ms: int
    distance_m: float
    fixes: int


class Effect(NamedTuple):
    """What one accepted fix changes outside its vehicle's own state."""

    cell: str
    bucket: int
    in_order: bool
    pickup: bool = False
    dropoff: bool = False
    trip_fix: int = 0  # position of this fix in the trip in progress (1 = pickup fix), 0 if none
    completed: CompletedTrip | None = None


@lru_cache(maxsize=16)
def _zone(name: str) -> ZoneInfo:
    return ZoneInfo(name)


def local_hour(ts_ms: int, tz: str) -> int:
    """Hour of day (0-23) of an epoch-ms instant in the named IANA time zone."""
    return datetime.fromtimestamp(ts_ms / 1000, tz=timezone.utc).astimezone(_zone(tz)).hour


def pruned_recent(recent: tuple[int, ...], event_ms: int, horizon_ms: int) -> tuple[int, ...]:
    """The sorted duplicate-detection set after adding a new ``event_ms``, without entries
    before the horizon."""
    kept = recent[bisect_left(recent, horizon_ms):] if recent and recent[0] < horizon_ms else recent
    if not kept or event_ms > kept[-1]:
        return (*kept, event_ms)
    return tuple(sorted((*kept, event_ms)))


_new = tuple.__new__  # a named tuple from its values in field order, without keyword parsing


def advance(state: VehicleState | None, fix: Fix, cfg: EngineConfig) -> tuple[VehicleState, Effect]:
    """Apply an accepted, non-duplicate fix. ``state`` is None for an unknown vehicle."""
    lat = fix.lat
    lon = fix.lon
    event_ms = fix.event_ms
    arrival_ms = fix.arrival_ms
    cell = cell_of(lat, lon, cfg.cell_resolution)
    bucket = event_ms // cfg.bucket_ms

    if state is None:
        new = _new(VehicleState, (
            fix.vehicle_id, event_ms, arrival_ms, arrival_ms, lat, lon, cell, fix.status, 0.0,
            (), pruned_recent((), event_ms, arrival_ms - cfg.max_delay_ms), None))
        return new, _new(Effect, (cell, bucket, True, False, False, 0, None))

    seen_ms = state.seen_ms if state.seen_ms >= arrival_ms else arrival_ms
    recent = pruned_recent(state.recent, event_ms, seen_ms - cfg.max_delay_ms)
    if event_ms <= state.event_ms:  # out of order: counts only in the cell's fixes
        # the state as it was, with only seen_ms and recent changed
        return _new(VehicleState, (*state[:3], seen_ms, *state[4:10], recent, state.trip)), \
            _new(Effect, (cell, bucket, False, False, False, 0, None))

    step_m, step_bearing = step_m_and_bearing(state.lat, state.lon, lat, lon,
                                              cfg.earth_radius_m)
    speed = step_m / ((event_ms - state.event_ms) / 1000.0)
    bearing = step_bearing if step_m >= cfg.moving_step_m else None
    bearings = state.bearings
    if bearing is not None:
        bearings = (*bearings, bearing)[-cfg.heading_steps:]

    prev, now = state.status, fix.status
    pickup = prev == "vacant" and now == "occupied"
    dropoff = prev == "occupied" and (now == "vacant" or now == "offline")
    trip = state.trip
    trip_fix = 0
    completed = None
    if pickup:
        trip = TripState(
            trip_id=fix.trip_id or f"{fix.vehicle_id}:{event_ms}",
            pickup_event_ms=event_ms, pickup_arrival_ms=arrival_ms,
            pickup_lat=lat, pickup_lon=lon, start_cell=cell,
            origin_route_cell=cell_of(lat, lon, cfg.route_resolution),
            distance_m=0.0, fixes=1, initial_bearings=(),
        )
        trip_fix = 1
    elif dropoff:
        if trip is not None:
            completed = CompletedTrip(
                vehicle_id=fix.vehicle_id, trip_id=trip.trip_id,
                pickup_event_ms=trip.pickup_event_ms, pickup_arrival_ms=trip.pickup_arrival_ms,
                dropoff_event_ms=event_ms, dropoff_arrival_ms=arrival_ms,
                start_cell=trip.start_cell, dest_cell=cell,
                origin_route_cell=trip.origin_route_cell,
                dest_route_cell=cell_of(lat, lon, cfg.route_resolution),
                pickup_hour=local_hour(trip.pickup_event_ms, cfg.city_tz),
                duration_ms=event_ms - trip.pickup_event_ms,
                distance_m=trip.distance_m + step_m, fixes=trip.fixes + 1,
            )
        trip = None
    elif trip is not None:
        fixes = trip.fixes + 1
        initial = trip.initial_bearings
        if bearing is not None and fixes <= cfg.trip_initial_fixes:
            initial = (*initial, bearing)
        # the trip with distance, fixes and initial bearings changed
        trip = _new(TripState, (*trip[:7], trip.distance_m + step_m, fixes, initial))
        trip_fix = fixes

    new = _new(VehicleState, (
        fix.vehicle_id, event_ms, arrival_ms, seen_ms, lat, lon, cell, now, speed, bearings,
        recent, trip))
    return new, _new(Effect, (cell, bucket, True, pickup, dropoff, trip_fix, completed))
