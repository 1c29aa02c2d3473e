"""A brute-force reference for point-in-time features, written from the written definitions.

It imports nothing from the project (featurestore, ingest, replay): only h3, math and the
standard library. Geometry (haversine, initial bearing, circular mean) is written here again
on purpose. Everything is in integer milliseconds. Nothing is incremental where a scan will
do: window counts, "now" counts, ring sums and route statistics are recomputed for every
question by scanning every accepted fix or completed trip known at that time.

Fixes are dicts with vehicle_id, event_ms, arrival_ms, lat, lon, status and seq (file order);
they are processed in (arrival_ms, seq) order.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from functools import cache

import h3

NAN = float("nan")
HOUR_MS = 3_600_000
DAY_MS = 86_400_000


@dataclass(frozen=True)
class Params:
    """The definitions' parameters (the documented defaults), in ms where they are times."""

    cell_res: int = 8
    route_res: int = 7
    bucket_ms: int = 60_000
    windows_min: tuple[int, ...] = (5, 15, 60)
    ring_window_min: int = 15
    max_delay_ms: int = 300_000
    skew_ms: int = 30_000
    radius_m: float = 6_371_008.8
    moving_m: float = 10.0
    heading_steps: int = 5
    trip_initial_fixes: int = 5
    now_ms: int = 120_000
    route_days: int = 28
    ttl_ms: int = 6 * HOUR_MS


P = Params()

CELL_NAMES = (
    [f"cell_{k}_{w}m" for k in ("pickups", "dropoffs", "fixes") for w in P.windows_min]
    + ["cell_vacant_now", "cell_occupied_now", f"cell_ring_pickups_{P.ring_window_min}m",
       "cell_ring_vacant_now"]
)
VEHICLE_NAMES = ["vehicle_cell", "vehicle_status", "vehicle_fix_age_s", "vehicle_speed_mps",
                 "vehicle_heading_deg", "vehicle_heading_r"]
TRIP_NAMES = ["trip_active", "trip_elapsed_s", "trip_distance_m", "trip_displacement_m",
              "trip_start_cell", "trip_initial_heading_deg", "trip_fixes"]
ROUTE_NAMES = ["route_trips", "route_mean_duration_s", "route_std_duration_s"]
INT_NAMES = frozenset(
    [*CELL_NAMES, "trip_active", "trip_fixes", "route_trips"])
STR_NAMES = frozenset(["vehicle_cell", "vehicle_status", "trip_start_cell"])


# --- geometry, from the textbook formulas ---------------------------------------------------
def haversine(lat1: float, lon1: float, lat2: float, lon2: float, r: float = P.radius_m) -> float:
    """Great-circle distance: d = 2 r asin(sqrt(hav(dphi) + cos phi1 cos phi2 hav(dlambda)))."""
    p1, p2 = math.radians(lat1), math.radians(lat2)
    dp = p2 - p1
    dl = math.radians(lon2 - lon1)
    h = math.sin(dp / 2) ** 2 + math.cos(p1) * math.cos(p2) * math.sin(dl / 2) ** 2
    return 2 * r * math.asin(math.sqrt(min(1.0, h)))


def bearing(lat1: float, lon1: float, lat2: float, lon2: float) -> float:
    """Initial great-circle bearing from point 1 to point 2, degrees in [0, 360)."""
    p1, p2 = math.radians(lat1), math.radians(lat2)
    dl = math.radians(lon2 - lon1)
    y = math.sin(dl) * math.cos(p2)
    x = math.cos(p1) * math.sin(p2) - math.sin(p1) * math.cos(p2) * math.cos(dl)
    b = math.degrees(math.atan2(y, x)) % 360.0
    return 0.0 if b >= 360.0 else b


def circular_mean(degrees: Sequence[float], r_floor: float = 1e-9) -> tuple[float, float]:
    """(mean direction in [0, 360), mean resultant length R); (NaN, NaN) when empty.

    Mean of the unit vectors; the direction is NaN when R < r_floor (it is undefined there:
    north then south has R = 0 and atan2 of rounding noise would give an arbitrary angle)."""
    if not degrees:
        return NAN, NAN
    c = sum(math.cos(math.radians(d)) for d in degrees) / len(degrees)
    s = sum(math.sin(math.radians(d)) for d in degrees) / len(degrees)
    r = math.hypot(c, s)
    if r < r_floor:
        return NAN, r
    m = math.degrees(math.atan2(s, c)) % 360.0
    return (0.0 if m >= 360.0 else m), r


@cache
def cell_at(lat: float, lon: float, res: int) -> str:
    return h3.latlng_to_cell(lat, lon, res)


@cache
def disk(cell: str) -> tuple[str, ...]:
    return tuple(h3.grid_disk(cell, 1))


# --- the state machine ----------------------------------------------------------------------
@dataclass
class Trip:
    pickup: dict
    fixes: int = 1
    distance_m: float = 0.0
    initial_bearings: list[float] = field(default_factory=list)
    arrivals: list[int] = field(default_factory=list)  # arrival of each trip fix, pickup 1st


@dataclass
class Vehicle:
    last: dict  # latest in-order fix
    seen_ms: int
    events: set[int]
    speed: float = 0.0
    bearings: list[float] = field(default_factory=list)
    trip: Trip | None = None


@dataclass
class Record:
    """One accepted fix and what it did to cell counters."""

    fix: dict
    cell: str
    bucket: int
    pickup: bool = False
    dropoff: bool = False


@dataclass
class Completed:
    vehicle_id: str
    pickup: dict
    dropoff: dict
    fixes: int  # trip fixes before the dropoff, the pickup included
    distance_m: float  # including the dropoff step
    arrivals: list[int]
    origin7: str
    dest7: str
    hour: int
    day: int

    @property
    def duration_ms(self) -> int:
        return self.dropoff["event_ms"] - self.pickup["event_ms"]


@dataclass
class World:
    records: list[Record] = field(default_factory=list)
    vehicles: dict[str, Vehicle] = field(default_factory=dict)
    completed: list[Completed] = field(default_factory=list)
    rejected: dict[str, int] = field(default_factory=dict)


def processing_order(fixes: Iterable[dict]) -> list[dict]:
    return sorted(fixes, key=lambda f: (f["arrival_ms"], f["seq"]))


def run(ordered: Iterable[dict], p: Params = P) -> World:
    """Apply fixes (already in processing order) one by one, from nothing."""
    w = World()
    for f in ordered:
        _apply(w, f, p)
    return w


def _reject(w: World, reason: str) -> None:
    w.rejected[reason] = w.rejected.get(reason, 0) + 1


def _apply(w: World, f: dict, p: Params) -> None:
    vid, ev, arr = f["vehicle_id"], f["event_ms"], f["arrival_ms"]
    if arr - ev > p.max_delay_ms:
        return _reject(w, "too_late")
    if ev > arr + p.skew_ms:
        return _reject(w, "from_future")
    v = w.vehicles.get(vid)
    if v is not None and arr - v.seen_ms > p.ttl_ms:
        del w.vehicles[vid]
        v = None
    if v is not None and ev in v.events:
        return _reject(w, "duplicate")
    cell = cell_at(f["lat"], f["lon"], p.cell_res)
    rec = Record(f, cell, ev // p.bucket_ms)
    w.records.append(rec)
    if v is None:
        w.vehicles[vid] = Vehicle(last=f, seen_ms=arr, events={ev})
        return None
    v.events.add(ev)
    v.seen_ms = max(v.seen_ms, arr)
    prev = v.last
    if ev <= prev["event_ms"]:
        return None  # out of order: counts in its cell only
    step = haversine(prev["lat"], prev["lon"], f["lat"], f["lon"], p.radius_m)
    v.speed = step / ((ev - prev["event_ms"]) / 1000)
    moving = step >= p.moving_m
    brg = bearing(prev["lat"], prev["lon"], f["lat"], f["lon"]) if moving else None
    if brg is not None:
        v.bearings = (v.bearings + [brg])[-p.heading_steps:]
    v.last = f
    if prev["status"] == "vacant" and f["status"] == "occupied":
        rec.pickup = True
        v.trip = Trip(pickup=f, arrivals=[arr])
    elif prev["status"] == "occupied" and f["status"] in ("vacant", "offline"):
        rec.dropoff = True
        t = v.trip
        if t is not None:
            pk = t.pickup
            w.completed.append(Completed(
                vid, pk, f, t.fixes, t.distance_m + step, list(t.arrivals),
                cell_at(pk["lat"], pk["lon"], p.route_res),
                cell_at(f["lat"], f["lon"], p.route_res),
                (pk["event_ms"] // HOUR_MS) % 24, arr // DAY_MS))
        v.trip = None
    elif v.trip is not None:
        t = v.trip
        t.fixes += 1
        t.distance_m += step
        t.arrivals.append(arr)
        if brg is not None and t.fixes <= p.trip_initial_fixes:
            t.initial_bearings.append(brg)
    return None


# --- as-of questions --------------------------------------------------------------------------
class Oracle:
    """Answers "as of T" by replaying, from nothing, every fix that arrived by T."""

    def __init__(self, fixes: Iterable[dict], p: Params = P) -> None:
        self.p = p
        self.ordered = processing_order(fixes)
        self._worlds: dict[int, World] = {}

    def world(self, t_ms: int) -> World:
        n = sum(1 for f in self.ordered if f["arrival_ms"] <= t_ms)
        if n not in self._worlds:
            self._worlds[n] = run(self.ordered[:n], self.p)
        return self._worlds[n]

    def _vehicle(self, w: World, vid: str, t_ms: int) -> Vehicle | None:
        v = w.vehicles.get(vid)
        if v is None or t_ms - v.seen_ms > self.p.ttl_ms:
            return None
        return v

    def cell(self, cell: str, t_ms: int) -> dict[str, object]:
        w = self.world(t_ms)
        p = self.p
        bt = t_ms // p.bucket_ms
        out: dict[str, object] = {}
        for kind in ("pickups", "dropoffs", "fixes"):
            for wmin in p.windows_min:
                nb = wmin * 60_000 // p.bucket_ms
                out[f"cell_{kind}_{wmin}m"] = sum(
                    1 for r in w.records
                    if r.cell == cell and bt - nb < r.bucket <= bt
                    and (kind == "fixes" or getattr(r, kind[:-1]))
                )
        out["cell_vacant_now"] = self._now(w, cell, "vacant", t_ms)
        out["cell_occupied_now"] = self._now(w, cell, "occupied", t_ms)
        nb = p.ring_window_min * 60_000 // p.bucket_ms
        ring = set(disk(cell))
        out[f"cell_ring_pickups_{p.ring_window_min}m"] = sum(
            1 for r in w.records if r.pickup and r.cell in ring and bt - nb < r.bucket <= bt)
        out["cell_ring_vacant_now"] = sum(self._now(w, c, "vacant", t_ms) for c in ring)
        return out

    def _now(self, w: World, cell: str, status: str, t_ms: int) -> int:
        n = 0
        for vid in w.vehicles:
            v = self._vehicle(w, vid, t_ms)
            if v is None:
                continue
            f = v.last
            if (cell_at(f["lat"], f["lon"], self.p.cell_res) == cell and f["status"] == status
                    and f["event_ms"] >= t_ms - self.p.now_ms):
                n += 1
        return n

    def vehicle(self, vid: str, t_ms: int) -> dict[str, object]:
        """The vehicle and trip families."""
        v = self._vehicle(self.world(t_ms), vid, t_ms)
        out: dict[str, object] = {
            "vehicle_cell": None, "vehicle_status": None, "vehicle_fix_age_s": NAN,
            "vehicle_speed_mps": NAN, "vehicle_heading_deg": NAN, "vehicle_heading_r": NAN,
            "trip_active": 0, "trip_elapsed_s": NAN, "trip_distance_m": NAN,
            "trip_displacement_m": NAN, "trip_start_cell": None,
            "trip_initial_heading_deg": NAN, "trip_fixes": 0,
        }
        if v is None:
            return out
        f = v.last
        head, r = circular_mean(v.bearings)
        out.update({
            "vehicle_cell": cell_at(f["lat"], f["lon"], self.p.cell_res),
            "vehicle_status": f["status"],
            "vehicle_fix_age_s": (t_ms - f["event_ms"]) / 1000,
            "vehicle_speed_mps": v.speed,
            "vehicle_heading_deg": head,
            "vehicle_heading_r": r,
        })
        t = v.trip
        if t is not None:
            pk = t.pickup
            out.update({
                "trip_active": 1,
                "trip_elapsed_s": (t_ms - pk["event_ms"]) / 1000,
                "trip_distance_m": t.distance_m,
                "trip_displacement_m": haversine(pk["lat"], pk["lon"], f["lat"], f["lon"],
                                                 self.p.radius_m),
                "trip_start_cell": cell_at(pk["lat"], pk["lon"], self.p.cell_res),
                # The same circular mean as the vehicle heading, so NaN also when R < 1e-9
                # (the trip family's written definition says only "NaN if none").
                "trip_initial_heading_deg": circular_mean(t.initial_bearings)[0],
                "trip_fixes": t.fixes,
            })
        return out

    def route(self, origin7: str, dest7: str, t_ms: int) -> dict[str, object]:
        w = self.world(t_ms)
        hour = (t_ms // HOUR_MS) % 24
        day = t_ms // DAY_MS
        durs = [c.duration_ms for c in w.completed
                if (c.origin7, c.dest7, c.hour) == (origin7, dest7, hour)
                and day - self.p.route_days < c.day <= day]
        if not durs:
            return {"route_trips": 0, "route_mean_duration_s": NAN,
                    "route_std_duration_s": NAN}
        mean = sum(durs) / len(durs)
        var = sum((d - mean) ** 2 for d in durs) / len(durs)
        return {"route_trips": len(durs), "route_mean_duration_s": mean / 1000,
                "route_std_duration_s": math.sqrt(var) / 1000}

    def trips(self, after_fixes: int) -> list[dict[str, object]]:
        """Rows of the per-trip training set, in no particular order."""
        full = run(self.ordered, self.p)
        rows = []
        for c in full.completed:
            if c.fixes < after_fixes:
                continue
            as_of = c.arrivals[after_fixes - 1]
            vec = self.vehicle(c.vehicle_id, as_of)
            cell = vec["vehicle_cell"]
            cvec = (self.cell(cell, as_of) if cell is not None
                    else {n: (0 if n in INT_NAMES else NAN) for n in CELL_NAMES})
            pk, dr = c.pickup, c.dropoff
            rows.append({
                "vehicle_id": c.vehicle_id,
                "trip_id": f"{c.vehicle_id}:{pk['event_ms']}",
                "pickup_ts": pk["event_ms"], "pickup_arrival_ts": pk["arrival_ms"],
                "as_of_ts": as_of, **vec, **cvec,
                "dropoff_ts": dr["event_ms"], "duration_s": c.duration_ms / 1000,
                "dest_cell": cell_at(dr["lat"], dr["lon"], self.p.cell_res),
                "dest_route_cell": c.dest7, "distance_m": c.distance_m,
            })
        return rows
