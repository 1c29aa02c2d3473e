"""Point-in-time correctness of replay training sets against the brute-force oracle.

Random small streams (late, early, duplicate and out-of-order fixes, ties in arrival,
gaps around the vehicle TTL and the route window) are written to Parquet, replayed by
``replay_labels`` / ``replay_trips``, and every value of every row is compared with
``tests/oracle.py``, which shares no code with the project. All data here is invented.
"""

from __future__ import annotations

import math
import random
from pathlib import Path

import h3
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from geographiclib.geodesic import Geodesic
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from oracle import (
    CELL_NAMES,
    DAY_MS,
    INT_NAMES,
    ROUTE_NAMES,
    STR_NAMES,
    TRIP_NAMES,
    VEHICLE_NAMES,
    Oracle,
    bearing,
    circular_mean,
    haversine,
)
from scipy.stats import circmean

from replay.training import replay_labels, replay_trips

BASE_LAT, BASE_LON = -33.2, -20.6  # the fictional demo city's centre (open sea)
# The generator's own metres-to-degrees scale: deliberately a little off the sphere used by
# the features (111 000 m per degree of latitude is a round figure, not a geodesic value), so
# that a step drawn as an integer number of "generator metres" never lands on the 10 m
# moving threshold: 10 generator metres are about 10.02 m on the sphere.
M_PER_DEG = 111_000.0
TTL_MS = 6 * 3_600_000
FAR_CELL8 = h3.latlng_to_cell(10.0, 10.0, 8)
FAR_CELL7 = h3.latlng_to_cell(10.0, 10.0, 7)
HEADING = {"vehicle_heading_deg", "trip_initial_heading_deg"}

SETTINGS = settings(max_examples=150, deadline=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                           HealthCheck.function_scoped_fixture])


def to_latlon(north_m: float, east_m: float) -> tuple[float, float]:
    lat = BASE_LAT + north_m / M_PER_DEG
    lon = BASE_LON + east_m / (M_PER_DEG * math.cos(math.radians(BASE_LAT)))
    return lat, lon


# --- stream generation ------------------------------------------------------------------------
# Hypothesis draws the shape of an example (how many vehicles and fixes, how often each kind
# of trouble happens, a seed); the stream itself comes from random.Random(seed), so that the
# mix of ordinary and odd fixes follows the rates rather than Hypothesis' bias towards
# boundary values. Shrinking still removes vehicles, fixes, labels and kinds of trouble.
BIG_GAPS = [TTL_MS - 1_000, TTL_MS, TTL_MS + 1_000, 3 * 3_600_000, 2 * DAY_MS, 27 * DAY_MS,
            29 * DAY_MS]
ODD_DELAYS = [300_000, 300_001, -30_000, -30_001, 200_000, 299_999]


def rates() -> st.SearchStrategy[dict]:
    return st.fixed_dictionaries({
        "big_gap": st.sampled_from([0.0, 0.01, 0.03]),  # gaps around the TTL / route window
        "zero_gap": st.sampled_from([0.0, 0.03]),  # same event time again: a duplicate
        "odd_delay": st.sampled_from([0.0, 0.05, 0.15]),  # late, early, at the limits
        "dup": st.sampled_from([0.0, 0.04, 0.1]),  # exact copy arriving later
        "dup_moved": st.sampled_from([0.0, 0.03]),  # same event time, another position
        "ooo": st.sampled_from([0.0, 0.05, 0.12]),  # older event arriving later
        "zero_step": st.sampled_from([0.0, 0.1, 0.3]),  # vehicle did not move
        "axis": st.sampled_from([0.0, 0.3]),  # steps due N/E/S/W (cancelling bearings)
        "run": st.sampled_from([2, 4, 8]),  # longest run of one status
    })


def vehicle_fixes(rng: random.Random, vid: str, base: int, r: dict, n: int, coarse: bool
                  ) -> list[dict]:
    north, east = rng.randint(-1_500, 1_500), rng.randint(-1_500, 1_500)
    status = rng.choice(["vacant", "occupied", "offline"])
    left = rng.randint(1, r["run"])
    ev = base + rng.randrange(600_000)
    out: list[dict] = []
    for i in range(n):
        if i:
            u = rng.random()
            ev += (rng.choice(BIG_GAPS) if u < r["big_gap"] else 0
                   if u < r["big_gap"] + r["zero_gap"] else rng.randint(1, 60_000))
            dist = 0 if rng.random() < r["zero_step"] else rng.choice(
                [rng.randint(0, 150), rng.randint(0, 400)])
            ang = rng.choice([0, 90, 180, 270]) if rng.random() < r["axis"] else rng.randrange(360)
            north += dist * math.cos(math.radians(ang))
            east += dist * math.sin(math.radians(ang))
            left -= 1
            if left == 0:  # vacant -> occupied -> vacant|offline -> vacant|occupied ...
                status = {"vacant": "occupied",
                          "occupied": rng.choice(["vacant", "vacant", "offline"]),
                          "offline": rng.choice(["vacant", "occupied"])}[status]
                left = rng.randint(1, r["run"])
        if rng.random() < r["odd_delay"]:
            delay = rng.choice([rng.randint(-40_000, 400_000), rng.choice(ODD_DELAYS)])
        else:
            delay = rng.randint(0, 5_000)
        arr = ev + delay
        if coarse:
            arr -= arr % 1_000
        lat, lon = to_latlon(north, east)
        fix = {"vehicle_id": vid, "event_ms": ev, "arrival_ms": arr, "lat": lat, "lon": lon,
               "status": status}
        out.append(fix)
        u = rng.random()
        if u < r["dup"]:
            out.append({**fix, "arrival_ms": arr + rng.randint(0, 30_000)})
        elif u < r["dup"] + r["dup_moved"]:
            la, lo = to_latlon(north + 50, east - 30)
            out.append({**fix, "lat": la, "lon": lo, "arrival_ms": arr + rng.randint(0, 30_000)})
        elif u < r["dup"] + r["dup_moved"] + r["ooo"]:
            back = rng.randint(1, 60_000)
            la, lo = to_latlon(north - rng.randint(0, 300), east + rng.randint(0, 300))
            out.append({**fix, "event_ms": ev - back, "lat": la, "lon": lo,
                        "status": rng.choice(["vacant", "occupied"]),
                        "arrival_ms": arr + rng.randint(0, 40_000)})
    return out


@st.composite
def streams(draw: st.DrawFn, max_vehicles: int = 6, max_fixes: int = 60) -> dict:
    seed = draw(st.integers(0, 2**32 - 1))
    sizes = draw(st.lists(st.integers(1, max_fixes), min_size=1, max_size=max_vehicles))
    r = draw(rates())
    day0 = 19_675  # days since the epoch: 14 November 2023
    base = day0 * DAY_MS + draw(st.integers(0, 23)) * 3_600_000 + draw(st.integers(0, 3_599_999))
    coarse = draw(st.booleans())  # arrivals rounded down to whole seconds: many ties
    shuffled = draw(st.booleans())  # written in random order, replay sorts them
    fixes: list[dict] = []
    for v, n in enumerate(sizes):
        fixes += vehicle_fixes(random.Random(f"{seed}:{v}"), f"v{v}", base, r, n, coarse)
    fixes.sort(key=lambda f: f["arrival_ms"])  # stable: generation order breaks ties
    if shuffled:  # then ties are broken by the shuffled file order
        random.Random(seed).shuffle(fixes)
    for i, f in enumerate(fixes):
        f["seq"] = i
    return {"fixes": fixes, "vehicles": [f"v{v}" for v in range(len(sizes))],
            "shuffled": shuffled, "seed": seed}


def label_rows(rng: random.Random, s: dict, n: int) -> list[dict]:
    """Label rows: times at, just around and between arrivals, at the "now" horizon, TTL and
    route-window edges, before any data; keys of seen and unseen vehicles, cells with fixes,
    their neighbours and a far cell, routes between the cells the fixes touch."""
    fixes = s["fixes"]
    lo = min(f["arrival_ms"] for f in fixes)
    hi = max(f["arrival_ms"] for f in fixes)
    cells8 = sorted({h3.latlng_to_cell(f["lat"], f["lon"], 8) for f in fixes})
    near = sorted({c for c8 in cells8 for c in h3.grid_disk(c8, 1)} - set(cells8))
    kinds = ["arrival"] * 6 + ["event"] * 2 + ["between"] * 3 + [
        "last", "before", "ttl", "route", "day_edge"]
    last = {f["vehicle_id"]: f for f in sorted(fixes, key=lambda f: f["event_ms"])}
    out = []
    for _ in range(n):
        kind = rng.choice(kinds)
        f = rng.choice(list(last.values()) if kind == "last" else fixes)
        a, e = f["arrival_ms"], f["event_ms"]
        if kind == "arrival":
            t = a + rng.choice([0, 0, 0, -1, 1])
        elif kind in ("event", "last"):  # the "now" horizon's edges
            t = e + rng.choice([0, 119_999, 120_000, 120_001])
        elif kind == "between":
            t = rng.randint(lo, hi)
        elif kind == "before":
            t = lo - rng.choice([1, 60_000, 3_600_000])
        elif kind == "ttl":
            t = a + TTL_MS + rng.choice([-1, 0, 1])
        elif kind == "route":
            t = a + rng.choice([27 * DAY_MS, 28 * DAY_MS - 1, 28 * DAY_MS])
        else:
            t = (a // DAY_MS + rng.choice([1, 28, 29])) * DAY_MS - rng.choice([0, 1])
        g = f if rng.random() < 0.6 else rng.choice(fixes)
        u = rng.random()
        cell = (h3.latlng_to_cell(g["lat"], g["lon"], 8) if u < 0.75 or not near
                else rng.choice(near) if u < 0.92 else FAR_CELL8)
        o7, d7 = (FAR_CELL7 if rng.random() < 0.1 else
                  h3.latlng_to_cell(x["lat"], x["lon"], 7)
                  for x in (rng.choice(fixes), rng.choice(fixes)))
        vid = f["vehicle_id"] if rng.random() < 0.75 else rng.choice(s["vehicles"] + ["ghost"])
        out.append({"ts_ms": t, "vehicle_id": vid, "cell": cell, "origin_cell": o7,
                    "dest_cell": d7})
    return out


@st.composite
def labelled_streams(draw: st.DrawFn) -> dict:
    s = draw(streams())
    n = draw(st.integers(1, 40))
    return {**s, "labels": label_rows(random.Random(s["seed"] + 1), s, n)}


# --- files and comparison ---------------------------------------------------------------------
def write_fixes(path: Path, fixes: list[dict]) -> Path:
    pq.write_table(pa.table({
        "vehicle_id": [f["vehicle_id"] for f in fixes],
        "event_ts": pa.array([f["event_ms"] / 1000 for f in fixes], pa.float64()),
        "arrival_ts": pa.array([f["arrival_ms"] / 1000 for f in fixes], pa.float64()),
        "lat": pa.array([f["lat"] for f in fixes], pa.float64()),
        "lon": pa.array([f["lon"] for f in fixes], pa.float64()),
        "status": [f["status"] for f in fixes],
    }), path)
    return path


def write_labels(path: Path, labels: list[dict], keys: tuple[str, ...]) -> Path:
    cols: dict[str, object] = {"ts": pa.array([lb["ts_ms"] / 1000 for lb in labels],
                                              pa.float64())}
    for k in keys:
        cols[k] = pa.array([lb[k] for lb in labels], pa.string())
    pq.write_table(pa.table(cols), path)
    return path


def same(name: str, got: object, want: object) -> bool:
    if want is None or got is None:
        return got is None and want is None
    if name in STR_NAMES:
        return got == want
    if name in INT_NAMES:
        return type(got) is int and got == want
    if not isinstance(got, float):
        return False
    if math.isnan(want) or math.isnan(got):
        return math.isnan(want) and math.isnan(got)
    if math.isclose(got, want, rel_tol=1e-9, abs_tol=1e-9):
        return True
    # a direction just under 360 and one just over 0 are the same direction
    return name in HEADING and abs((got - want + 180.0) % 360.0 - 180.0) <= 1e-9


def mismatches(rows: list[dict], want: list[dict], names: list[str], key: str) -> list[str]:
    bad = []
    for got_row, want_row in zip(rows, want, strict=True):
        for n in names:
            if not same(n, got_row[n], want_row[n]):
                bad.append(f"{key}={got_row.get(key)!r} {n}: got {got_row[n]!r}, "
                           f"want {want_row[n]!r} (row {want_row.get('_ctx')})")
    return bad


def describe(fixes: list[dict]) -> str:
    return "\n".join(
        f"  {f['seq']:3d} {f['vehicle_id']} ev={f['event_ms']} arr={f['arrival_ms']} "
        f"{f['lat']:.6f},{f['lon']:.6f} {f['status']}" for f in fixes)


def run_labels(tmp: Path, s: dict) -> tuple[pa.Table, list[dict]]:
    fixes_path = write_fixes(tmp / "fixes.parquet", s["fixes"])
    keys = ("vehicle_id", "cell", "origin_cell", "dest_cell")
    labels_path = write_labels(tmp / "labels.parquet", s["labels"], keys)
    out = tmp / "train.parquet"
    replay_labels([fixes_path], labels_path, out, sort=s["shuffled"])
    return pq.read_table(out), s["labels"]


def oracle_rows(orc: Oracle, labels: list[dict]) -> list[dict]:
    want = []
    for i, lb in enumerate(labels):
        t = lb["ts_ms"]
        row = {**orc.vehicle(lb["vehicle_id"], t), **orc.cell(lb["cell"], t),
               **orc.route(lb["origin_cell"], lb["dest_cell"], t)}
        row["_ctx"] = (i, lb["ts_ms"])
        want.append(row)
    return want


FEATURES = VEHICLE_NAMES + TRIP_NAMES + CELL_NAMES + ROUTE_NAMES


# --- the tests ----------------------------------------------------------------------------------
@SETTINGS
@given(labelled_streams())
def test_label_rows_match_the_oracle(tmp_path_factory: pytest.TempPathFactory, s: dict) -> None:
    tmp = tmp_path_factory.mktemp("pit")
    table, labels = run_labels(tmp, s)
    # Label columns first, in their order, then exactly the declared feature names.
    assert table.column_names[:5] == ["ts", "vehicle_id", "cell", "origin_cell", "dest_cell"]
    assert sorted(table.column_names[5:]) == sorted(FEATURES)
    for n in FEATURES:
        want_type = (pa.int64() if n in INT_NAMES else pa.string() if n in STR_NAMES
                     else pa.float64())
        assert table.schema.field(n).type == want_type, n
    rows = table.to_pylist()
    assert [r["ts"] for r in rows] == [lb["ts_ms"] / 1000 for lb in labels]
    want = oracle_rows(Oracle(s["fixes"]), labels)
    bad = mismatches(rows, want, FEATURES, "vehicle_id")
    assert not bad, "\n".join(bad[:12]) + "\nfixes (file order):\n" + describe(s["fixes"])


def read_trips(path: Path) -> list[dict]:
    t = pq.read_table(path)
    ts_cols = ("pickup_ts", "pickup_arrival_ts", "as_of_ts", "dropoff_ts")
    for c in ts_cols:
        assert t.schema.field(c).type == pa.timestamp("ms", tz="UTC"), c
    for c in ts_cols:
        i = t.schema.get_field_index(c)
        t = t.set_column(i, c, t.column(c).cast(pa.int64()))
    return t.to_pylist()


TRIP_ROW_NAMES = (["trip_id", "pickup_ts", "pickup_arrival_ts", "as_of_ts"] + VEHICLE_NAMES
                  + TRIP_NAMES + CELL_NAMES
                  + ["dropoff_ts", "duration_s", "dest_cell", "dest_route_cell", "distance_m"])
TRIP_STR = {"trip_id", "dest_cell", "dest_route_cell"}
TRIP_INT = {"pickup_ts", "pickup_arrival_ts", "as_of_ts", "dropoff_ts"}


def same_trip_value(name: str, got: object, want: object) -> bool:
    if name in TRIP_STR:
        return got == want
    if name in TRIP_INT:
        return got == want
    return same(name, got, want)


@SETTINGS
@given(streams(max_vehicles=4, max_fixes=60))
def test_trip_rows_match_the_oracle(tmp_path_factory: pytest.TempPathFactory, s: dict) -> None:
    tmp = tmp_path_factory.mktemp("trips")
    fixes_path = write_fixes(tmp / "fixes.parquet", s["fixes"])
    orc = Oracle(s["fixes"])
    for after in (1, 3):
        out = tmp / f"trips{after}.parquet"
        replay_trips([fixes_path], out, after_fixes=after, sort=s["shuffled"])
        got = sorted(read_trips(out), key=lambda r: (r["vehicle_id"], r["pickup_ts"]))
        want = sorted(orc.trips(after), key=lambda r: (r["vehicle_id"], r["pickup_ts"]))
        keys_got = [(r["vehicle_id"], r["pickup_ts"]) for r in got]
        keys_want = [(r["vehicle_id"], r["pickup_ts"]) for r in want]
        ctx = f"after_fixes={after}\nfixes (file order):\n" + describe(s["fixes"])
        assert keys_got == keys_want, ctx
        bad = [f"{g['vehicle_id']}@{g['pickup_ts']} {n}: got {g[n]!r}, want {w[n]!r}"
               for g, w in zip(got, want, strict=True) for n in TRIP_ROW_NAMES
               if not same_trip_value(n, g[n], w[n])]
        assert not bad, "\n".join(bad[:12]) + "\n" + ctx


# --- a late fix, by hand ------------------------------------------------------------------------
def test_late_fix_is_invisible_before_its_arrival(tmp_path: Path) -> None:
    t0 = 19_675 * DAY_MS + 10 * 3_600_000  # 10:00:00 UTC, on a whole minute
    a_lat, a_lon = to_latlon(0, 0)
    b_lat, b_lon = to_latlon(2_500, 0)  # 2.5 km north: another res-8 cell, not a neighbour
    cell_a = h3.latlng_to_cell(a_lat, a_lon, 8)
    cell_b = h3.latlng_to_cell(b_lat, b_lon, 8)
    assert cell_b not in h3.grid_disk(cell_a, 1)
    late_event, late_arrival = t0 + 30_000, t0 + 230_000  # 200 s late: still accepted
    fixes = [
        {"vehicle_id": "v0", "event_ms": t0 + k * 10_000, "arrival_ms": t0 + k * 10_000 + 1_000,
         "lat": a_lat, "lon": a_lon, "status": "vacant"} for k in range(3)
    ] + [{"vehicle_id": "v0", "event_ms": late_event, "arrival_ms": late_arrival,
          "lat": b_lat, "lon": b_lon, "status": "vacant"}]
    for i, f in enumerate(fixes):
        f["seq"] = i
    times = [late_arrival - 1, late_arrival, late_arrival + 1, t0 + 6 * 60_000, t0 + 59 * 60_000,
             t0 + 61 * 60_000]
    labels = [{"ts_ms": t, "vehicle_id": "v0", "cell": cell_b, "origin_cell": FAR_CELL7,
               "dest_cell": FAR_CELL7} for t in times]
    rows, _ = run_labels(tmp_path, {"fixes": fixes, "labels": labels, "shuffled": False})
    rows = rows.to_pylist()
    # Before it arrived, the late fix is nowhere: not in its cell, not in the vehicle.
    assert rows[0]["cell_fixes_60m"] == 0 and rows[0]["cell_fixes_5m"] == 0
    assert rows[0]["cell_vacant_now"] == 0
    assert rows[0]["vehicle_cell"] == cell_a
    assert rows[0]["vehicle_fix_age_s"] == (late_arrival - 1 - (t0 + 20_000)) / 1000
    # From its arrival on, it counts in the bucket of its event time (10:00), not arrival's.
    for r in rows[1:3]:
        assert (r["cell_fixes_5m"], r["cell_fixes_15m"], r["cell_fixes_60m"]) == (1, 1, 1)
        assert r["vehicle_cell"] == cell_b and r["vehicle_status"] == "vacant"
        assert r["cell_vacant_now"] == 0  # its event is 200 s old: past the 120 s horizon
    # 10:06: the 5-minute window is buckets 10:02..10:06, without 10:00; 15 and 60 keep it.
    assert (rows[3]["cell_fixes_5m"], rows[3]["cell_fixes_15m"]) == (0, 1)
    assert rows[4]["cell_fixes_60m"] == 1  # 10:59: buckets 10:00..10:59
    assert rows[5]["cell_fixes_60m"] == 0  # 11:01: buckets 10:02..11:01
    want = oracle_rows(Oracle(fixes), labels)
    assert not mismatches(rows, want, FEATURES, "vehicle_id")


def one_vehicle(points: list[tuple[float, float, str]], t0: int, every_ms: int = 10_000,
                delay_ms: int = 500) -> list[dict]:
    out = []
    for i, (north, east, status) in enumerate(points):
        lat, lon = to_latlon(north, east)
        out.append({"vehicle_id": "v0", "event_ms": t0 + i * every_ms,
                    "arrival_ms": t0 + i * every_ms + delay_ms, "lat": lat, "lon": lon,
                    "status": status, "seq": i})
    return out


def test_now_horizon_and_vehicle_ttl_edges(tmp_path: Path) -> None:
    t0 = 19_675 * DAY_MS + 10 * 3_600_000
    fixes = one_vehicle([(0, 0, "vacant")], t0)
    cell = h3.latlng_to_cell(fixes[0]["lat"], fixes[0]["lon"], 8)
    seen = fixes[0]["arrival_ms"]
    times = [t0 + 119_999, t0 + 120_000, t0 + 120_001, seen + TTL_MS, seen + TTL_MS + 1]
    labels = [{"ts_ms": t, "vehicle_id": "v0", "cell": cell, "origin_cell": FAR_CELL7,
               "dest_cell": FAR_CELL7} for t in times]
    rows = run_labels(tmp_path, {"fixes": fixes, "labels": labels, "shuffled": False})[0]
    rows = rows.to_pylist()
    # "now" counts a fix whose event time is >= T - 120 s: in at exactly 120 s, out 1 ms later
    assert [r["cell_vacant_now"] for r in rows[:3]] == [1, 1, 0]
    assert [r["cell_ring_vacant_now"] for r in rows[:3]] == [1, 1, 0]
    # the vehicle is known while T - seen <= 6 h, gone 1 ms later
    assert rows[3]["vehicle_cell"] == cell and rows[3]["vehicle_fix_age_s"] == 21_600.5
    assert rows[4]["vehicle_cell"] is None and math.isnan(rows[4]["vehicle_fix_age_s"])
    assert rows[4]["trip_fixes"] == 0 and rows[4]["trip_active"] == 0
    assert not mismatches(rows, oracle_rows(Oracle(fixes), labels), FEATURES, "vehicle_id")


def test_cancelling_bearings_leave_no_heading(tmp_path: Path) -> None:
    """North 100 m then back south: bearings 0 and 180 deg, mean resultant length ~6e-17."""
    t0 = 19_675 * DAY_MS + 10 * 3_600_000
    fixes = one_vehicle([(0, 0, "vacant"), (0, 0, "occupied"), (100, 0, "occupied"),
                         (0, 0, "occupied")], t0)
    labels = [{"ts_ms": t0 + 40_000, "vehicle_id": "v0", "cell": FAR_CELL8,
               "origin_cell": FAR_CELL7, "dest_cell": FAR_CELL7}]
    r = run_labels(tmp_path, {"fixes": fixes, "labels": labels, "shuffled": False})[0]
    r = r.to_pylist()[0]
    assert math.isnan(r["vehicle_heading_deg"]) and r["vehicle_heading_r"] < 1e-9
    assert math.isnan(r["trip_initial_heading_deg"])
    assert r["trip_active"] == 1 and r["trip_fixes"] == 3
    assert r["trip_displacement_m"] == 0.0
    # 2 x 100 "generator metres" of latitude = 2 * 100 / 111 000 deg on a sphere of the IUGG
    # mean radius: 2 * 6 371 008.8 * radians(100 / 111 000) m (arc length, exact on a sphere)
    assert math.isclose(r["trip_distance_m"], 2 * 6_371_008.8 * math.radians(100 / 111_000),
                        rel_tol=1e-9)
    assert not mismatches([r], oracle_rows(Oracle(fixes), labels), FEATURES, "vehicle_id")


def test_oracle_geometry_against_geographiclib_and_scipy() -> None:
    """The oracle's own geometry against libraries outside the project: haversine and initial
    bearing against geographiclib's geodesic on a sphere (a = 6 371 008.8 m, flattening 0,
    where the geodesic is the great circle), the circular mean direction against
    scipy.stats.circmean."""
    sphere = Geodesic(6_371_008.8, 0.0)
    rng = random.Random(7)
    for _ in range(200):
        la1, lo1 = to_latlon(rng.uniform(-3_000, 3_000), rng.uniform(-3_000, 3_000))
        la2, lo2 = to_latlon(rng.uniform(-3_000, 3_000), rng.uniform(-3_000, 3_000))
        g = sphere.Inverse(la1, lo1, la2, lo2)
        assert math.isclose(haversine(la1, lo1, la2, lo2), g["s12"], rel_tol=1e-9)
        assert abs((bearing(la1, lo1, la2, lo2) - g["azi1"] + 180) % 360 - 180) < 1e-7
    for _ in range(200):
        degs = [rng.uniform(0, 360) for _ in range(rng.randint(1, 5))]
        mean, r = circular_mean(degs)
        want = math.degrees(circmean([math.radians(d) for d in degs]))
        assert abs((mean - want + 180) % 360 - 180) < 1e-9
        c = sum(math.cos(math.radians(d)) for d in degs)
        s = sum(math.sin(math.radians(d)) for d in degs)
        assert math.isclose(r, math.hypot(c, s) / len(degs), rel_tol=1e-12)


def test_trip_row_is_as_of_everything_that_arrived_in_that_millisecond(tmp_path: Path) -> None:
    """The pickup, the next fix and the dropoff arrive in one millisecond: the trip row's
    vector as of the pickup's arrival already holds the dropoff (as-of T means every fix with
    arrival <= T), so it shows no trip in progress; the labels come from the dropoff."""
    t0 = 19_675 * DAY_MS + 10 * 3_600_000
    fixes = one_vehicle([(0, 0, "vacant"), (0, 0, "occupied"), (200, 0, "occupied"),
                         (400, 0, "vacant")], t0)
    fixes[2]["arrival_ms"] = fixes[3]["arrival_ms"] = fixes[1]["arrival_ms"]
    path = write_fixes(tmp_path / "fixes.parquet", fixes)
    replay_trips([path], tmp_path / "trips.parquet", after_fixes=1)
    (row,) = read_trips(tmp_path / "trips.parquet")
    assert (row["pickup_ts"], row["as_of_ts"], row["dropoff_ts"]) == (
        t0 + 10_000, t0 + 10_500, t0 + 30_000)
    assert row["trip_id"] == f"v0:{t0 + 10_000}" and row["duration_s"] == 20.0
    assert (row["trip_active"], row["trip_fixes"], row["vehicle_status"]) == (0, 0, "vacant")
    # 400 generator metres due north = radians(400 / 111 000) of arc on the 6 371 008.8 m sphere
    assert math.isclose(row["distance_m"], 6_371_008.8 * math.radians(400 / 111_000),
                        rel_tol=1e-9)
    (want,) = Oracle(fixes).trips(1)
    assert all(same_trip_value(n, row[n], want[n]) for n in TRIP_ROW_NAMES)
    # after_fixes=2: the trip has 2 fixes before its dropoff, so it still gets a row
    replay_trips([path], tmp_path / "trips2.parquet", after_fixes=2)
    assert [r["as_of_ts"] for r in read_trips(tmp_path / "trips2.parquet")] == [t0 + 10_500]
    replay_trips([path], tmp_path / "trips3.parquet", after_fixes=3)
    assert read_trips(tmp_path / "trips3.parquet") == []


def test_route_window_is_keyed_by_the_dropoff_arrival_day(tmp_path: Path) -> None:
    """Two trips on one route picked up in the 23:00 hour: 600 s (dropoff 23:50) and 900 s
    (dropoff event 23:59:59, arriving 00:00:01 the next day, so it counts on that day)."""
    d0 = 19_675
    h23 = d0 * DAY_MS + 23 * 3_600_000

    def trip(vid: str, start: int, pickup: int, mid: int, drop: int, drop_delay: int
             ) -> list[dict]:
        pts = [(start, 0, "vacant"), (pickup, 0, "occupied"), (mid, 150, "occupied"),
               (drop, 300, "vacant")]
        out = []
        for k, (ev, north, status) in enumerate(pts):
            lat, lon = to_latlon(north, 0)
            out.append({"vehicle_id": vid, "event_ms": h23 + ev, "lat": lat, "lon": lon,
                        "status": status,
                        "arrival_ms": h23 + ev + (drop_delay if k == 3 else 500)})
        return out

    fixes = (trip("v0", 39 * 60_000, 40 * 60_000, 45 * 60_000, 50 * 60_000, 500)
             + trip("v1", 44 * 60_000, 44 * 60_000 + 59_000, 52 * 60_000, 3_599_000, 2_000))
    fixes.sort(key=lambda f: f["arrival_ms"])
    for i, f in enumerate(fixes):
        f["seq"] = i
    o7 = h3.latlng_to_cell(*to_latlon(0, 0), 7)
    d7 = h3.latlng_to_cell(*to_latlon(300, 0), 7)
    times = [h23 + 3_599_999, (d0 + 1) * DAY_MS + 1_000, (d0 + 1) * DAY_MS + 23 * 3_600_000,
             (d0 + 28) * DAY_MS - 1, (d0 + 28) * DAY_MS + 23 * 3_600_000,
             (d0 + 29) * DAY_MS + 23 * 3_600_000]
    labels = [{"ts_ms": t, "origin_cell": o7, "dest_cell": d7} for t in times]
    fx = write_fixes(tmp_path / "fixes.parquet", fixes)
    lb = write_labels(tmp_path / "labels.parquet", labels, ("origin_cell", "dest_cell"))
    replay_labels([fx], lb, tmp_path / "out.parquet")
    table = pq.read_table(tmp_path / "out.parquet")
    assert table.column_names == ["ts", "origin_cell", "dest_cell", *ROUTE_NAMES]
    got = [(r["route_trips"], r["route_mean_duration_s"], r["route_std_duration_s"])
           for r in table.to_pylist()]
    nan = math.nan
    want = [
        (1, 600.0, 0.0),  # 23:59:59.999: only the first dropoff has arrived
        (0, nan, nan),  # 00:00:01 next day: both arrived, but it is the 00:00 hour
        (2, 750.0, 150.0),  # 23:00 next day: both; population std of 600 and 900 s
        (2, 750.0, 150.0),  # last ms of day d0+27: days d0 and d0+1 are both within 28
        (1, 900.0, 0.0),  # day d0+28: day d0 has left the window, d0+1 (arrival day) not
        (0, nan, nan),  # day d0+29: both gone
    ]
    assert [g[0] for g in got] == [w[0] for w in want]
    for g, w in zip(got, want, strict=True):
        assert all(same("route_mean_duration_s", a, b) for a, b in zip(g[1:], w[1:],
                                                                        strict=True)), (g, w)
    orc = Oracle(fixes)
    for t, g in zip(times, got, strict=True):
        w = orc.route(o7, d7, t)
        assert all(same(n, a, w[n]) for n, a in zip(ROUTE_NAMES, g, strict=True)), (t, g, w)
