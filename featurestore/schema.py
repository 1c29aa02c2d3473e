"""The position message ("fix"): its schema, decoding from JSON bytes and table rows, rejections.

Every timestamp is carried as integer epoch milliseconds (finer precision is rounded to the
nearest millisecond), so that live and replay compare and sum times exactly.
"""

from __future__ import annotations

import datetime as dt
import math
import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, fields
from typing import Annotated, Any, Literal, Protocol

import msgspec
import orjson
from pydantic import BeforeValidator, Field, TypeAdapter, ValidationError

STATUSES = ("vacant", "occupied", "offline")
Status = Literal["vacant", "occupied", "offline"]
FIELDS = ("vehicle_id", "event_ts", "lat", "lon", "status", "speed_mps", "trip_id", "arrival_ts")
KEY_FIELD = "key"  # the live record's key: must equal the message's vehicle_id
REQUIRED = ("vehicle_id", "event_ts", "lat", "lon", "status", "arrival_ts")

# Reasons (machine-readable). invalid:<field> is built from the failing field's name.
MALFORMED = "malformed"
TOO_LATE = "too_late"
FROM_FUTURE = "from_future"
DUPLICATE = "duplicate"
INVALID_PREFIX = "invalid:"
REASONS = (MALFORMED, *(INVALID_PREFIX + f for f in (*FIELDS, KEY_FIELD)), TOO_LATE, FROM_FUTURE,
           DUPLICATE)

ID_PATTERN = r"^[A-Za-z0-9_.:\-]{1,64}$"
_ID_RE = re.compile(ID_PATTERN)
MIN_TS_MS = 946_684_800_000  # 2000-01-01T00:00:00Z: earlier epoch values are taken as unit errors
MAX_TS_MS = 4_102_444_800_000  # 2100-01-01T00:00:00Z
MAX_MESSAGE_BYTES = 16_384
LAT_MIN, LAT_MAX = -90.0, 90.0  # degrees, both ends allowed
LON_MIN, LON_MAX = -180.0, 180.0
SPEED_MIN = 0.0  # m/s; speed_mps must also be finite
_INF = math.inf
_OUT_OF_RANGE = "timestamp outside 2000-01-01 .. 2100-01-01 (seconds expected)"


def to_epoch_ms(value: Any) -> int:
    """Epoch seconds (int/float), ISO 8601 text with a zone, or an aware datetime -> epoch ms."""
    kind = type(value)
    if kind is float:  # the common case first: the same steps as below, when nothing fails
        x = value * 1000.0
        if -_INF < x < _INF:
            ms = round(x)
            if MIN_TS_MS <= ms < MAX_TS_MS:
                return ms
    if kind is float or kind is int or (kind is not bool and isinstance(value, (int, float))):
        try:
            x = float(value)
        except OverflowError:  # an int beyond any float
            raise ValueError(_OUT_OF_RANGE) from None
        if not math.isfinite(x):
            raise ValueError("timestamp must be finite")
        x *= 1000.0
        if not math.isfinite(x):  # seconds beyond 1.8e305 overflow to infinity here
            raise ValueError(_OUT_OF_RANGE)
        ms = round(x)
    elif kind is bool:
        raise ValueError("a boolean is not a timestamp")
    elif isinstance(value, str):
        try:
            stamp = dt.datetime.fromisoformat(value.strip())
        except ValueError as exc:
            raise ValueError("not epoch seconds or ISO 8601 text") from exc
        ms = _datetime_ms(stamp)
    elif isinstance(value, dt.datetime):
        ms = _datetime_ms(value)
    else:
        raise ValueError(f"unsupported timestamp type {type(value).__name__}")
    if not MIN_TS_MS <= ms < MAX_TS_MS:
        raise ValueError(_OUT_OF_RANGE)
    return ms


def _datetime_ms(stamp: dt.datetime) -> int:
    if stamp.tzinfo is None or stamp.utcoffset() is None:
        raise ValueError("timestamp has no time zone")
    delta = stamp - dt.datetime(1970, 1, 1, tzinfo=dt.timezone.utc)
    return (delta.days * 86_400 + delta.seconds) * 1000 + round(delta.microseconds / 1000)


EpochMs = Annotated[int, BeforeValidator(to_epoch_ms)]
Ident = Annotated[str, Field(pattern=ID_PATTERN, strict=True)]


@dataclass(frozen=True, slots=True)
class Fix:
    """One validated position message."""

    vehicle_id: Ident
    event_ms: Annotated[EpochMs, Field(validation_alias="event_ts")]
    lat: Annotated[float, Field(ge=LAT_MIN, le=LAT_MAX, allow_inf_nan=False, strict=True)]
    lon: Annotated[float, Field(ge=LON_MIN, le=LON_MAX, allow_inf_nan=False, strict=True)]
    status: Status
    arrival_ms: Annotated[EpochMs, Field(validation_alias="arrival_ts")]
    speed_mps: Annotated[float, Field(ge=SPEED_MIN, allow_inf_nan=False, strict=True)] | None = None
    trip_id: Ident | None = None

    def to_record(self) -> dict[str, Any]:
        """The fix as a JSON-ready message (times in epoch seconds)."""
        rec: dict[str, Any] = {
            "vehicle_id": self.vehicle_id,
            "event_ts": self.event_ms / 1000,
            "lat": self.lat,
            "lon": self.lon,
            "status": self.status,
        }
        if self.speed_mps is not None:
            rec["speed_mps"] = self.speed_mps
        if self.trip_id is not None:
            rec["trip_id"] = self.trip_id
        rec["arrival_ts"] = self.arrival_ms / 1000
        return rec


@dataclass(frozen=True, slots=True)
class Rejection:
    """A message that did not become state: its reason, a human detail and the raw input."""

    reason: str
    detail: str
    raw: bytes
    vehicle_id: str | None = None
    arrival_ms: int | None = None


_FIX = TypeAdapter(Fix)

# --- the shortcut for the common valid shape ---------------------------------------------------
# Most messages are valid and look alike. ``_certain`` accepts a message only when every field
# has an exact JSON type and passes the same constants, pattern and timestamp function as the
# schema above; otherwise it answers None ("not sure", never "invalid") and the pydantic schema
# decides, so every rejection comes from one place. tests/test_decode_agreement.py proves the
# two give equal results (floats bit for bit) on random and broken messages.

_id_full = _ID_RE.fullmatch  # as the schema's pattern: '$' never matches before a final '\n'
_known_ids: set[str] = set()  # ids that matched the pattern (a vehicle sends many fixes)
_KNOWN_IDS_MAX = 100_000
_EXACT_INT = 2**53  # an int speed up to this converts to float exactly


def _valid_id(value: Any) -> bool:
    """``value`` is a str matching ID_PATTERN (remembered: a vehicle sends many fixes)."""
    if type(value) is not str:
        return False
    if value in _known_ids:
        return True
    if _id_full(value) is None:
        return False
    if len(_known_ids) >= _KNOWN_IDS_MAX:
        _known_ids.clear()
    _known_ids.add(value)
    return True


class _FixSlots:
    """Fix's slot layout without the frozen __setattr__: ``_new_fix`` fills one and turns it
    into a Fix (``__class__`` assignment between classes of identical slots). Three times
    faster than Fix(...), which sets each field through object.__setattr__."""

    __slots__ = Fix.__slots__

    def __init__(self, vehicle_id: str, event_ms: int, lat: float, lon: float, status: str,
                 arrival_ms: int, speed_mps: float | None, trip_id: str | None) -> None:
        self.vehicle_id = vehicle_id
        self.event_ms = event_ms
        self.lat = lat
        self.lon = lon
        self.status = status
        self.arrival_ms = arrival_ms
        self.speed_mps = speed_mps
        self.trip_id = trip_id


if _FixSlots.__init__.__code__.co_varnames[1:9] != tuple(f.name for f in fields(Fix)):
    raise RuntimeError("_FixSlots.__init__ must take and set every field of Fix, in order")


def _new_fix(vehicle_id: str, event_ms: int, lat: float, lon: float, status: str,
             arrival_ms: int, speed_mps: float | None, trip_id: str | None) -> Fix:
    """Fix(...) of values already validated."""
    fix = _FixSlots(vehicle_id, event_ms, lat, lon, status, arrival_ms, speed_mps, trip_id)
    fix.__class__ = Fix  # type: ignore[assignment]
    return fix  # type: ignore[return-value]


def _certain(vehicle_id: Any, event_ts: Any, lat: Any, lon: Any, status: Any, arrival_ts: Any,
             speed_mps: Any, trip_id: Any) -> Fix | None:
    """The Fix of these field values if they are certainly valid, else None (not sure)."""
    known = _known_ids
    try:
        if (type(status) is not str or status not in STATUSES
                or (vehicle_id not in known and not _valid_id(vehicle_id))):
            return None
        kind = type(lat)
        if not ((kind is float or kind is int) and LAT_MIN <= lat <= LAT_MAX):
            return None  # NaN fails every comparison
        kind = type(lon)
        if not ((kind is float or kind is int) and LON_MIN <= lon <= LON_MAX):
            return None
        if speed_mps is not None:
            kind = type(speed_mps)
            if kind is float:
                if not SPEED_MIN <= speed_mps < _INF:
                    return None
            elif kind is int and SPEED_MIN <= speed_mps <= _EXACT_INT:
                speed_mps = float(speed_mps)
            else:
                return None
        if trip_id is not None and trip_id not in known and not _valid_id(trip_id):
            return None
        event_ms = to_epoch_ms(event_ts)
        arrival_ms = to_epoch_ms(arrival_ts)
    except Exception:  # noqa: BLE001 - not sure: the schema decides (or raises) the same way
        return None
    fix = _FixSlots(vehicle_id, event_ms, float(lat), float(lon), status, arrival_ms, speed_mps,
                    trip_id)
    fix.__class__ = Fix  # as _new_fix does
    return fix  # type: ignore[return-value]


def _certain_fix(d: dict[str, Any]) -> Fix | None:
    """``_certain`` of a decoded message or row (a plain dict)."""
    get = d.get
    return _certain(get("vehicle_id"), get("event_ts"), get("lat"), get("lon"), get("status"),
                    get("arrival_ts"), get("speed_mps"), get("trip_id"))


class _Shape(msgspec.Struct, forbid_unknown_fields=True, gc=False):
    """The common message, decoded straight from JSON bytes. msgspec fails (and the message
    takes the orjson + pydantic path) on any other field, any other type, or invalid JSON;
    what it accepts it reads as orjson does (the agreement test includes the JSON edge cases:
    duplicate keys, escapes, -0, big and tiny exponents, whitespace, BOM, bad UTF-8)."""

    vehicle_id: str
    event_ts: float
    lat: float
    lon: float
    status: str
    arrival_ts: float | None = None
    speed_mps: float | None = None
    trip_id: str | None = None


_decode_shape = msgspec.json.Decoder(_Shape).decode


def _certain_json(raw: bytes, arrival_ms: int | None) -> Fix | None:
    """``_certain`` of JSON bytes (at most MAX_MESSAGE_BYTES); ``arrival_ms`` as decode_json."""
    try:
        m = _decode_shape(raw)
    except Exception:  # noqa: BLE001 - not the common shape: the full path decides
        return None
    return _certain(m.vehicle_id, m.event_ts, m.lat, m.lon, m.status,
                    m.arrival_ts if arrival_ms is None else arrival_ms / 1000,
                    m.speed_mps, m.trip_id)


def _reject_validation(exc: ValidationError, raw: bytes, d: Mapping[str, Any]) -> Rejection:
    err = exc.errors()[0]
    loc = err.get("loc") or ("?",)
    name = str(loc[0])
    detail = f"{name}: {err.get('msg', 'invalid')}"
    if err.get("type") == "missing":
        detail = f"{name}: required field is missing"
    vid = d.get("vehicle_id")
    return Rejection(
        INVALID_PREFIX + name,
        detail,
        raw,
        vid if isinstance(vid, str) and _ID_RE.match(vid) else None,
        _safe_ms(d.get("arrival_ts")),
    )


def _safe_ms(value: Any) -> int | None:
    try:
        return to_epoch_ms(value) if value is not None else None
    except ValueError:
        return None


def validate_mapping(d: Mapping[str, Any], raw: bytes, *, fast: bool = True) -> Fix | Rejection:
    """Validate one decoded message or table row (with ``arrival_ts``) into a Fix or a Rejection.

    ``fast=False`` skips the shortcut for the common valid shape and always runs the pydantic
    schema (the reference the shortcut is tested against); the result is the same."""
    if fast and type(d) is dict:
        fix = _certain_fix(d)
        if fix is not None:
            return fix
    try:
        return _FIX.validate_python(d)
    except ValidationError as exc:
        return _reject_validation(exc, raw, d)


def decode_json(raw: bytes, arrival_ms: int | None = None, *, fast: bool = True
                ) -> Fix | Rejection:
    """Decode JSON bytes. ``arrival_ms`` (the record timestamp live) overrides any arrival_ts."""
    if len(raw) > MAX_MESSAGE_BYTES:
        return Rejection(MALFORMED, f"message of {len(raw)} bytes exceeds {MAX_MESSAGE_BYTES}",
                         raw, None, arrival_ms)
    if fast:
        fix = _certain_json(raw, arrival_ms)
        if fix is not None:
            return fix
    try:
        d = orjson.loads(raw)
    except orjson.JSONDecodeError as exc:
        return Rejection(MALFORMED, f"not valid JSON: {exc}", raw, None, arrival_ms)
    if not isinstance(d, dict):
        return Rejection(MALFORMED, f"a JSON {type(d).__name__} is not a message object",
                         raw, None, arrival_ms)
    if arrival_ms is not None:
        d["arrival_ts"] = arrival_ms / 1000
    return validate_mapping(d, raw, fast=fast)


def row_raw(row: Mapping[str, Any]) -> bytes:
    """The raw form kept for a table row: its cells as JSON (text cells stay text)."""
    return orjson.dumps(
        {k: (v.isoformat() if isinstance(v, dt.datetime) else v) for k, v in row.items()},
        option=orjson.OPT_NON_STR_KEYS,
        default=str,
    )


def decode_row(row: Mapping[str, Any], original: Mapping[str, Any] | None = None, *,
               fast: bool = True) -> Fix | Rejection:
    """Validate a table row (Parquet/CSV/JSON Lines columns). On rejection the raw form kept
    is ``original`` (the row as read, e.g. CSV text cells) or else ``row``, as JSON."""
    result = validate_mapping(row, b"", fast=fast)
    if isinstance(result, Rejection):
        return Rejection(result.reason, result.detail,
                         row_raw(original if original is not None else row),
                         result.vehicle_id, result.arrival_ms)
    return result


def decode_record(key: bytes | None, value: bytes, timestamp_ms: int | None, *,
                  fast: bool = True) -> Fix | Rejection:
    """Decode a live record: the JSON value with ``arrival_ts`` = the record timestamp, and its
    key, which must be the message's vehicle_id (the key decides the partition, and one
    vehicle's fixes must stay in one partition, in order)."""
    if timestamp_ms is None:
        return Rejection(INVALID_PREFIX + "arrival_ts", "arrival_ts: the record has no timestamp",
                         value)
    out = decode_json(value, arrival_ms=timestamp_ms, fast=fast)
    if isinstance(out, Rejection):
        return out
    if key is None:
        return Rejection(INVALID_PREFIX + KEY_FIELD,
                         "key: the record has no key (the key must be the vehicle_id)",
                         value, out.vehicle_id, out.arrival_ms)
    if key != out.vehicle_id.encode():
        shown = key[:80].decode("utf-8", "replace")
        return Rejection(INVALID_PREFIX + KEY_FIELD,
                         f"key: {shown!r} is not the message's vehicle_id {out.vehicle_id!r}",
                         value, out.vehicle_id, out.arrival_ms)
    return out


class RecordLike(Protocol):
    """What ``decode_records`` reads of a record (ingest.records.SourceRecord has these)."""

    @property
    def key(self) -> bytes | None: ...
    @property
    def value(self) -> bytes: ...
    @property
    def timestamp_ms(self) -> int | None: ...


def decode_records(records: Iterable[RecordLike], keyed: bool = True) -> list[Fix | Rejection]:
    """Each record as ``decode_record`` (``keyed``) or ``decode_json(value, timestamp_ms)``
    would decode it, in order, with less work per message for the common valid shape.

    The loop itself only takes what the shortcut accepts; every other record goes through the
    single-record function, so rejections are the same by construction."""
    out: list[Fix | Rejection] = []
    append = out.append
    certain = _certain_json
    limit = MAX_MESSAGE_BYTES
    for r in records:
        value = r.value
        ts = r.timestamp_ms
        fix = None
        if (ts is not None or not keyed) and len(value) <= limit:
            fix = certain(value, ts)
            if fix is not None and keyed and r.key != fix.vehicle_id.encode():
                fix = None
        if fix is None:
            fix = decode_record(r.key, value, ts) if keyed else decode_json(value, ts)
        append(fix)
    return out
