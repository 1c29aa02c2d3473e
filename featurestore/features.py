"""Feature definitions as pure functions: raw store values at time T -> vector values.

The single definition of every feature; live serving, replay and training sets all call these.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

from featurestore.cells import ring_of
from featurestore.config import EngineConfig
from featurestore.geometry import circular_mean_deg, haversine_m
from featurestore.state import VehicleState
from featurestore.store import ReadResult, RouteKey
from featurestore.transitions import DAY_MS

NAN = float("nan")


def bucket_range(as_of_ms: int, cfg: EngineConfig) -> tuple[int, int]:
    """Buckets a cell vector at T reads: the longest window ending with T's bucket."""
    hi = as_of_ms // cfg.bucket_ms
    return hi - cfg.longest_window_buckets + 1, hi


def day_range(as_of_ms: int, cfg: EngineConfig) -> tuple[int, int]:
    """Days of dropoff arrival a route vector at T reads."""
    hi = as_of_ms // DAY_MS
    return hi - cfg.route_days + 1, hi


def presence_min_event_ms(as_of_ms: int, cfg: EngineConfig) -> int:
    return as_of_ms - cfg.now_horizon_ms


def live_vehicle(state: VehicleState | None, as_of_ms: int, cfg: EngineConfig
                 ) -> VehicleState | None:
    """The state as known at T, or None when absent or logically expired by T."""
    if state is None or as_of_ms - state.seen_ms > cfg.vehicle_ttl_ms:
        return None
    return state


def _window_sums(buckets: dict[int, Sequence[int]], hi: int, lengths: Sequence[int]
                 ) -> list[tuple[int, int, int]]:
    """Per window length n (ascending): (fixes, pickups, dropoffs) over buckets hi-n+1 .. hi.

    Integer sums, so the order of addition does not matter: where few buckets hold counts
    (most cells of a lookup's rings), those are walked instead of every bucket of the windows.
    """
    if not buckets:
        return [(0, 0, 0)] * len(lengths)
    if 2 * len(buckets) < lengths[-1]:
        sums = [[0, 0, 0] for _ in lengths]
        for b, v in buckets.items():
            age = hi - b
            if age < 0:
                continue
            for k, n in enumerate(lengths):
                if age < n:  # in this window and every longer one
                    for row in sums[k:]:
                        row[0] += v[0]
                        row[1] += v[1]
                        row[2] += v[2]
                    break
        return [(f, p, d) for f, p, d in sums]
    out: list[tuple[int, int, int]] = []
    f = p = d = 0
    age = 0
    get = buckets.get
    for n in lengths:
        while age < n:
            v = get(hi - age)
            if v is not None:
                f += v[0]
                p += v[1]
                d += v[2]
            age += 1
        out.append((f, p, d))
    return out


def cell_vector(cell: str, as_of_ms: int, raw: ReadResult, cfg: EngineConfig
                ) -> dict[str, object]:
    """The cell family for one cell at T. ``raw`` must hold the cell's ring buckets and presence."""
    hi = as_of_ms // cfg.bucket_ms
    windows = sorted(cfg.windows_min)
    sums = dict(zip(windows, _window_sums(raw.cells.get(cell, {}), hi,
                                          [cfg.window_buckets(w) for w in windows]),
                    strict=True))
    out: dict[str, object] = {}
    for col, kind in ((1, "pickups"), (2, "dropoffs"), (0, "fixes")):
        for w in cfg.windows_min:
            out[f"cell_{kind}_{w}m"] = sums[w][col]
    vac, occ = raw.presence.get(cell, (0, 0))
    out["cell_vacant_now"] = vac
    out["cell_occupied_now"] = occ
    ring = ring_of(cell)
    rw = [cfg.window_buckets(cfg.ring_window_min)]
    out[f"cell_ring_pickups_{cfg.ring_window_min}m"] = sum(
        _window_sums(raw.cells.get(c, {}), hi, rw)[0][1] for c in ring
    )
    out["cell_ring_vacant_now"] = sum(raw.presence.get(c, (0, 0))[0] for c in ring)
    return out


def vehicle_vector(state: VehicleState | None, as_of_ms: int, cfg: EngineConfig
                   ) -> dict[str, object]:
    """The vehicle and trip families for one vehicle at T."""
    st = live_vehicle(state, as_of_ms, cfg)
    if st is None:
        return {
            "vehicle_cell": None, "vehicle_status": None, "vehicle_fix_age_s": NAN,
            "vehicle_speed_mps": NAN, "vehicle_heading_deg": NAN, "vehicle_heading_r": NAN,
            **_no_trip(),
        }
    heading, r = circular_mean_deg(st.bearings)
    out: dict[str, object] = {
        "vehicle_cell": st.cell,
        "vehicle_status": st.status,
        "vehicle_fix_age_s": (as_of_ms - st.event_ms) / 1000.0,
        "vehicle_speed_mps": st.speed_mps,
        "vehicle_heading_deg": heading,
        "vehicle_heading_r": r,
    }
    trip = st.trip
    if trip is None:
        out.update(_no_trip())
        return out
    initial, _ = circular_mean_deg(trip.initial_bearings)
    out.update({
        "trip_active": 1,
        "trip_elapsed_s": (as_of_ms - trip.pickup_event_ms) / 1000.0,
        "trip_distance_m": trip.distance_m,
        "trip_displacement_m": haversine_m(trip.pickup_lat, trip.pickup_lon, st.lat, st.lon,
                                           cfg.earth_radius_m),
        "trip_start_cell": trip.start_cell,
        "trip_initial_heading_deg": initial,
        "trip_fixes": trip.fixes,
    })
    return out


def _no_trip() -> dict[str, object]:
    return {
        "trip_active": 0, "trip_elapsed_s": NAN, "trip_distance_m": NAN,
        "trip_displacement_m": NAN, "trip_start_cell": None, "trip_initial_heading_deg": NAN,
        "trip_fixes": 0,
    }


def route_vector(key: RouteKey, raw: ReadResult) -> dict[str, object]:
    """The route family from exact integer sums of durations (ms)."""
    n, s1, s2 = raw.routes.get(key, (0, 0, 0))
    if n == 0:
        return {"route_trips": 0, "route_mean_duration_s": NAN, "route_std_duration_s": NAN}
    var_num = max(0, n * s2 - s1 * s1)  # n^2 * variance, exact in integers
    return {
        "route_trips": n,
        "route_mean_duration_s": s1 / n / 1000.0,
        "route_std_duration_s": math.sqrt(var_num) / n / 1000.0,
    }
