"""Columnar validation of table batches: the rows the schema certainly accepts, at numpy speed.

``decode_batch`` turns an Arrow record batch (Parquet rows) into one ``Fix`` or ``Rejection``
per row, equal to ``featurestore.schema.decode_row`` of each row. A vectorised mask marks
the rows that pass every rule of the message schema for sure (types, the identifier pattern,
ranges, finiteness, the timestamp window, the known statuses); those become ``Fix`` values
built straight from the columns. Every other row (a null, a NaN, an odd type, an unknown
status, a broken identifier) goes through the per-row pydantic path unchanged, so each
rejection, its reason and detail are those of the schema by construction. A column of a type
this module does not handle sends all rows of the batch to the per-row path.

The rules reused from ``featurestore.schema``: the identifier pattern, the statuses, the
timestamp window and the rounding of epoch seconds to milliseconds (``round(x * 1000.0)``,
half to even, as ``np.rint``).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from featurestore.schema import (
    ID_PATTERN,
    MAX_TS_MS,
    MIN_TS_MS,
    STATUSES,
    Fix,
    Rejection,
    decode_row,
    to_epoch_ms,
)

_STATUS_SET = pa.array(STATUSES, pa.string())
_FIX_FIELDS = ("vehicle_id", "event_ms", "lat", "lon", "status", "arrival_ms", "speed_mps",
               "trip_id")


def _fix_maker() -> Any:
    """A function of the eight field values giving the same Fix as ``Fix(...)``, about twice
    as fast: it sets the slots through their descriptors instead of the frozen dataclass's
    ``object.__setattr__`` calls (falls back to ``Fix`` if Fix is not that shape)."""
    slots = getattr(Fix, "__slots__", ())
    if tuple(slots) != _FIX_FIELDS or tuple(Fix.__dataclass_fields__) != _FIX_FIELDS:
        return Fix
    s0, s1, s2, s3, s4, s5, s6, s7 = (Fix.__dict__[n].__set__ for n in _FIX_FIELDS)
    new = object.__new__

    def make(vid: Any, ev: Any, lat: Any, lon: Any, st: Any, arr: Any, sp: Any, trip: Any
             ) -> Fix:
        f = new(Fix)
        s0(f, vid)
        s1(f, ev)
        s2(f, lat)
        s3(f, lon)
        s4(f, st)
        s5(f, arr)
        s6(f, sp)
        s7(f, trip)
        return f

    return make


make_fix = _fix_maker()


def _float_values(arr: pa.Array | None, n: int) -> tuple[np.ndarray, np.ndarray] | None:
    """(values as float64, mask of non-null finite-typed values) for a float64 column;
    None when the column has another type (the rows then take the per-row path)."""
    if arr is None:
        return np.zeros(n), np.zeros(n, dtype=bool)
    if not pa.types.is_float64(arr.type):
        return None
    ok = np.asarray(arr.is_valid().to_numpy(zero_copy_only=False), dtype=bool)
    vals = arr.fill_null(0.0).to_numpy(zero_copy_only=False)
    return vals, ok


def _epoch_ms(arr: pa.Array | None, n: int) -> tuple[np.ndarray, np.ndarray] | None:
    """(epoch ms as int64, mask of values certainly valid as timestamps) for epoch-second
    float64/int64 columns and timestamp[ms] columns with a zone; None for other types."""
    if arr is None:
        return np.zeros(n, dtype=np.int64), np.zeros(n, dtype=bool)
    kind = arr.type
    ok = np.asarray(arr.is_valid().to_numpy(zero_copy_only=False), dtype=bool)
    if pa.types.is_timestamp(kind):
        if kind.unit != "ms" or kind.tz is None:
            return None
        ms = arr.cast(pa.int64()).fill_null(0).to_numpy(zero_copy_only=False)
    elif pa.types.is_float64(kind) or pa.types.is_int64(kind):
        # to_epoch_ms: round(float(x) * 1000.0), halves to even (np.rint), finite only
        x = arr.fill_null(0).to_numpy(zero_copy_only=False).astype(np.float64)
        with np.errstate(invalid="ignore", over="ignore"):
            y = np.rint(x * 1000.0)
            ok &= np.isfinite(y)
            ok &= (y >= MIN_TS_MS) & (y < MAX_TS_MS)
        ms = np.where(ok, y, 0.0).astype(np.int64)
        return ms, ok
    else:
        return None
    ok &= (ms >= MIN_TS_MS) & (ms < MAX_TS_MS)
    return ms, ok


def _ids_ok(arr: pa.Array | None, n: int, optional: bool) -> np.ndarray | None:
    """Mask of identifiers that match the pattern (or are null, when ``optional``)."""
    if arr is None:
        return np.full(n, optional, dtype=bool)
    if not pa.types.is_string(arr.type) and not pa.types.is_large_string(arr.type):
        return None if not (optional and arr.null_count == n) else np.ones(n, dtype=bool)
    matched = pc.match_substring_regex(arr, ID_PATTERN)
    ok = np.asarray(matched.fill_null(optional).to_numpy(zero_copy_only=False), dtype=bool)
    return ok


def certain_mask(batch: pa.RecordBatch, delay_ms: int | None
                 ) -> tuple[np.ndarray, dict[str, Any]] | None:
    """The rows of ``batch`` that the schema certainly accepts, and their converted columns
    (``event_ms``, ``arrival_ms`` as int64 arrays); None when a column's type is not one this
    module handles (every row then takes the per-row path)."""
    n = batch.num_rows
    cols = {name: batch.column(i) for i, name in enumerate(batch.schema.names)}
    vid_ok = _ids_ok(cols.get("vehicle_id"), n, optional=False)
    trip_ok = _ids_ok(cols.get("trip_id"), n, optional=True)
    ev = _epoch_ms(cols.get("event_ts"), n)
    arr = _epoch_ms(cols.get("arrival_ts"), n)
    lat = _float_values(cols.get("lat"), n)
    lon = _float_values(cols.get("lon"), n)
    status = cols.get("status")
    if (vid_ok is None or trip_ok is None or ev is None or arr is None or lat is None
            or lon is None or status is None or not pa.types.is_string(status.type)):
        return None
    speed_col = cols.get("speed_mps")
    if speed_col is not None and not pa.types.is_float64(speed_col.type):
        if speed_col.null_count != n:
            return None
        speed_col = None
    ev_ms, ev_ok = ev
    arr_ms, arr_ok = arr
    if delay_ms is not None:
        # A missing arrival becomes (event ms + delay) / 1000 seconds, validated as usual.
        col = cols.get("arrival_ts")
        missing = (np.ones(n, dtype=bool) if col is None
                   else ~np.asarray(col.is_valid().to_numpy(zero_copy_only=False), dtype=bool))
        if missing.any():
            y = np.rint((ev_ms + delay_ms).astype(np.float64) / 1000.0 * 1000.0)
            assumed_ok = ev_ok & (y >= MIN_TS_MS) & (y < MAX_TS_MS)
            arr_ms = np.where(missing, np.where(assumed_ok, y, 0.0).astype(np.int64), arr_ms)
            arr_ok = np.where(missing, assumed_ok, arr_ok)
    lat_v, lat_ok = lat
    lon_v, lon_ok = lon
    with np.errstate(invalid="ignore"):
        ok = vid_ok & trip_ok & ev_ok & arr_ok
        ok &= lat_ok & (lat_v >= -90.0) & (lat_v <= 90.0)
        ok &= lon_ok & (lon_v >= -180.0) & (lon_v <= 180.0)
        if speed_col is not None:
            sp_valid = np.asarray(speed_col.is_valid().to_numpy(zero_copy_only=False), dtype=bool)
            sp = speed_col.fill_null(0.0).to_numpy(zero_copy_only=False)
            ok &= ~sp_valid | (np.isfinite(sp) & (sp >= 0.0))
    st = pc.is_in(status, value_set=_STATUS_SET).fill_null(False)
    ok &= np.asarray(st.to_numpy(zero_copy_only=False), dtype=bool)
    return ok, {"event_ms": ev_ms, "arrival_ms": arr_ms}


def with_assumed_arrival(row: dict[str, Any], delay_ms: int | None) -> dict[str, Any]:
    if delay_ms is not None and row.get("arrival_ts") in (None, ""):
        try:
            row["arrival_ts"] = (to_epoch_ms(row.get("event_ts")) + delay_ms) / 1000
        except ValueError:
            pass  # the event_ts itself is invalid; validation says so
    return row


def slow_row(rec: Mapping[str, Any], delay_ms: int | None) -> Fix | Rejection:
    """One row through the per-row schema path (as the row readers do)."""
    fixed = rec if delay_ms is None else with_assumed_arrival(dict(rec), delay_ms)
    return decode_row(fixed, rec)


def decode_batch(batch: pa.RecordBatch, delay_ms: int | None = None) -> list[Fix | Rejection]:
    """One Fix or Rejection per row, equal to the per-row schema path on every row."""
    names = batch.schema.names
    lists = [c.to_pylist() for c in batch.columns]
    got = certain_mask(batch, delay_ms)
    if got is None:
        return [slow_row(dict(zip(names, vals, strict=True)), delay_ms)
                for vals in zip(*lists, strict=True)]
    ok, conv = got
    n = batch.num_rows
    by_name = dict(zip(names, lists, strict=True))
    none = [None] * n
    vids = by_name["vehicle_id"]
    lats = by_name["lat"]
    lons = by_name["lon"]
    statuses = by_name["status"]
    speeds = by_name.get("speed_mps", none)
    trips = by_name.get("trip_id", none)
    evs = conv["event_ms"].tolist()
    arrs = conv["arrival_ms"].tolist()
    out: list[Fix | Rejection] = list(map(make_fix, vids, evs, lats, lons, statuses, arrs, speeds,
                                          trips))
    for i in np.flatnonzero(~ok).tolist():  # the rest: the per-row schema path decides
        out[i] = slow_row({k: v[i] for k, v in by_name.items()}, delay_ms)
    return out
