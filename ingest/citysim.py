"""Port Veyra: a seeded generator of one recorded day of taxi fixes in a fictional coastal city.

Everything here is invented demo data: the city, its coastline, its landmarks and its traffic.
Port Veyra sits in the open South Atlantic (station at -33.20, -20.60) so it cannot be taken for
a real place. The sea lies to the east of ``COASTLINE``; no fix is ever placed in it.

How a vehicle lives: it starts its shift vacant, cruises towards hotspots whose pickup weight
depends on the hour (suburbs in the morning rush, station and centre in the evening rush, the
airport all day, old town and beach in the evening), is hailed there with a probability that
follows the city's demand, drives occupied to a destination chosen by origin and hour, drops
off and cruises again. Shifts last 8-11 h, are staggered over the day, include a break, and
end with one ``offline`` fix. Legs are straight-ish polylines with gentle turns, driven at
8-14 m/s (about x0.55 at rush hours) with short stop-and-go halts.

The stream then gets the faults a real fleet sends: network delay (lognormal, 0.2-3 s), late
fixes (10-600 s, log-uniform), duplicates, out-of-order deliveries, device clocks far ahead
and broken messages of ten kinds. All randomness comes from ``np.random.default_rng``; the same
config gives byte-identical output.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import date, datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np

CITY_NAME = "Port Veyra"

# --- the local frame: metres east (x) and north (y) of the central station ---------------------
_LAT0 = -33.20
_LON0 = -20.60
# Metres per degree on a sphere of the mean Earth radius 6,371,008.8 m (2*pi*R/360); an
# equirectangular frame is plenty for an invented 14 km city.
_M_PER_DEG_LAT = 6_371_008.8 * math.pi / 180.0
_M_PER_DEG_LON = _M_PER_DEG_LAT * math.cos(math.radians(_LAT0))

# Coastline in the local frame, south to north: (y, x) in metres. Land is west of it.
_COAST_Y = np.array([-6600.0, -4500.0, -2500.0, -800.0, 800.0, 2200.0, 4000.0, 6600.0])
_COAST_X = np.array([3700.0, 4200.0, 4650.0, 4700.0, 4250.0, 3950.0, 4350.0, 4950.0])
_X_MIN, _Y_MIN, _Y_MAX = -9800.0, -6200.0, 6200.0
_X_MAX = float(_COAST_X.max())
_INNER = 200.0  # how far inside the bounding box and the coast every waypoint stays, metres
_GUARD = 60.0  # how far inside the coast every fix stays before GPS noise, metres
_GPS_NOISE_M = 4.0  # gaussian GPS noise, standard deviation per axis, metres


def _to_lat(y: Any) -> Any:
    return _LAT0 + np.asarray(y) / _M_PER_DEG_LAT


def _to_lon(x: Any) -> Any:
    return _LON0 + np.asarray(x) / _M_PER_DEG_LON


def _coast_x(y: Any) -> Any:
    return np.interp(y, _COAST_Y, _COAST_X)


COASTLINE: tuple[tuple[float, float], ...] = tuple(
    (round(float(_to_lat(y)), 7), round(float(_to_lon(x)), 7))
    for y, x in zip(_COAST_Y, _COAST_X, strict=True)
)
"""The coast as (lat, lon) vertices from south to north; the sea is east of this line."""

BBOX: tuple[float, float, float, float] = (
    round(float(_to_lat(_Y_MIN)), 7),
    round(float(_to_lat(_Y_MAX)), 7),
    round(float(_to_lon(_X_MIN)), 7),
    round(float(_to_lon(_X_MAX)), 7),
)
"""The city's bounding box: (lat_min, lat_max, lon_min, lon_max)."""


def on_land(lat: Any, lon: Any) -> Any:
    """True where (lat, lon) lies inside the bounding box and west of the coastline.

    Accepts floats or arrays; returns a bool or a bool array.
    """
    y = (np.asarray(lat, dtype=float) - _LAT0) * _M_PER_DEG_LAT
    x = (np.asarray(lon, dtype=float) - _LON0) * _M_PER_DEG_LON
    inside = (y >= _Y_MIN) & (y <= _Y_MAX) & (x >= _X_MIN) & (x < _coast_x(y))
    return bool(inside) if np.ndim(inside) == 0 else inside


# --- landmarks -------------------------------------------------------------------------------
# name: (x, y, kind, spread in metres of pickup and drop-off points around it)
_BEACH_Y = -1500.0
_PLACE_DEFS: tuple[tuple[str, float, float, str, float], ...] = (
    ("station", 0.0, 0.0, "station", 60.0),
    ("old_town", 1500.0, 700.0, "old_town", 300.0),
    ("center", 800.0, -1000.0, "center", 400.0),
    ("airport", -8450.0, -3100.0, "airport", 120.0),  # 9.0 km from the station, bearing 250
    ("beach", float(_coast_x(_BEACH_Y)) - 280.0, _BEACH_Y, "beach", 0.0),
    ("suburb_north", -600.0, 4900.0, "suburb", 900.0),
    ("suburb_northwest", -4600.0, 3400.0, "suburb", 900.0),
    ("suburb_west", -5300.0, -300.0, "suburb", 900.0),
    ("suburb_southwest", -3400.0, -4400.0, "suburb", 900.0),
    ("suburb_south", 600.0, -4900.0, "suburb", 900.0),
)
_BEACH_HALF_LEN = 2600.0  # the beach strip runs this far north and south of the beach landmark

PLACES: dict[str, tuple[float, float]] = {
    name: (round(float(_to_lat(y)), 7), round(float(_to_lon(x)), 7))
    for name, x, y, _kind, _spread in _PLACE_DEFS
}
"""Landmarks of Port Veyra: name -> (lat, lon)."""

_PX = np.array([p[1] for p in _PLACE_DEFS])
_PY = np.array([p[2] for p in _PLACE_DEFS])
_KIND = [p[3] for p in _PLACE_DEFS]
_SPREAD = [p[4] for p in _PLACE_DEFS]
_NP = len(_PLACE_DEFS)
_SUBURBS = [i for i, k in enumerate(_KIND) if k == "suburb"]
_KIND_MASK = {k: np.array([kk == k for kk in _KIND]) for k in set(_KIND)}

# --- statuses, anomaly kinds -----------------------------------------------------------------
STATUSES = ("vacant", "occupied", "offline")
_VACANT, _OCCUPIED, _OFFLINE = 0, 1, 2
BROKEN_KINDS = (
    "truncated",
    "not_json",
    "json_array",
    "missing_vehicle_id",
    "lat_out_of_range",
    "lon_out_of_range",
    "unknown_status",
    "negative_speed",
    "garbage_event_ts",
    "bool_for_number",
)
_NOT_OBJECT = (0, 1, 2)  # broken kinds whose record is not a JSON object
_K_NORMAL, _K_LATE, _K_OOO, _K_FUTURE, _K_DUP, _K_BROKEN = range(6)
_FUTURE_AHEAD_MS = 120_000  # a fast device clock: event_ts this far after arrival_ts
_NO_SPEED_SHARE = 0.05  # share of vehicles whose device reports no speed
_TRIP_ID_SHARE = 0.70  # share of trips whose fixes carry a trip_id
_CHUNK_ROWS = 65_536


@dataclass(frozen=True)
class CityConfig:
    """What to simulate: fleet size, date, fix interval and the shares of injected faults."""

    seed: int = 7
    vehicles: int = 200
    day: str = "2026-06-01"  # the date simulated, in UTC (00:00-24:00)
    fix_interval_s: float = 15.0
    late_share: float = 0.01
    duplicate_share: float = 0.005
    out_of_order_share: float = 0.005
    broken_share: float = 0.002
    future_share: float = 0.001
    hours: float = 24.0  # length of the simulated span from 00:00 (smaller for fast tests)

    def __post_init__(self) -> None:
        problems = []
        if self.vehicles < 0 or self.vehicles > 9999:
            problems.append("vehicles must be 0..9999")
        if not self.fix_interval_s >= 1.0:
            problems.append("fix_interval_s must be >= 1")
        if not 0.0 < self.hours <= 24.0:
            problems.append("hours must be in (0, 24]")
        shares = (self.late_share, self.duplicate_share, self.out_of_order_share,
                  self.broken_share, self.future_share)
        if any(not 0.0 <= s <= 1.0 for s in shares) or sum(shares) > 1.0:
            problems.append("each share must be in [0, 1] and together at most 1")
        try:
            date.fromisoformat(self.day)
        except (TypeError, ValueError):
            problems.append(f"day {self.day!r} is not an ISO date (YYYY-MM-DD)")
        if problems:
            raise ValueError("invalid city configuration: " + "; ".join(problems))

    @property
    def day_start_ms(self) -> int:
        """Epoch milliseconds of 00:00 UTC on ``day``."""
        d = date.fromisoformat(self.day)
        return int(datetime(d.year, d.month, d.day, tzinfo=timezone.utc).timestamp()) * 1000


def vehicle_name(index: int) -> str:
    """The id of the vehicle with 0-based ``index``: veh-0001, veh-0002, ..."""
    return f"veh-{index + 1:04d}"


# --- the hourly rhythm -----------------------------------------------------------------------
def _bump(h: float, centre: float, width: float) -> float:
    d = (h - centre + 12.0) % 24.0 - 12.0
    return math.exp(-0.5 * (d / width) ** 2)


def _activity(h: float) -> float:
    """City-wide activity: about 0.15 in the small hours, near 1 by day."""
    return 0.15 + 0.85 * (1.0 - _bump(h, 3.5, 2.0))


def _pickup_weights(h: float) -> np.ndarray:
    """Relative hail rate at each place at hour ``h``."""
    a = _activity(h)
    by_kind = {
        "suburb": (0.25 + 2.2 * _bump(h, 8.0, 1.0) + 0.3 * _bump(h, 13.0, 3.0)) * a,
        "station": (0.4 + 0.6 * _bump(h, 8.0, 1.2) + 2.2 * _bump(h, 18.0, 1.0)) * a,
        "center": (0.4 + 0.8 * _bump(h, 13.0, 2.5) + 1.4 * _bump(h, 18.0, 1.1)) * a,
        "old_town": (0.3 + 0.4 * _bump(h, 13.0, 3.0) + 1.8 * _bump(h, 21.5, 2.0)) * a,
        "beach": (0.15 + 0.8 * _bump(h, 15.0, 2.5) + 1.2 * _bump(h, 19.5, 1.5)) * a,
        "airport": 1.0 * (0.4 + 0.6 * a),
    }
    return np.array([by_kind[k] for k in _KIND])


def _dest_weights(origin: int, h: float) -> np.ndarray:
    """Relative choice of destination place for a trip starting at place ``origin``."""
    m = _bump(h, 8.0, 1.5)  # morning commute
    e = _bump(h, 18.0, 1.5)  # evening commute
    n = _bump(h, 22.0, 2.5)  # night life
    base = {"station": 1.0, "center": 1.2, "old_town": 0.8, "airport": 0.35, "beach": 0.5,
            "suburb": 0.6}
    w = np.array([base[k] for k in _KIND])
    ok = _KIND[origin]
    sub = _KIND_MASK["suburb"]
    if ok == "suburb":
        w += m * (4.0 * _KIND_MASK["station"] + 4.0 * _KIND_MASK["center"]
                  + 1.0 * _KIND_MASK["old_town"])
    elif ok in ("station", "center"):
        w += e * 3.0 * sub + n * 1.5 * _KIND_MASK["old_town"]
    elif ok == "airport":
        w += (_KIND_MASK["center"] + _KIND_MASK["station"] + 0.5 * _KIND_MASK["old_town"]
              + 0.5 * sub)
    else:  # old town, beach
        w += n * 2.5 * sub + e * 1.0 * sub
    w[origin] *= 0.15
    return w


def _rush(h: float) -> float:
    """Traffic speed factor: 1 in free flow, about 0.55 at the rush peaks, a bit faster at night."""
    r = 1.0 - 0.45 * _bump(h, 8.0, 0.9) - 0.42 * _bump(h, 18.0, 0.9)
    return r * (1.0 + 0.08 * _bump(h, 3.0, 2.5))


_Q = 96  # the rhythm is tabulated per quarter hour
_PICK_CUM = np.array([np.cumsum(_pickup_weights(q / 4)) for q in range(_Q)])
_DEMAND = _PICK_CUM[:, -1]
_HAIL_P = np.clip(0.1 + 0.85 * _DEMAND / _DEMAND.max(), 0.1, 0.95)
_DEST_CUM = np.array(
    [[np.cumsum(_dest_weights(o, q / 4)) for o in range(_NP)] for q in range(_Q)]
)
_RUSH = np.array([_rush(q / 4) for q in range(_Q)])


def _quarter(t: float) -> int:
    return int(t // 900.0) % _Q


def _pick(cum: np.ndarray, u: float) -> int:
    return min(int(np.searchsorted(cum, u * cum[-1], side="right")), len(cum) - 1)


# --- movement --------------------------------------------------------------------------------
def _clip_land(x: np.ndarray, y: np.ndarray, margin: float) -> tuple[np.ndarray, np.ndarray]:
    y = np.clip(y, _Y_MIN + margin, _Y_MAX - margin)
    x = np.minimum(np.maximum(x, _X_MIN + margin), _coast_x(y) - margin)
    return x, y


def _place_point(rng: np.random.Generator, j: int) -> tuple[float, float]:
    """A pickup or drop-off point at place ``j``."""
    if _KIND[j] == "beach":
        y = float(np.clip(_PY[j] + rng.uniform(-_BEACH_HALF_LEN, _BEACH_HALF_LEN),
                          _Y_MIN + _INNER, _Y_MAX - _INNER))
        return float(_coast_x(y)) - rng.uniform(180.0, 450.0), y
    s = _SPREAD[j]
    x, y = _clip_land(np.array([_PX[j] + rng.normal(0.0, s)]),
                      np.array([_PY[j] + rng.normal(0.0, s)]), _INNER)
    return float(x[0]), float(y[0])


class _Track:
    """A vehicle's piecewise-linear path: vertices with durations and per-segment attributes."""

    def __init__(self, t0: float, x0: float, y0: float) -> None:
        self.t0 = t0
        self.t = t0
        self.x = x0
        self.y = y0
        self.x0 = x0
        self.y0 = y0
        self.dt: list[np.ndarray] = []
        self.xs: list[np.ndarray] = []
        self.ys: list[np.ndarray] = []
        self.speed: list[np.ndarray] = []
        self.status: list[np.ndarray] = []
        self.trip: list[np.ndarray] = []

    def add(self, dt: np.ndarray, xs: np.ndarray, ys: np.ndarray, speed: np.ndarray,
            status: int, trip: int) -> None:
        self.dt.append(dt)
        self.xs.append(xs)
        self.ys.append(ys)
        self.speed.append(speed)
        n = len(dt)
        self.status.append(np.full(n, status, dtype=np.int8))
        self.trip.append(np.full(n, trip, dtype=np.int32))
        self.t += float(dt.sum())
        self.x = float(xs[-1])
        self.y = float(ys[-1])

    def stay(self, seconds: float, status: int, trip: int = -1) -> None:
        self.add(np.array([seconds]), np.array([self.x]), np.array([self.y]), np.zeros(1),
                 status, trip)

    def drive(self, rng: np.random.Generator, x1: float, y1: float, status: int, trip: int,
              pace: float = 1.0) -> bool:
        """Drive to (x1, y1) along a straight-ish polyline; False when already there."""
        x0, y0 = self.x, self.y
        dx, dy = x1 - x0, y1 - y0
        d = math.hypot(dx, dy)
        if d < 25.0:
            return False
        k = min(4, 1 + int(d // 1800.0))
        f = np.sort((np.arange(1, k + 1) + rng.uniform(-0.25, 0.25, k)) / (k + 1))
        off = rng.normal(0.0, 0.06 * d, k)  # sideways offsets: gentle turns
        ux, uy = dx / d, dy / d
        px = np.concatenate(([x0], x0 + f * dx - off * uy, [x1]))
        py = np.concatenate(([y0], y0 + f * dy + off * ux, [y1]))
        px[1:-1], py[1:-1] = _clip_land(px[1:-1], py[1:-1], _INNER)
        ex, ey = np.diff(px), np.diff(py)
        el = np.hypot(ex, ey)
        n = np.maximum(1, np.ceil(el / 350.0)).astype(np.int64)
        edge = np.repeat(np.arange(len(el)), n)
        step = np.arange(int(n.sum())) - np.repeat(np.cumsum(n) - n, n) + 1
        fr = step / n[edge]
        vx = px[edge] + fr * ex[edge]
        vy = py[edge] + fr * ey[edge]
        seglen = el[edge] / n[edge]
        m = len(vx)
        r = float(_RUSH[_quarter(self.t)])
        v = rng.uniform(8.0, 14.0) * pace * r * rng.uniform(0.75, 1.15, m)
        move_dt = np.maximum(seglen / v, 0.5)
        jam = (1.0 - min(r, 1.0)) / 0.45  # 0 in free flow, about 1 at the rush peak
        stop = rng.random(m) < 0.12 + 0.25 * jam
        stop[0] = False
        dwell = rng.uniform(4.0, 30.0 + 15.0 * jam, m)
        # interleave: before sub-segment i an optional halt at its start point, then the move
        sx = np.concatenate(([x0], vx[:-1]))
        sy = np.concatenate(([y0], vy[:-1]))
        keep = np.column_stack((stop, np.ones(m, dtype=bool))).ravel()
        dts = np.column_stack((dwell, move_dt)).ravel()[keep]
        xs = np.column_stack((sx, vx)).ravel()[keep]
        ys = np.column_stack((sy, vy)).ravel()[keep]
        sp = np.column_stack((np.zeros(m), seglen / move_dt)).ravel()[keep]
        self.add(dts, xs, ys, sp, status, trip)
        return True

    def arrays(self) -> tuple[np.ndarray, ...]:
        t = self.t0 + np.concatenate(([0.0], np.cumsum(np.concatenate(self.dt))))
        x = np.concatenate(([self.x0], *self.xs))
        y = np.concatenate(([self.y0], *self.ys))
        return (t, x, y, np.concatenate(self.speed), np.concatenate(self.status),
                np.concatenate(self.trip))


def _shifts(rng: np.random.Generator) -> list[tuple[float, float, float | None, float]]:
    """A vehicle's shifts as (start_s, end_s, break_at_s or None, break_len_s) from 00:00."""
    kind = rng.choice(4, p=[0.20, 0.38, 0.17, 0.25])
    start_h = (rng.uniform(19.0, 23.0), rng.uniform(5.0, 7.0), rng.uniform(9.5, 12.0),
               rng.uniform(14.0, 16.5))[kind]
    length = rng.uniform(8.0, 11.0) * 3600.0
    has_break = rng.random() < 0.75
    brk_frac = rng.uniform(0.4, 0.6)
    brk_len = rng.uniform(15.0, 40.0) * 60.0
    starts = [start_h * 3600.0]
    if kind == 0:  # a night shift: the one that began yesterday evening, then tonight's
        starts = [start_h * 3600.0 - 86400.0, start_h * 3600.0]
    total = length + (brk_len if has_break else 0.0)  # the break does not shorten the work
    return [(s, s + total, s + brk_frac * length if has_break else None, brk_len)
            for s in starts]


def _run_shift(rng: np.random.Generator, t0: float, t_end: float, stop_at: float,
               x0: float, y0: float, break_at: float | None, break_len: float,
               trips: list[bool]) -> _Track:
    """Simulate one shift from t0; trips gets one entry per trip (does it carry a trip_id)."""
    tr = _Track(t0, x0, y0)
    limit = min(t_end, stop_at)
    while tr.t < limit:
        if break_at is not None and tr.t >= break_at:
            tr.stay(break_len, _OFFLINE)
            break_at = None
            continue
        q = _quarter(tr.t)
        w = np.diff(_PICK_CUM[q], prepend=0.0) * np.exp(
            -np.hypot(_PX - tr.x, _PY - tr.y) / 3500.0)
        j = _pick(np.cumsum(w), rng.random())
        px, py = _place_point(rng, j)
        if not tr.drive(rng, px, py, _VACANT, -1, pace=0.85):
            tr.stay(rng.uniform(20.0, 60.0), _VACANT)
        if tr.t >= stop_at:
            break
        q = _quarter(tr.t)
        if rng.random() >= _HAIL_P[q]:
            if rng.random() < 0.35:  # wait at the kerb a while before cruising on
                tr.stay(rng.uniform(60.0, 420.0), _VACANT)
            continue
        tr.stay(rng.uniform(15.0, 90.0), _VACANT)  # the passenger gets in
        trip = len(trips)
        trips.append(bool(rng.random() < _TRIP_ID_SHARE))
        k = _pick(_DEST_CUM[q, j], rng.random())
        dx, dy = _place_point(rng, k)
        if not tr.drive(rng, dx, dy, _OCCUPIED, trip):
            tr.stay(rng.uniform(60.0, 180.0), _OCCUPIED, trip)
        tr.stay(rng.uniform(10.0, 45.0), _OCCUPIED, trip)  # pays and gets out
    tr.stay(1e7, _OFFLINE)  # end of shift: offline from here on
    return tr


def _vehicle_rows(cfg: CityConfig, index: int) -> dict[str, np.ndarray] | None:
    """All rows (fixes, their faults and duplicates) of one vehicle, unsorted."""
    rng = np.random.default_rng([cfg.seed, index])
    span = cfg.hours * 3600.0
    iv = cfg.fix_interval_s
    speed_sensor = rng.random() >= _NO_SPEED_SHARE
    home = _SUBURBS[int(rng.integers(len(_SUBURBS)))]
    x, y = _place_point(rng, home)
    phase = rng.uniform(0.0, iv)
    trips: list[bool] = []
    parts = []
    for start, end, brk, brk_len in _shifts(rng):
        if start >= span or end <= 0.0:
            continue
        t0 = max(start, 0.0)
        tr = _run_shift(rng, t0, end, span + 2 * iv, x, y, brk, brk_len, trips)
        x, y = tr.x, tr.y
        t, vx, vy, sp, st, tp = tr.arrays()
        n = int((t[-2] - t0 - phase) // iv) + 2
        tf = t0 + phase + iv * np.arange(n) + rng.uniform(-0.05, 0.05, n)
        tf = tf[(tf >= t0) & (tf < span)]
        seg = np.clip(np.searchsorted(t, tf, side="right") - 1, 0, len(sp) - 1)
        fs = st[seg]
        off = fs == _OFFLINE
        keep = ~off | ~np.concatenate(([False], off[:-1]))  # one offline fix per pause
        tf, seg, fs = tf[keep], seg[keep], fs[keep]
        fx, fy = np.interp(tf, t, vx), np.interp(tf, t, vy)
        fx, fy = _clip_land(fx, fy, _GUARD)
        m = len(tf)
        fx = fx + rng.normal(0.0, _GPS_NOISE_M, m)
        fy = fy + rng.normal(0.0, _GPS_NOISE_M, m)
        true_v = sp[seg]
        dev_v = np.where(true_v > 0.0,
                         true_v * (1.0 + rng.normal(0.0, 0.06, m)) + rng.normal(0.0, 0.25, m),
                         np.abs(rng.normal(0.0, 0.1, m)))
        dev_v = np.round(np.maximum(dev_v, 0.0), 2)
        if not speed_sensor:
            dev_v = np.full(m, np.nan)
        parts.append((tf, fx, fy, fs, dev_v, tp[seg]))
    if not parts:
        return None
    tf, fx, fy, fs, dev_v, trip = (np.concatenate(c) for c in zip(*parts, strict=True))
    n = len(tf)
    trip_keep = np.array(trips + [False], dtype=bool)  # index -1 -> False
    trip = np.where((trip >= 0) & trip_keep[trip], trip, -1).astype(np.int32)

    # --- faults ---
    u = rng.random(n)
    edges = np.cumsum([cfg.broken_share, cfg.future_share, cfg.late_share,
                       cfg.out_of_order_share, cfg.duplicate_share])
    kind = np.full(n, _K_NORMAL, dtype=np.int8)
    kind[u < edges[3]] = _K_OOO
    kind[u < edges[2]] = _K_LATE
    kind[u < edges[1]] = _K_FUTURE
    kind[u < edges[0]] = _K_BROKEN
    dup = (u >= edges[3]) & (u < edges[4])
    delay = np.clip(0.2 + rng.lognormal(math.log(0.5), 0.6, n), 0.2, 3.0)
    late_delay = np.exp(rng.uniform(math.log(10.0), math.log(600.0), n))
    ooo_delay = rng.uniform(20.0, 90.0, n)
    delay = np.where(kind == _K_LATE, late_delay, np.where(kind == _K_OOO, ooo_delay, delay))
    bkind = rng.integers(0, len(BROKEN_KINDS), n).astype(np.int8)
    aux = rng.random(n)
    dup_gap = rng.uniform(0.1, 5.0, n)

    ev_ms = cfg.day_start_ms + np.rint(tf * 1000.0).astype(np.int64)
    arr_ms = ev_ms + np.rint(delay * 1000.0).astype(np.int64)
    ev_ms = np.where(kind == _K_FUTURE, arr_ms + _FUTURE_AHEAD_MS, ev_ms)
    bkind = np.where(kind == _K_BROKEN, bkind, -1).astype(np.int8)
    rows = {
        "veh": np.full(n, index, dtype=np.int32),
        "ev_ms": ev_ms,
        "arr_ms": arr_ms,
        "lat": np.rint(_to_lat(fy) * 1e7) / 1e7,
        "lon": np.rint(_to_lon(fx) * 1e7) / 1e7,
        "status": fs.astype(np.int8),
        "speed": dev_v,
        "trip": trip,
        "kind": kind,
        "bkind": bkind,
        "aux": aux,
    }
    if dup.any():
        copy = {k: v[dup] for k, v in rows.items()}
        copy["arr_ms"] = copy["arr_ms"] + np.rint(dup_gap[dup] * 1000.0).astype(np.int64)
        copy["kind"] = np.full(int(dup.sum()), _K_DUP, dtype=np.int8)
        rows = {k: np.concatenate((rows[k], copy[k])) for k in rows}
    return rows


def _all_rows(cfg: CityConfig) -> dict[str, np.ndarray]:
    """Every row of the day, sorted by arrival (ties in a fixed order)."""
    per = [r for r in (_vehicle_rows(cfg, i) for i in range(cfg.vehicles)) if r is not None]
    if not per:
        return _vehicle_rows_empty()
    rows = {k: np.concatenate([p[k] for p in per]) for k in per[0]}
    order = np.lexsort((np.arange(len(rows["arr_ms"])), rows["arr_ms"]))
    return {k: v[order] for k, v in rows.items()}


def _vehicle_rows_empty() -> dict[str, np.ndarray]:
    dtypes = {"veh": np.int32, "ev_ms": np.int64, "arr_ms": np.int64, "lat": float,
              "lon": float, "status": np.int8, "speed": float, "trip": np.int32,
              "kind": np.int8, "bkind": np.int8, "aux": float}
    return {k: np.empty(0, dtype=d) for k, d in dtypes.items()}


# --- records ---------------------------------------------------------------------------------
def _trip_name(veh: int, trip: int) -> str:
    return f"T-{vehicle_name(veh)}-{trip + 1}"


def _base_fields(veh: int, ev_ms: int, arr_ms: int, lat: float, lon: float, status: int,
                 speed: float, trip: int) -> dict[str, Any]:
    out: dict[str, Any] = {"vehicle_id": vehicle_name(veh), "event_ts": ev_ms / 1000.0,
                           "lat": lat, "lon": lon, "status": STATUSES[status]}
    if not math.isnan(speed):
        out["speed_mps"] = speed
    if trip >= 0:
        out["trip_id"] = _trip_name(veh, trip)
    out["arrival_ts"] = arr_ms / 1000.0
    return out


_FLOAT_FORMAT = {"event_ts": "{:.3f}", "arrival_ts": "{:.3f}", "lat": "{:.7f}",
                 "lon": "{:.7f}", "speed_mps": "{:.2f}"}


def _json_value(key: str, v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return _FLOAT_FORMAT.get(key, "{!r}").format(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    raise TypeError(f"no JSON form for {type(v).__name__}")


def _json_object(fields: dict[str, Any]) -> str:
    return "{" + ",".join(f'"{k}":{_json_value(k, v)}' for k, v in fields.items()) + "}"


_GARBAGE_TS = ("soon", "2026-13-45T99:00", "", "NaN", "0x1f")
_GZIP_LIKE = b"\x1f\x8b\x08\x00\x00\x00\x00\x00\x00\x03\xab\xd6\xe5\x02\x00\xff\xfe"


def _broken(bkind: int, aux: float, fields: dict[str, Any]) -> bytes | dict[str, Any]:
    """The broken form of a fix: raw bytes, or an object with bad content (keeps arrival_ts)."""
    name = BROKEN_KINDS[bkind]
    f = dict(fields)
    if name == "truncated":
        text = _json_object(f)
        return text[: 1 + int(aux * (len(text) - 2))].encode()
    if name == "not_json":
        variant = int(aux * 4)
        if variant == 0:
            return (f"{f['vehicle_id']};{f['event_ts']:.3f};{f['lat']:.7f};{f['lon']:.7f};"
                    f"{f['status']}").encode()
        if variant == 1:
            return _GZIP_LIKE
        if variant == 2:
            return (f'<fix vehicle="{f["vehicle_id"]}" lat="{f["lat"]:.7f}" '
                    f'lon="{f["lon"]:.7f}"/>').encode()
        return b"ERROR modem reset, buffer lost"
    if name == "json_array":
        return (f'["{f["vehicle_id"]}",{f["event_ts"]:.3f},{f["lat"]:.7f},{f["lon"]:.7f},'
                f'"{f["status"]}"]').encode()
    if name == "missing_vehicle_id":
        del f["vehicle_id"]
    elif name == "lat_out_of_range":
        f["lat"] = 123.4 if aux < 0.5 else -91.5
    elif name == "lon_out_of_range":
        f["lon"] = 200.5 if aux < 0.5 else -180.75
    elif name == "unknown_status":
        f["status"] = "parked"
    elif name == "negative_speed":
        f["speed_mps"] = -round(0.5 + aux * 9.5, 2)
        if "trip_id" in f:  # keep the key order of a normal record
            f["trip_id"] = f.pop("trip_id")
        f["arrival_ts"] = f.pop("arrival_ts")
    elif name == "garbage_event_ts":
        f["event_ts"] = _GARBAGE_TS[int(aux * len(_GARBAGE_TS))]
    else:  # bool_for_number, in a required field so that the Parquet null is rejected too
        f[("lat", "lon", "event_ts")[int(aux * 3)]] = bool(int(aux * 6) % 2)
    return f


def _chunks(cfg: CityConfig) -> Iterator[dict[str, np.ndarray]]:
    rows = _all_rows(cfg)
    n = len(rows["arr_ms"])
    for lo in range(0, n, _CHUNK_ROWS):
        yield {k: v[lo: lo + _CHUNK_ROWS] for k, v in rows.items()}


def _format_chunk(c: dict[str, np.ndarray]) -> list[bytes]:
    names = [vehicle_name(i) for i in range(int(c["veh"].max()) + 1)] if len(c["veh"]) else []
    out: list[bytes] = []
    cols = [c[k].tolist() for k in ("veh", "ev_ms", "arr_ms", "lat", "lon", "status", "speed",
                                    "trip", "bkind", "aux")]
    for veh, ev, arr, lat, lon, st, sp, tp, bk, aux in zip(*cols, strict=True):
        if bk >= 0:
            b = _broken(bk, aux, _base_fields(veh, ev, arr, lat, lon, st, sp, tp))
            out.append(b if isinstance(b, bytes) else _json_object(b).encode())
            continue
        vid = names[veh]
        s = (f'{{"vehicle_id":"{vid}","event_ts":{ev / 1000:.3f},"lat":{lat:.7f},'
             f'"lon":{lon:.7f},"status":"{STATUSES[st]}"')
        if sp == sp:  # not NaN
            s += f',"speed_mps":{sp:.2f}'
        if tp >= 0:
            s += f',"trip_id":"T-{vid}-{tp + 1}"'
        out.append((s + f',"arrival_ts":{arr / 1000:.3f}}}').encode())
    return out


def simulate(cfg: CityConfig) -> Iterator[bytes]:
    """Yield one JSON Lines record (bytes, no newline) per message, in nondecreasing arrival.

    Valid records are JSON objects with vehicle_id, event_ts, lat, lon, status, optional
    speed_mps and trip_id, and arrival_ts. Broken records are what a broken producer sent:
    valid JSON with bad content still carries arrival_ts; bytes that are not a JSON object
    (truncated, not JSON, an array) do not. Fixes are those taken in [00:00, 00:00 + hours);
    their deliveries may arrive a little after the span ends.
    """
    for c in _chunks(cfg):
        yield from _format_chunk(c)


def write_jsonl(path: str | Path, cfg: CityConfig) -> int:
    """Write the simulated day as JSON Lines (one record per line); return the number of lines."""
    count = 0
    with open(path, "wb") as fh:
        for c in _chunks(cfg):
            lines = _format_chunk(c)
            if lines:
                fh.write(b"\n".join(lines) + b"\n")
            count += len(lines)
    return count


def parquet_schema() -> Any:
    """The Arrow schema of the Parquet form of the stream."""
    import pyarrow as pa

    return pa.schema([
        ("vehicle_id", pa.string()),
        ("event_ts", pa.float64()),
        ("arrival_ts", pa.float64()),
        ("lat", pa.float64()),
        ("lon", pa.float64()),
        ("status", pa.string()),
        ("speed_mps", pa.float64()),
        ("trip_id", pa.string()),
    ])


def _as_float(v: Any) -> float:
    """A table cell of a float column: numbers stay, anything else becomes null (NaN here)."""
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return math.nan
    return float(v)


def _table_chunk(c: dict[str, np.ndarray]) -> Any:
    import pyarrow as pa

    bk = c["bkind"]
    keep = ~np.isin(bk, _NOT_OBJECT)
    c = {k: v[keep] for k, v in c.items()}
    bk = c["bkind"]
    n = len(bk)
    top = int(c["veh"].max()) + 1 if n else 0
    names = np.array([vehicle_name(i) for i in range(top)], dtype=object)
    vid = names[c["veh"]] if n else np.empty(0, dtype=object)
    ev = c["ev_ms"] / 1000.0
    arr = c["arr_ms"] / 1000.0
    lat = c["lat"].copy()
    lon = c["lon"].copy()
    status = np.array(STATUSES, dtype=object)[c["status"]] if n else np.empty(0, dtype=object)
    speed = c["speed"].copy()
    trip = np.full(n, None, dtype=object)
    has_trip = np.flatnonzero(c["trip"] >= 0)
    for i in has_trip.tolist():
        trip[i] = _trip_name(int(c["veh"][i]), int(c["trip"][i]))
    for i in np.flatnonzero(bk >= 0).tolist():
        base = _base_fields(int(c["veh"][i]), int(c["ev_ms"][i]), int(c["arr_ms"][i]),
                            float(c["lat"][i]), float(c["lon"][i]), int(c["status"][i]),
                            float(c["speed"][i]), int(c["trip"][i]))
        f = _broken(int(bk[i]), float(c["aux"][i]), base)
        assert isinstance(f, dict)
        vid[i] = f.get("vehicle_id") if isinstance(f.get("vehicle_id"), str) else None
        status[i] = f.get("status") if isinstance(f.get("status"), str) else None
        trip[i] = f.get("trip_id") if isinstance(f.get("trip_id"), str) else None
        ev[i] = _as_float(f.get("event_ts"))
        arr[i] = _as_float(f.get("arrival_ts"))
        lat[i] = _as_float(f.get("lat"))
        lon[i] = _as_float(f.get("lon"))
        speed[i] = _as_float(f.get("speed_mps"))

    def floats(a: np.ndarray) -> Any:
        return pa.array(a, type=pa.float64(), mask=np.isnan(a))

    return pa.table(
        [pa.array(vid, type=pa.string()), floats(ev), floats(arr), floats(lat), floats(lon),
         pa.array(status, type=pa.string()), floats(speed), pa.array(trip, type=pa.string())],
        schema=parquet_schema(),
    )


def write_parquet(path: str | Path, cfg: CityConfig) -> int:
    """Write the same stream as a Parquet table, one row group per chunk; return the rows.

    Records that are not JSON objects are left out (a table cannot hold them); bad values
    stay where the column type allows (lat 123.4 stays, a garbage event_ts becomes null).
    """
    import pyarrow.parquet as pq

    rows = 0
    with pq.ParquetWriter(str(path), parquet_schema()) as writer:
        for c in _chunks(cfg):
            table = _table_chunk(c)
            if table.num_rows:
                writer.write_table(table)
            rows += table.num_rows
    return rows


def expected_counts(cfg: CityConfig) -> dict[str, int]:
    """How many records of each kind the config produces (for tests and reports).

    Keys: lines, fixes (fix records that are not duplicate copies, broken ones included),
    vehicles_seen, trips_with_id, occupied, offline, late, late_over_300s,
    out_of_order, future, duplicate, broken, and broken_<kind> for each kind in BROKEN_KINDS.
    """
    r = _all_rows(cfg)
    kind, bk = r["kind"], r["bkind"]
    orig = kind != _K_DUP
    delay = r["arr_ms"] - r["ev_ms"]
    with_id = orig & (r["trip"] >= 0)
    trips = np.unique(r["veh"][with_id].astype(np.int64) * 1_000_000 + r["trip"][with_id])
    out = {
        "lines": len(kind),
        "fixes": int(orig.sum()),
        "vehicles_seen": len(np.unique(r["veh"])),
        "trips_with_id": len(trips),
        "occupied": int((orig & (r["status"] == _OCCUPIED)).sum()),
        "offline": int((orig & (r["status"] == _OFFLINE)).sum()),
        "late": int((kind == _K_LATE).sum()),
        "late_over_300s": int(((kind == _K_LATE) & (delay > 300_000)).sum()),
        "out_of_order": int((kind == _K_OOO).sum()),
        "future": int((kind == _K_FUTURE).sum()),
        "duplicate": int((kind == _K_DUP).sum()),
        "broken": int((kind == _K_BROKEN).sum()),
    }
    for i, name in enumerate(BROKEN_KINDS):
        out[f"broken_{name}"] = int((bk == i).sum())
    return out
