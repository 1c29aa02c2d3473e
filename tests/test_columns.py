"""The columnar reader agrees with the per-message schema on every row, broken ones included.

Property-based (hypothesis): random tables of valid, borderline and broken values, in several
column types, decoded by ``replay.columns.decode_batch`` and, as the reference, row by row
through ``featurestore.schema.decode_row`` exactly as the row readers did before the columnar
path existed. Accept/reject, reason, detail, raw bytes and every Fix value must be equal.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from featurestore.schema import MAX_TS_MS, MIN_TS_MS, Fix, Rejection, decode_row, to_epoch_ms
from replay.columns import certain_mask, decode_batch
from replay.readers import iter_file

T0 = 1_780_272_000.0  # 2026-06-01T00:00:00Z
LO_S, HI_S = MIN_TS_MS / 1000, MAX_TS_MS / 1000

def mostly(valid: st.SearchStrategy, broken: st.SearchStrategy) -> st.SearchStrategy:
    """Valid values most of the time (so whole rows pass), a broken or borderline one at
    times."""
    return st.integers(0, 9).flatmap(lambda k: broken if k == 0 else valid)


ids = mostly(
    st.from_regex(r"[A-Za-z0-9_.:\-]{1,64}", fullmatch=True),
    st.one_of(st.sampled_from(["", "a" * 64, "a" * 65, "veh 1", "veh-1\n", "vé-1", "veh/1",
                               "-", ".:_"]),
              st.text(max_size=70), st.none()))
seconds = mostly(
    st.one_of(st.floats(T0 - 1e6, T0 + 1e6),
              st.builds(lambda k: T0 + k / 2000, st.integers(-10**6, 10**6))),  # half ms
    st.one_of(st.floats(allow_nan=True, allow_infinity=True),
              st.sampled_from([LO_S, LO_S - 0.0005, LO_S - 0.0004, LO_S - 0.001, HI_S,
                               HI_S - 0.0005, HI_S - 0.0006, HI_S - 0.001, -0.0, 0.0, 1.78e9,
                               1.78e12, math.nan, math.inf, -math.inf]),
              st.none()))
lats = mostly(st.floats(-90, 90),
              st.one_of(st.floats(-91, 91), st.floats(allow_nan=True, allow_infinity=True),
                        st.sampled_from([90.0, -90.0, 90.00000000000001, -0.0, math.nan]),
                        st.none()))
lons = mostly(st.floats(-180, 180),
              st.one_of(st.floats(-181, 181), st.floats(allow_nan=True, allow_infinity=True),
                        st.sampled_from([180.0, -180.0, -180.00000000000003, math.inf]),
                        st.none()))
statuses = mostly(st.sampled_from(["vacant", "occupied", "offline"]),
                  st.one_of(st.sampled_from(["Vacant", "", "vacant ", "busy", "OFFLINE"]),
                            st.text(max_size=8), st.none()))
speeds = mostly(st.one_of(st.floats(0, 60), st.none()),
                st.one_of(st.floats(allow_nan=True, allow_infinity=True),
                          st.sampled_from([0.0, -0.0, -1e-300, math.nan])))
trip_ids = st.one_of(st.none(), ids)

row = st.fixed_dictionaries({
    "vehicle_id": ids, "event_ts": seconds, "arrival_ts": seconds, "lat": lats, "lon": lons,
    "status": statuses, "speed_mps": speeds, "trip_id": trip_ids,
})


def _as_int(v: float | None) -> int | None:
    return int(v) if v is not None and math.isfinite(v) and abs(v) < 9e15 else None


def _time_column(values: list[Any], kind: str) -> pa.Array:
    """A time column in one of the types recorded files use."""
    if kind == "float":
        return pa.array(values, pa.float64())
    if kind == "int":  # whole epoch seconds
        return pa.array([_as_int(v) for v in values], pa.int64())
    if kind == "text":
        return pa.array([None if v is None else repr(v) for v in values], pa.string())
    ms = [round(v * 1000) if v is not None and math.isfinite(v) and abs(v) < 2.5e11 else None
          for v in values]
    return pa.array(ms, pa.int64()).cast(pa.timestamp("ms", tz="UTC" if kind == "ts" else None))


@st.composite
def tables(draw: st.DrawFn) -> tuple[pa.Table, int | None]:
    rows = draw(st.lists(row, min_size=1, max_size=30))
    cols: dict[str, pa.Array] = {}
    cols["vehicle_id"] = (pa.array([r["vehicle_id"] for r in rows], pa.string())
                          if draw(st.integers(0, 9)) else
                          pa.array([len(r["vehicle_id"] or "") for r in rows], pa.int64()))
    ev_kind = draw(st.sampled_from(["float", "float", "float", "int", "ts", "naive", "text"]))
    cols["event_ts"] = _time_column([r["event_ts"] for r in rows], ev_kind)
    delay = draw(st.sampled_from([None, None, 0, 2000, 2500]))
    arrival = draw(st.sampled_from(["float", "float", "int", "ts", "absent"]))
    if arrival != "absent":
        cols["arrival_ts"] = _time_column([r["arrival_ts"] for r in rows], arrival)
    for name in ("lat", "lon"):
        vals = [r[name] for r in rows]
        cols[name] = (pa.array(vals, pa.float64()) if draw(st.integers(0, 9)) else
                      pa.array([_as_int(v) for v in vals], pa.int64()))
    cols["status"] = pa.array([r["status"] for r in rows], pa.string())
    speed = draw(st.sampled_from(["float", "float", "absent", "null", "int"]))
    if speed == "float":
        cols["speed_mps"] = pa.array([r["speed_mps"] for r in rows], pa.float64())
    elif speed == "null":
        cols["speed_mps"] = pa.nulls(len(rows), pa.float64())
    elif speed == "int":
        cols["speed_mps"] = pa.array([_as_int(r["speed_mps"]) for r in rows], pa.int64())
    trip = draw(st.sampled_from(["text", "absent", "null"]))
    if trip == "text":
        cols["trip_id"] = pa.array([r["trip_id"] for r in rows], pa.string())
    elif trip == "null":
        cols["trip_id"] = pa.nulls(len(rows), pa.string())
    if draw(st.booleans()):
        cols["extra"] = pa.array(list(range(len(rows))), pa.int64())
    names = list(cols)
    order = draw(st.permutations(names))
    return pa.table({k: cols[k] for k in order}), delay


def _reference(rec: dict[str, Any], delay_ms: int | None) -> Fix | Rejection:
    """The per-row path as the readers ran it: an assumed arrival when missing, then the
    schema."""
    fixed = rec
    if delay_ms is not None and rec.get("arrival_ts") in (None, ""):
        fixed = dict(rec)
        try:
            fixed["arrival_ts"] = (to_epoch_ms(rec.get("event_ts")) + delay_ms) / 1000
        except ValueError:
            pass
    return decode_row(fixed, rec)


def _same(a: Fix | Rejection, b: Fix | Rejection) -> bool:
    if type(a) is not type(b):
        return False
    if isinstance(a, Rejection):
        return a == b
    return all(type(getattr(a, f)) is type(getattr(b, f)) and getattr(a, f) == getattr(b, f)
               for f in Fix.__dataclass_fields__)


def _check(table: pa.Table, delay: int | None) -> tuple[int, int]:
    want = [_reference(rec, delay) for rec in table.to_pylist()]
    got = [v for b in table.to_batches() for v in decode_batch(b, delay)]
    assert len(got) == len(want)
    for i, (g, w) in enumerate(zip(got, want, strict=True)):
        assert _same(g, w), (i, table.slice(i, 1).to_pylist(), g, w)
    fixes = sum(isinstance(w, Fix) for w in want)
    return fixes, len(want) - fixes


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(tables())
def test_columnar_decode_equals_the_schema_on_random_and_broken_rows(case) -> None:
    table, delay = case
    _check(table, delay)


def test_both_outcomes_and_each_fast_rule_are_exercised() -> None:
    """Fixed rows next to each boundary: each is decided as the schema decides it."""
    base = {"vehicle_id": "veh-1", "event_ts": T0, "arrival_ts": T0 + 1.0, "lat": 10.0,
            "lon": 20.0, "status": "vacant", "speed_mps": 3.0, "trip_id": None}
    variants = [{}, {"lat": 90.0}, {"lat": 90.00000000000001}, {"lon": -180.0},
                {"lon": math.nan}, {"speed_mps": -0.0}, {"speed_mps": math.inf},
                {"status": "Vacant"}, {"vehicle_id": "a" * 65}, {"vehicle_id": "v\n"},
                {"trip_id": "t 1"}, {"trip_id": "t-1"}, {"event_ts": LO_S - 0.0005},
                {"event_ts": LO_S - 0.0006}, {"arrival_ts": HI_S - 0.0005},
                {"arrival_ts": None}, {"event_ts": T0 + 0.0025}]
    table = pa.Table.from_pylist([{**base, **v} for v in variants])
    assert _check(table, None) == (7, 10)
    assert _check(table, 2500) == (8, 9)  # the missing arrival is assumed
    got = decode_batch(table.to_batches()[0])
    mask, _ = certain_mask(table.to_batches()[0], None)
    assert mask.tolist() == [isinstance(g, Fix) for g in got]  # each fix took the fast path
    assert got[-1].event_ms == 1_780_272_000_002  # 2.5 ms rounds half to even, as round()
    assert got[12].event_ms == MIN_TS_MS  # 0.5 ms below the window rounds into it
    assert got[14].reason == "invalid:arrival_ts"  # 0.5 ms below the end rounds onto it


def test_parquet_reader_uses_it_and_keeps_rows_and_raw(tmp_path: Path) -> None:
    rows = [{"vehicle_id": f"v{i % 3}", "event_ts": T0 + i, "arrival_ts": T0 + i + 0.5,
             "lat": 10.0 + i / 100, "lon": 20.0, "status": "vacant" if i % 4 else "busy",
             "speed_mps": 1.0, "trip_id": None} for i in range(50)]
    path = tmp_path / "in.parquet"
    pq.write_table(pa.Table.from_pylist(rows), path, row_group_size=16)
    items = list(iter_file(path, source=2, batch_rows=7))
    assert [it.row for it in items] == list(range(50))
    assert all(it.source == 2 for it in items)
    want = [_reference(r, None) for r in pq.read_table(path).to_pylist()]
    assert all(_same(it.value, w) for it, w in zip(items, want, strict=True))
    assert sum(isinstance(it.value, Rejection) for it in items) == 13  # i % 4 == 0: "busy"
