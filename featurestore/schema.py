"""The position message ("fix"): its schema, decoding from JSON bytes and table rows, rejections.

Every timestamp is carried as integer epoch milliseconds (finer precision is rounded to the
nearest millisecond), so that live and replay compare and sum times exactly.
"""

from __future__ import annotations

import datetime as dt
import math
import re
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Annotated, Any, Literal

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


def to_epoch_ms(value: Any) -> int:
    """Epoch seconds (int/float), ISO 8601 text with a zone, or an aware datetime -> epoch ms."""
    kind = type(value)
    if kind is float or kind is int:
        x = float(value)
        if not math.isfinite(x):
            raise ValueError("timestamp must be finite")
        ms = round(x * 1000.0)
    elif isinstance(value, bool):
        raise ValueError("a boolean is not a timestamp")
    elif isinstance(value, (int, float)):
        x = float(value)
        if not math.isfinite(x):
            raise ValueError("timestamp must be finite")
        ms = round(x * 1000.0)
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
        raise ValueError("timestamp outside 2000-01-01 .. 2100-01-01 (seconds expected)")
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
    lat: Annotated[float, Field(ge=-90.0, le=90.0, allow_inf_nan=False, strict=True)]
    lon: Annotated[float, Field(ge=-180.0, le=180.0, allow_inf_nan=False, strict=True)]
    status: Status
    arrival_ms: Annotated[EpochMs, Field(validation_alias="arrival_ts")]
    speed_mps: Annotated[float, Field(ge=0.0, allow_inf_nan=False, strict=True)] | None = None
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


def validate_mapping(d: Mapping[str, Any], raw: bytes) -> Fix | Rejection:
    """Validate one decoded message or table row (with ``arrival_ts``) into a Fix or a Rejection."""
    try:
        return _FIX.validate_python(d)
    except ValidationError as exc:
        return _reject_validation(exc, raw, d)


def decode_json(raw: bytes, arrival_ms: int | None = None) -> Fix | Rejection:
    """Decode JSON bytes. ``arrival_ms`` (the record timestamp live) overrides any arrival_ts."""
    if len(raw) > MAX_MESSAGE_BYTES:
        return Rejection(MALFORMED, f"message of {len(raw)} bytes exceeds {MAX_MESSAGE_BYTES}",
                         raw, None, arrival_ms)
    try:
        d = orjson.loads(raw)
    except orjson.JSONDecodeError as exc:
        return Rejection(MALFORMED, f"not valid JSON: {exc}", raw, None, arrival_ms)
    if not isinstance(d, dict):
        return Rejection(MALFORMED, f"a JSON {type(d).__name__} is not a message object",
                         raw, None, arrival_ms)
    if arrival_ms is not None:
        d["arrival_ts"] = arrival_ms / 1000
    return validate_mapping(d, raw)


def row_raw(row: Mapping[str, Any]) -> bytes:
    """The raw form kept for a table row: its cells as JSON (text cells stay text)."""
    return orjson.dumps(
        {k: (v.isoformat() if isinstance(v, dt.datetime) else v) for k, v in row.items()},
        option=orjson.OPT_NON_STR_KEYS,
        default=str,
    )


def decode_row(row: Mapping[str, Any], original: Mapping[str, Any] | None = None
               ) -> Fix | Rejection:
    """Validate a table row (Parquet/CSV/JSON Lines columns). On rejection the raw form kept
    is ``original`` (the row as read, e.g. CSV text cells) or else ``row``, as JSON."""
    result = validate_mapping(row, b"")
    if isinstance(result, Rejection):
        return Rejection(result.reason, result.detail,
                         row_raw(original if original is not None else row),
                         result.vehicle_id, result.arrival_ms)
    return result


def decode_record(key: bytes | None, value: bytes, timestamp_ms: int | None) -> Fix | Rejection:
    """Decode a live record: the JSON value with ``arrival_ts`` = the record timestamp, and its
    key, which must be the message's vehicle_id (the key decides the partition, and one
    vehicle's fixes must stay in one partition, in order)."""
    if timestamp_ms is None:
        return Rejection(INVALID_PREFIX + "arrival_ts", "arrival_ts: the record has no timestamp",
                         value)
    out = decode_json(value, arrival_ms=timestamp_ms)
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
