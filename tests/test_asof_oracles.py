"""As-of joins of replay training sets against pandas.merge_asof and DuckDB ASOF JOIN.

On streams without out-of-order or duplicate fixes and without rejections, a vehicle's
latest known fix at T is simply its last fix by arrival (ties: the later in file order), so
vehicle_cell / vehicle_status / vehicle_fix_age_s are a plain backward as-of join of the
labels onto the fixes. cell_fixes_60m is checked against a DuckDB aggregate. The oracles
here are pandas and DuckDB; the test shares no code with the project. Invented data only.
"""

from __future__ import annotations

import math
import random
from pathlib import Path

import duckdb
import h3
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from replay.training import replay_labels

DAY_MS = 86_400_000
BASE_LAT, BASE_LON = -33.2, -20.6  # the fictional demo city's centre (open sea)
M_PER_DEG = 111_000.0  # the generator's round metres-per-degree figure (not geodesic)
FAR_CELL8 = h3.latlng_to_cell(10.0, 10.0, 8)
SEQ_SPAN = 100_000  # seq < SEQ_SPAN: arrival_ms * SEQ_SPAN + seq orders ties in file order


def in_order_stream(seed: int, sizes: list[int], coarse: bool) -> pd.DataFrame:
    """Fixes whose event times rise with arrival per vehicle: delays 0-300 s, arrivals never
    before the vehicle's previous arrival, so no fix is late, early, out of order or repeated.
    With ``coarse`` arrivals are cut to whole seconds, so many share one arrival time."""
    rows = []
    base = 19_675 * DAY_MS + 9 * 3_600_000
    for v, n in enumerate(sizes):
        rng = random.Random(f"{seed}:{v}")
        north, east = rng.uniform(-1_500, 1_500), rng.uniform(-1_500, 1_500)
        ev = base + rng.randrange(600_000)
        arr = ev
        status = rng.choice(["vacant", "occupied", "offline"])
        for _ in range(n):
            ev += rng.randint(1, 60_000)
            d, a = rng.choice([0, rng.uniform(0, 400)]), math.radians(rng.uniform(0, 360))
            north, east = north + d * math.cos(a), east + d * math.sin(a)
            if rng.random() < 0.2:
                status = rng.choice(["vacant", "occupied", "offline"])
            arr = max(arr, ev + rng.choice([0, rng.randint(0, 5_000), rng.randint(0, 300_000)]))
            if coarse:  # still never before the previous (already whole-second) arrival
                arr -= arr % 1_000
            rows.append({
                "vehicle_id": f"v{v}", "event_ms": ev, "arrival_ms": arr,
                "lat": BASE_LAT + north / M_PER_DEG,
                "lon": BASE_LON + east / (M_PER_DEG * math.cos(math.radians(BASE_LAT))),
                "status": status,
            })
    df = pd.DataFrame(rows).sort_values("arrival_ms", kind="stable").reset_index(drop=True)
    df["seq"] = range(len(df))  # file order
    df["event_ts"] = df["event_ms"] / 1000
    df["arrival_ts"] = df["arrival_ms"] / 1000
    df["cell"] = [h3.latlng_to_cell(a, b, 8) for a, b in zip(df["lat"], df["lon"], strict=True)]
    return df


def label_frame(rng: random.Random, fixes: pd.DataFrame, n: int) -> pd.DataFrame:
    arr = fixes["arrival_ms"].tolist()
    cells = sorted(set(fixes["cell"]))
    near = sorted({c for c8 in cells for c in h3.grid_disk(c8, 1)} - set(cells))
    vids = sorted(set(fixes["vehicle_id"])) + ["ghost"]
    rows = []
    for _ in range(n):
        i = rng.randrange(len(fixes))
        kind = rng.choice(["exact"] * 4 + ["around", "between", "before"])
        t = (arr[i] if kind == "exact" else arr[i] + rng.choice([-1, 1]) if kind == "around"
             else rng.randint(arr[0], arr[-1]) if kind == "between" else arr[0] - 60_000)
        u = rng.random()
        cell = (fixes["cell"][i] if u < 0.7 or not near else rng.choice(near) if u < 0.9
                else FAR_CELL8)
        vid = fixes["vehicle_id"][i] if rng.random() < 0.7 else rng.choice(vids)
        rows.append({"ts": t / 1000, "ts_ms": t, "vehicle_id": vid, "cell": cell})
    return pd.DataFrame(rows)


def replay(tmp: Path, fixes: pd.DataFrame, labels: pd.DataFrame) -> pd.DataFrame:
    fx = tmp / "fixes.parquet"
    pq.write_table(pa.Table.from_pandas(
        fixes[["vehicle_id", "event_ts", "arrival_ts", "lat", "lon", "status"]],
        preserve_index=False), fx)
    lb = tmp / "labels.parquet"
    pq.write_table(pa.Table.from_pandas(labels[["ts", "vehicle_id", "cell"]],
                                        preserve_index=False), lb)
    out = tmp / "train.parquet"
    replay_labels([fx], lb, out)
    got = pq.read_table(out).to_pandas()
    assert not any(c.startswith("route_") for c in got.columns)  # no route keys, no route
    return got


def pandas_asof(labels: pd.DataFrame, fixes: pd.DataFrame) -> pd.DataFrame:
    """Oracle 1: pandas.merge_asof, backward, exact matches allowed. Ties in arrival_ts are
    broken by sorting the right side by (arrival_ts, seq): the pandas API reference says a
    backward search "selects the last row in the right DataFrame whose 'on' key is less than
    or equal to the left's key", i.e. the last of equal arrivals in file order."""
    left = labels.reset_index().rename(columns={"index": "row"}).sort_values(
        "ts", kind="stable")
    right = fixes.sort_values(["arrival_ts", "seq"])[
        ["vehicle_id", "arrival_ts", "seq", "event_ms", "cell", "status"]]
    m = pd.merge_asof(left, right, left_on="ts", right_on="arrival_ts", by="vehicle_id",
                      direction="backward", allow_exact_matches=True,
                      suffixes=("", "_fix"))
    return m.sort_values("row").set_index("row")


def duckdb_asof(labels: pd.DataFrame, fixes: pd.DataFrame) -> pd.DataFrame:
    """Oracle 2: DuckDB ASOF LEFT JOIN with l.key >= f.key (DuckDB's docs: the match is the
    row with the largest right key not above the left one). Which of several equal right keys
    DuckDB picks is not specified, so the keys are made unique: fix key = arrival_ms * 1e5 +
    seq (file order), label key = ts_ms * 1e5 + 99 999, which is >= every fix arriving at
    ts_ms (exact matches count) and below every later one."""
    con = duckdb.connect()
    con.register("lab", labels.reset_index().rename(columns={"index": "row"}))
    con.register("fx", fixes)
    return con.execute(f"""
        SELECT l.row, f.event_ms, f.cell AS cell_fix, f.status
        FROM (SELECT *, ts_ms * {SEQ_SPAN} + {SEQ_SPAN - 1} AS k FROM lab) l
        ASOF LEFT JOIN (SELECT *, arrival_ms * {SEQ_SPAN} + seq AS k FROM fx) f
          ON l.vehicle_id = f.vehicle_id AND l.k >= f.k
        ORDER BY l.row
    """).df().set_index("row")


def duckdb_cell_fixes_60m(labels: pd.DataFrame, fixes: pd.DataFrame) -> list[int]:
    """Oracle 3: fixes of the label's cell that arrived by ts with event bucket (60 s) in the
    60 buckets ending with ts's bucket, counted by a plain SQL aggregate."""
    con = duckdb.connect()
    con.register("lab", labels.reset_index().rename(columns={"index": "row"}))
    con.register("fx", fixes)
    df = con.execute("""
        SELECT l.row, COUNT(f.seq) AS n
        FROM lab l LEFT JOIN fx f
          ON f.cell = l.cell AND f.arrival_ms <= l.ts_ms
         AND f.event_ms // 60000 > l.ts_ms // 60000 - 60
         AND f.event_ms // 60000 <= l.ts_ms // 60000
        GROUP BY l.row ORDER BY l.row
    """).df()
    return [int(x) for x in df["n"]]


def check_vehicle(got: pd.DataFrame, labels: pd.DataFrame, cell: pd.Series, status: pd.Series,
                  event_ms: pd.Series, who: str) -> list[str]:
    bad = []
    for i in range(len(labels)):
        ev = event_ms.iloc[i]
        if pd.isna(ev):
            want = (None, None, math.nan)
        else:
            want = (cell.iloc[i], status.iloc[i], (labels["ts_ms"][i] - int(ev)) / 1000)
        g = got.iloc[i]
        have = (g["vehicle_cell"], g["vehicle_status"], g["vehicle_fix_age_s"])
        same = ((have[0] if isinstance(have[0], str) else None) == want[0]
                and (have[1] if isinstance(have[1], str) else None) == want[1]
                and ((math.isnan(have[2]) and math.isnan(want[2]))
                     or math.isclose(have[2], want[2], rel_tol=1e-9, abs_tol=1e-9)))
        if not same:
            bad.append(f"{who}: row {i} ts_ms={labels['ts_ms'][i]} "
                       f"vehicle={labels['vehicle_id'][i]}: got {have}, want {want}")
    return bad


@settings(max_examples=60, deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(seed=st.integers(0, 2**32 - 1),
       sizes=st.lists(st.integers(1, 60), min_size=1, max_size=6),
       coarse=st.booleans(), n_labels=st.integers(1, 60))
def test_vehicle_and_cell_fixes_match_asof_joins(tmp_path_factory: pytest.TempPathFactory,
                                                 seed: int, sizes: list[int], coarse: bool,
                                                 n_labels: int) -> None:
    fixes = in_order_stream(seed, sizes, coarse)
    # the stream really is clean: per vehicle, file order = event order, delays within limits
    for _, g in fixes.groupby("vehicle_id"):
        assert g["event_ms"].is_monotonic_increasing and g["event_ms"].is_unique
    assert ((fixes["arrival_ms"] - fixes["event_ms"]).between(-30_000, 300_000)).all()
    labels = label_frame(random.Random(seed + 1), fixes, n_labels)
    got = replay(tmp_path_factory.mktemp("asof"), fixes, labels)
    assert list(got["ts"]) == list(labels["ts"])

    pd_m = pandas_asof(labels, fixes)
    bad = check_vehicle(got, labels, pd_m["cell_fix"], pd_m["status"], pd_m["event_ms"],
                        "merge_asof")
    dk = duckdb_asof(labels, fixes)
    bad += check_vehicle(got, labels, dk["cell_fix"], dk["status"], dk["event_ms"], "duckdb")
    want = duckdb_cell_fixes_60m(labels, fixes)
    bad += [f"cell_fixes_60m row {i} ts_ms={labels['ts_ms'][i]} cell={labels['cell'][i]}: "
            f"got {g}, want {w}" for i, (g, w) in enumerate(
                zip(got["cell_fixes_60m"].tolist(), want, strict=True)) if g != w]
    assert not bad, "\n".join(bad[:12])


def test_ties_in_arrival_take_the_last_fix_in_file_order(tmp_path: Path) -> None:
    """Three fixes of one vehicle arrive in the same millisecond; at that moment the vehicle
    is where the last of them (in file order) put it, in all three oracles and in replay."""
    t = 19_675 * DAY_MS + 9 * 3_600_000
    fixes = pd.DataFrame([
        {"vehicle_id": "v0", "event_ms": t - 3_000 + k * 1_000, "arrival_ms": t,
         "lat": BASE_LAT + k * 0.02, "lon": BASE_LON, "status": s}
        for k, s in enumerate(["vacant", "occupied", "offline"])
    ])
    fixes["seq"] = range(3)
    fixes["event_ts"] = fixes["event_ms"] / 1000
    fixes["arrival_ts"] = fixes["arrival_ms"] / 1000
    fixes["cell"] = [h3.latlng_to_cell(a, b, 8) for a, b in zip(fixes["lat"], fixes["lon"],
                                                              strict=True)]
    labels = pd.DataFrame([{"ts": (t + d) / 1000, "ts_ms": t + d, "vehicle_id": "v0",
                            "cell": fixes["cell"][2]} for d in (-1, 0)])
    got = replay(tmp_path, fixes, labels)
    assert pd.isna(got["vehicle_cell"][0]) and got["cell_fixes_60m"][0] == 0
    assert (got["vehicle_cell"][1], got["vehicle_status"][1]) == (fixes["cell"][2], "offline")
    assert got["vehicle_fix_age_s"][1] == 1.0
    assert got["cell_fixes_60m"][1] == 1
    pd_m = pandas_asof(labels, fixes)
    dk = duckdb_asof(labels, fixes)
    assert pd_m["status"][1] == dk["status"][1] == "offline"
    assert not check_vehicle(got, labels, pd_m["cell_fix"], pd_m["status"], pd_m["event_ms"],
                             "merge_asof")
    assert not check_vehicle(got, labels, dk["cell_fix"], dk["status"], dk["event_ms"], "duckdb")
    assert duckdb_cell_fixes_60m(labels, fixes) == [0, 1]
