"""The decode shortcut equals the pydantic schema on every input (property-based, hypothesis).

``decode_record`` / ``decode_json`` / ``decode_row`` / ``decode_records`` take the common,
certainly-valid message shape through a shortcut (msgspec + plain checks) and leave everything
else to the pydantic schema. The reference here is the same call with ``fast=False`` (pydantic
only). Results must be equal: a Fix with every field equal and floats bit for bit, or a
Rejection with the same reason, detail, raw bytes, vehicle_id and arrival_ms; an input that
makes the reference raise must raise the same exception type.

Messages are written as JSON text by hand, so that number literals (-0, 1E+2, 1e-400,
30-digit integers, long mantissas), escapes, whitespace and duplicate keys vary, and are then
broken (truncated, BOM, bytes that are not UTF-8, deep nesting, the 16 KiB limit, key and
timestamp faults).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
import struct
from typing import Any

import orjson
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from featurestore import schema
from featurestore.schema import (
    MAX_MESSAGE_BYTES,
    MAX_TS_MS,
    MIN_TS_MS,
    STATUSES,
    Fix,
    Rejection,
    decode_json,
    decode_record,
    decode_records,
    decode_row,
)
from ingest.citysim import CityConfig, simulate
from ingest.records import SourceRecord

# --- comparing results ------------------------------------------------------------------------


def _same_value(a: Any, b: Any) -> bool:
    if type(a) is not type(b):
        return False
    if isinstance(a, float):
        return struct.pack("<d", a) == struct.pack("<d", b)  # -0.0 differs from 0.0 here
    return a == b


def _outcome(call: Any) -> Any:
    try:
        return call()
    except Exception as exc:  # noqa: BLE001 - the exception type is what is compared
        return ("raised", type(exc))


def assert_same(got: Any, want: Any) -> None:
    assert type(got) is type(want), (got, want)
    if isinstance(want, (Fix, Rejection)):
        for f in dataclasses.fields(want):
            a, b = getattr(got, f.name), getattr(want, f.name)
            assert _same_value(a, b), (f.name, a, b, got, want)
    else:
        assert got == want


def check_record(key: bytes | None, value: bytes, ts: int | None) -> Any:
    """Every fast entry point against the pydantic-only reference; returns the reference."""
    want = _outcome(lambda: decode_record(key, value, ts, fast=False))
    assert_same(_outcome(lambda: decode_record(key, value, ts)), want)
    batch = _outcome(lambda: decode_records([SourceRecord("t:0", 0, ts, key, value)]))
    assert_same(batch if isinstance(batch, tuple) else batch[0], want)
    want_json = _outcome(lambda: decode_json(value, ts, fast=False))
    assert_same(_outcome(lambda: decode_json(value, ts)), want_json)
    unkeyed = _outcome(lambda: decode_records([SourceRecord("f", 0, ts, key, value)], False))
    assert_same(unkeyed if isinstance(unkeyed, tuple) else unkeyed[0], want_json)
    try:
        d = orjson.loads(value)
    except orjson.JSONDecodeError:
        d = None
    if isinstance(d, dict):  # the same message as a table row (replay's JSON Lines reader)
        assert_same(_outcome(lambda: decode_row(dict(d))),
                    _outcome(lambda: decode_row(dict(d), fast=False)))
    return want


# --- writing JSON text by hand ----------------------------------------------------------------

ID_CHARS = "ABCXYZabcxyz0189_.:-"
WS = st.sampled_from(["", "", "", " ", "\t", "\n", "\r\n", "  "])
ODD_WS = st.sampled_from(["\x0c", "\xa0", "\u2028", "\x0b"])  # not JSON whitespace


@st.composite
def number_text(draw: Any, value: float | int) -> str:
    """``value`` as one of several JSON number spellings."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    how = draw(st.sampled_from(["repr", "fixed", "exp", "EXP", "long"]))
    if how == "repr":
        return repr(value)
    if how == "fixed":
        return f"{value:.{draw(st.integers(0, 12))}f}"
    if how == "exp":
        return f"{value:.{draw(st.integers(0, 17))}e}"
    if how == "EXP":
        return f"{value:.{draw(st.integers(0, 17))}E}".replace("E+", "E")
    return f"{value:.25f}"


LITERALS = st.one_of(
    st.sampled_from(["-0", "0", "-0.0", "0.0", "1e400", "-1e400", "1e-400", "-1e-400", "1E2",
                     "90", "-90", "90.0", "90.00000000000000001", "-90.0000000000000001",
                     "180", "180.00000000000001", "123456789012345678901234567890",
                     "18446744073709551615", "18446744073709551616", "9007199254740993",
                     "1e308", "1.7976931348623157e308", "5e-324", "946684800", "946684799.9995",
                     "946684799.9994999", "4102444799.9994", "4102444799.9995", "4102444800",
                     "01", "1.", ".5", "+1", "NaN", "Infinity", "-", "1e", "0x10", "1_000"]),
    st.from_regex(r"-?(0|[1-9][0-9]{0,24})(\.[0-9]{1,24})?([eE][+-]?[0-9]{1,3})?",
                  fullmatch=True),
)


@st.composite
def string_text(draw: Any, value: str) -> str:
    """``value`` as a JSON string; sometimes one character, or all, written as escapes."""
    escape = draw(st.sampled_from(["none"] * 6 + ["one", "all"]))
    at = draw(st.integers(0, max(0, len(value) - 1))) if escape == "one" else -1
    out = []
    for i, ch in enumerate(value):
        if ch in '"\\' or ord(ch) < 0x20 or escape == "all" or i == at:
            out.append(f"\\u{ord(ch):04x}" if ord(ch) < 0x10000 else
                       orjson.dumps(ch).decode()[1:-1])
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def timestamp_values(lo_s: float = MIN_TS_MS / 1000, hi_s: float = MAX_TS_MS / 1000) -> Any:
    zones = st.sampled_from([dt.timezone.utc, dt.timezone(dt.timedelta(hours=2)),
                             dt.timezone(dt.timedelta(hours=-9, minutes=-30))])
    aware = st.datetimes(min_value=dt.datetime(1999, 12, 31), max_value=dt.datetime(2100, 1, 2),
                         timezones=zones)
    return st.one_of(
        st.floats(lo_s - 1, hi_s + 1, allow_nan=False),
        st.floats(lo_s, hi_s).map(lambda x: round(x, 3)),
        st.integers(int(lo_s) - 2, int(hi_s) + 2),
        st.sampled_from([lo_s, hi_s, lo_s - 0.0005, lo_s - 0.0004, hi_s - 0.0005, hi_s - 0.0006,
                         1780272000000, 0, -1.5, 1e300, -0.0]),
        aware.map(lambda t: t.isoformat()),
        aware.map(lambda t: t.replace(tzinfo=None).isoformat()),  # no zone: invalid
        aware.map(lambda t: " " + t.isoformat().replace("+00:00", "Z") + " "),
        st.sampled_from(["yesterday", "", "NaN", "2026-13-45T99:00", True, None]),
    )


def coordinate_values(limit: float) -> Any:
    return st.one_of(
        st.floats(-limit, limit),
        st.floats(-limit * 1.5, limit * 1.5, allow_nan=False, allow_infinity=False),
        st.integers(-int(limit) - 1, int(limit) + 1),
        st.sampled_from([limit, -limit, -0.0, 0.0, 0, limit + 1e-9, math.nextafter(limit, 1e9),
                         2**60 + 1]),
        st.sampled_from([True, False, None, "12.5", [1.0]]),
    )


IDS = st.one_of(
    st.text(ID_CHARS, min_size=1, max_size=64),
    st.text(ID_CHARS, min_size=1, max_size=63).map(lambda v: v + "\n"),
    st.sampled_from(["x" * 64, "x" * 65, "", "veh-1\n", "\nveh-1", "veh 1", "véh-1", "veh-\u0661",
                     "veh-1\x00"]),
    st.text(max_size=8),
    st.sampled_from([42, True, None, ["veh-1"]]),
)

SPEEDS = st.one_of(
    st.floats(-5, 80), st.floats(allow_nan=False, allow_infinity=False),
    st.integers(-3, 100), st.sampled_from([0, -0.0, 0.0, 2**53, 2**53 + 1, 2**64 - 1, 1e308]),
    st.sampled_from([True, "fast", None]),
)

JSON_LEAVES = st.one_of(st.none(), st.booleans(), st.integers(-2**63, 2**64 - 1),
                        st.floats(allow_nan=False, allow_infinity=False), st.text(max_size=10))
EXTRA_VALUES = st.recursive(JSON_LEAVES, lambda inner: st.one_of(
    st.lists(inner, max_size=3), st.dictionaries(st.text(max_size=5), inner, max_size=3)),
    max_leaves=6)


@st.composite
def value_text(draw: Any, value: Any) -> str:
    if value is None:
        return "null"
    if isinstance(value, (bool, int, float)):
        return draw(number_text(value))
    if isinstance(value, str):
        return draw(string_text(value))
    return orjson.dumps(value).decode()


VALID_IDS = st.text(ID_CHARS, min_size=1, max_size=64)
TIMESTAMPS = timestamp_values()
LATS = coordinate_values(90.0)
LONS = coordinate_values(180.0)
COMMON = {  # the shape of almost every real message
    "vehicle_id": VALID_IDS, "event_ts": st.floats(1.7e9, 1.8e9), "lat": st.floats(-90, 90),
    "lon": st.floats(-180, 180), "status": st.sampled_from(STATUSES),
    "speed_mps": st.floats(0, 60), "trip_id": st.one_of(st.none(), VALID_IDS),
    "arrival_ts": st.floats(1.7e9, 1.8e9),
}
ANY = {
    "vehicle_id": IDS, "event_ts": TIMESTAMPS, "lat": LATS, "lon": LONS,
    "status": st.sampled_from([*STATUSES, "parked", "VACANT", "", 1, None]),
    "speed_mps": SPEEDS, "trip_id": st.one_of(IDS, VALID_IDS), "arrival_ts": TIMESTAMPS,
}
NAMES = list(COMMON)
OPTIONAL = ["speed_mps", "trip_id", "arrival_ts"]
EXTRA_NAMES = st.sampled_from(["heading", "event_ms", "arrival_ms", "x", "é"])
DUPLICATE_VALUES = st.one_of(st.floats(-90, 90), IDS)
ANY_WS = st.one_of(WS, ODD_WS)


@st.composite
def messages(draw: Any) -> tuple[bytes, str | None]:
    """A message as JSON bytes, and its vehicle_id when it is a str."""
    # the common shape with no, one, two or every field drawn from anything (faults)
    faults = draw(st.sampled_from([0, 0, 0, 0, 0, 1, 1, 1, 2, 8]))
    wild = set(draw(st.lists(st.sampled_from(NAMES), min_size=faults, max_size=faults,
                             unique=True)))
    fields = {name: draw((ANY if name in wild else COMMON)[name]) for name in NAMES}
    for name in draw(st.lists(st.sampled_from(OPTIONAL), max_size=3, unique=True)):
        del fields[name]  # optional fields left out (arrival_ts: the record's time is used)
    if faults and draw(st.booleans()):
        del fields[draw(st.sampled_from(sorted(fields)))]  # any field missing
    items: list[tuple[str, str]] = []
    for name, value in fields.items():
        if draw(st.integers(0, 9)) == 0 and isinstance(value, (int, float)):
            items.append((name, draw(LITERALS)))  # any number spelling, valid or not
        else:
            items.append((name, draw(value_text(value))))
    for _ in range(draw(st.integers(0, 2))):  # extra fields
        items.insert(draw(st.integers(0, len(items))),
                     (draw(EXTRA_NAMES), orjson.dumps(draw(EXTRA_VALUES)).decode()))
    if items and draw(st.integers(0, 5)) == 0:  # a duplicate key: the last one wins
        name = draw(st.sampled_from([n for n, _ in items]))
        items.insert(draw(st.integers(0, len(items))),
                     (name, draw(value_text(draw(DUPLICATE_VALUES)))))
    ws = draw(ANY_WS if draw(st.integers(0, 19)) == 0 else WS)
    parts = [f"{ws}{draw(string_text(n))}{ws}:{ws}{v}{ws}" for n, v in items]
    text = ws + "{" + ",".join(parts) + "}" + ws
    vid = fields.get("vehicle_id")
    return text.encode("utf-8", "surrogatepass"), vid if isinstance(vid, str) else None


@st.composite
def broken(draw: Any, raw: bytes) -> bytes:
    """``raw`` as it is, or broken in one of several ways."""
    how = draw(st.sampled_from(["as is"] * 12 + ["truncate", "bom", "bad byte", "replace byte",
                                                  "deep", "pad to limit", "array", "empty"]))
    if how == "as is":
        return raw
    if how == "truncate":
        return raw[: draw(st.integers(0, max(0, len(raw) - 1)))]
    if how == "bom":
        return b"\xef\xbb\xbf" + raw
    if how in ("bad byte", "replace byte"):
        at = draw(st.integers(0, len(raw)))
        byte = draw(st.sampled_from([b"\xff", b"\xc3", b"\xed\xa0\x80", b"\x00", b"\x80"])
                    if how == "bad byte" else st.binary(min_size=1, max_size=1))
        return raw[:at] + byte + raw[at + (how == "replace byte"):]
    if how == "deep":
        depth = draw(st.sampled_from([3, 200, 1100]))
        return raw.rstrip()[:-1] + b',"deep":' + b"[" * depth + b"]" * depth + b"}"
    if how == "pad to limit":  # whitespace keeps it valid: exactly at the limit, one over it
        return raw + b" " * (MAX_MESSAGE_BYTES - len(raw) + draw(st.sampled_from([0, 1])))
    if how == "array":
        return b"[" + raw + b"]"
    return b""


@st.composite
def records(draw: Any) -> tuple[bytes | None, bytes, int | None]:
    raw, vid = draw(messages())
    value = draw(broken(raw))
    key_kind = draw(st.sampled_from(["vid"] * 8 + ["none", "other", "prefix"]))
    key = {"vid": vid.encode("utf-8", "surrogatepass") if vid is not None else b"veh-1",
           "none": None, "other": b"veh-0001",
           "prefix": (vid or "v").encode("utf-8", "surrogatepass") + b" "}[key_kind]
    ts = draw(st.integers(1_700_000_000_000, 1_800_000_000_000) if draw(st.integers(0, 5)) else
              st.sampled_from([None, -1, 0, MIN_TS_MS, MIN_TS_MS - 1, MAX_TS_MS - 1, MAX_TS_MS]))
    return key, value, ts


# --- the properties ---------------------------------------------------------------------------

FAST = settings(max_examples=300, suppress_health_check=[HealthCheck.too_slow,
                                                         HealthCheck.data_too_large])


@FAST
@given(records())
def test_fast_path_equals_pydantic_on_random_and_broken_records(
        rec: tuple[bytes | None, bytes, int | None]) -> None:
    check_record(*rec)


@settings(max_examples=40, suppress_health_check=[HealthCheck.too_slow,
                                                HealthCheck.data_too_large])
@given(st.lists(records(), max_size=8))
def test_batch_equals_one_by_one(recs: list[tuple[bytes | None, bytes, int | None]]) -> None:
    srs = [SourceRecord("t:0", i, ts, key, value) for i, (key, value, ts) in enumerate(recs)]
    for got, (key, value, ts) in zip(decode_records(srs), recs, strict=True):
        assert_same(got, decode_record(key, value, ts, fast=False))


@settings(max_examples=200)
@given(st.dictionaries(st.sampled_from(["vehicle_id", "event_ts", "lat", "lon", "status",
                                        "speed_mps", "trip_id", "arrival_ts", "extra"]),
                       st.one_of(IDS, TIMESTAMPS, LONS, SPEEDS,
                                 st.sampled_from(STATUSES),
                                 st.datetimes(timezones=st.just(dt.timezone.utc)),
                                 st.just(float("nan")), st.just(float("inf")),
                                 st.integers(10**300, 10**400))))
def test_rows_equal_pydantic(row: dict[str, Any]) -> None:
    """Table rows (Python values: datetimes, NaN, infinities, huge ints) through decode_row."""
    assert_same(_outcome(lambda: decode_row(dict(row))),
                _outcome(lambda: decode_row(dict(row), fast=False)))


# --- named cases and the demo day -------------------------------------------------------------

BASE = ('"vehicle_id":"veh-1","event_ts":1780272000.25,"status":"vacant",'
        '"arrival_ts":1780272001.0')


@pytest.mark.parametrize("body", [
    '"lat":-0,"lon":1', '"lat":-0.0,"lon":-0', '"lat":1,"lat":2,"lon":1', '"lat":1,"lon":1e400',
    '"lat":1,"lon":1,"speed_mps":123456789012345678901234567890',
    '"lat":1,"lon":1,"speed_mps":-1e-400', '"lat":1,"lon":1,"vehicle\\u005fid":"veh-2"',
    '"lat":1,"lon":1,"trip_id":"\\ud800"', '"lat":1,"lon":1.5E+2', '"lat":90,"lon":-180',
    '"lat":1,"lon":1,"speed_mps":null,"trip_id":null', '"lat":1,"lon":1,"arrival_ts":"x"',
    '"lat":1,"lon":1,"event_ts":1e308', '"lat":1,"lon":1,"event_ts":"2026-06-01T00:00:00Z"',
])
def test_named_edge_cases(body: str) -> None:
    raw = ("{" + BASE + "," + body + "}").encode()
    d = orjson.loads(raw) if body != '"lat":1,"lon":1e400' and "ud800" not in body else {}
    vid = d.get("vehicle_id", "veh-1")
    check_record(vid.encode(), raw, 1780272001500)


EDGES: dict[str, list[Any]] = {
    "vehicle_id": ["x" * 64, "x" * 65, "", "veh-1\n", "\nveh-1", "veh 1", "véh-1", "veh-\u0661",
                   "A_b.c:d-9", 42, True, None],
    "event_ts": [MIN_TS_MS / 1000, MIN_TS_MS / 1000 - 0.0005, MIN_TS_MS / 1000 - 0.0004,
                 MAX_TS_MS / 1000, MAX_TS_MS / 1000 - 0.0005, MAX_TS_MS / 1000 - 0.0006,
                 MIN_TS_MS // 1000, MIN_TS_MS // 1000 - 1, 1780272000000, 1e308, -1e308, -0.0,
                 "2026-06-01T00:00:00Z", "2026-06-01T02:00:00.5+02:00", "2026-06-01T00:00:00",
                 " 2026-06-01T00:00:00Z ", "yesterday", "", True, None],
    "lat": [90.0, -90.0, 90, -90, math.nextafter(90.0, 100.0), math.nextafter(-90.0, -100.0),
            90 + 1e-9, 91, -0.0, 0.0, 0, 2**60 + 1, True, None, "1.5"],
    "lon": [180.0, -180.0, 180, -180, math.nextafter(180.0, 200.0),
            math.nextafter(-180.0, -200.0), 180 + 1e-9, -0.0, False, "1.5"],
    "status": ["occupied", "offline", "parked", "VACANT", "vacant ", "", 1, None],
    "speed_mps": [0, 0.0, -0.0, -1e-300, -0.5, -1, 2**53, 2**53 + 1, 2**64 - 1, 1e308, True,
                  None, "1"],
    "trip_id": ["T-1", "x" * 64, "x" * 65, "", "T 1", "T-1\n", 7, None],
    "arrival_ts": [MIN_TS_MS / 1000, MAX_TS_MS / 1000, "2026-06-01T00:00:00Z", None, "x", True],
}
GOOD = {"vehicle_id": "veh-1", "event_ts": 1780272000.25, "lat": -33.2, "lon": -20.6,
        "status": "vacant", "speed_mps": 4.5, "trip_id": "T-1", "arrival_ts": 1780272001.0}


@pytest.mark.parametrize("name,value", [(n, v) for n, vs in EDGES.items() for v in vs])
def test_each_field_at_its_edges(name: str, value: Any) -> None:
    """A good message with one field at an edge value: as a record (key = its vehicle_id,
    and a wrong key), as JSON without a record timestamp, and as a row."""
    msg = {**GOOD, name: value}
    raw = orjson.dumps(msg)
    vid = msg["vehicle_id"]
    key = vid.encode() if isinstance(vid, str) else b"veh-1"
    check_record(key, raw, 1780272001500)
    check_record(b"veh-2", raw, 1780272001500)
    check_record(key, raw, None)
    check_record(key, orjson.dumps({k: v for k, v in msg.items() if k != "arrival_ts"}), None)


def test_huge_timestamp_is_a_rejection_not_a_crash() -> None:
    # 1e308 s * 1000 overflows to infinity: once an OverflowError out of decode
    got = decode_json(("{" + BASE + ',"lat":1,"lon":1,"event_ts":1e308}').encode())
    assert isinstance(got, Rejection)
    assert (got.reason, got.detail) == (
        "invalid:event_ts",
        "event_ts: Value error, timestamp outside 2000-01-01 .. 2100-01-01 (seconds expected)")


def test_new_fix_is_a_real_frozen_fix() -> None:
    args = ("veh-1", 1780272000250, -0.0, 2.5, "vacant", 1780272001000, None, "T-1")
    fix = schema._new_fix(*args)
    assert type(fix) is Fix and fix == Fix(*args) and hash(fix) == hash(Fix(*args))
    with pytest.raises(dataclasses.FrozenInstanceError):
        fix.lat = 1.0  # type: ignore[misc]


def test_demo_day_agrees_and_takes_the_shortcut_for_every_valid_message() -> None:
    lines = list(simulate(CityConfig(seed=7, vehicles=12, hours=1.0, broken_share=0.05)))
    recs = []
    for i, line in enumerate(lines):
        try:
            vid = orjson.loads(line).get("vehicle_id")
        except (orjson.JSONDecodeError, AttributeError):
            vid = None
        recs.append(SourceRecord("t:0", i, 1780272000000 + i,
                                 vid.encode() if isinstance(vid, str) else None, line))
    want = [decode_record(r.key, r.value, r.timestamp_ms, fast=False) for r in recs]
    for got, ref in zip(decode_records(recs), want, strict=True):
        assert_same(got, ref)
    valid = sum(isinstance(w, Fix) for w in want)
    shortcut = sum(isinstance(schema._certain_json(r.value, r.timestamp_ms), Fix) for r in recs)
    # the broken messages (5 % here) are all rejected; every valid one takes the shortcut
    assert len(recs) - valid == sum(isinstance(w, Rejection) for w in want) > 0
    assert shortcut == valid
