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
    rows = list(map(buckets.get, range(hi, hi - lengths[-1], -1)))  # by age 0, 1, ...
    for n in lengths:
        held = [v for v in rows[age:n] if v is not None]
        if held:
            fs, ps, ds = zip(*held, strict=True)
            f += sum(fs)
            p += sum(ps)
            d += sum(ds)
        age = max(age, n)
        out.append((f, p, d))
    return out


_LAYOUTS: dict[int, tuple[EngineConfig, tuple]] = {}


def _cell_layout(cfg: EngineConfig) -> tuple[list[int], list[tuple[str, int, int]], str, int]:
    """Per configuration: window lengths in buckets (ascending), (feature name, window index,
    column) in vector order, the ring feature's name and the ring window in buckets."""
    hit = _LAYOUTS.get(id(cfg))
    if hit is not None and hit[0] is cfg:
        return hit[1]  # type: ignore[return-value]
    windows = sorted(cfg.windows_min)
    names = [(f"cell_{kind}_{w}m", windows.index(w), col)
             for col, kind in ((1, "pickups"), (2, "dropoffs"), (0, "fixes"))
             for w in cfg.windows_min]
    layout = ([cfg.window_buckets(w) for w in windows], names,
              f"cell_ring_pickups_{cfg.ring_window_min}m",
              cfg.window_buckets(cfg.ring_window_min))
    if len(_LAYOUTS) > 64:
        _LAYOUTS.clear()
    _LAYOUTS[id(cfg)] = (cfg, layout)
    return layout


def cell_vector(cell: str, as_of_ms: int, raw: ReadResult, cfg: EngineConfig,
                ring_memo: dict[str, int] | None = None) -> dict[str, object]:
    """The cell family for one cell at T. ``raw`` must hold the cell's ring buckets and presence.
    ``ring_memo``: a dict shared by the cells of one read (at one T), so that a neighbour in
    several rings is summed once."""
    hi = as_of_ms // cfg.bucket_ms
    lengths, names, ring_name, rw = _cell_layout(cfg)
    cells = raw.cells
    sums = _window_sums(cells.get(cell, {}), hi, lengths)
    out: dict[str, object] = {name: sums[i][col] for name, i, col in names}
    vac, occ = raw.presence.get(cell, (0, 0))
    out["cell_vacant_now"] = vac
    out["cell_occupied_now"] = occ
    ring = ring_of(cell)
    ring_pickups = 0
    for c in ring:
        buckets = cells.get(c)
        if not buckets:  # a cell without counts adds nothing
            continue
        if ring_memo is None:
            ring_pickups += _window_sums(buckets, hi, (rw,))[0][1]
            continue
        n = ring_memo.get(c)
        if n is None:
            n = ring_memo[c] = _window_sums(buckets, hi, (rw,))[0][1]
        ring_pickups += n
    out[ring_name] = ring_pickups
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
