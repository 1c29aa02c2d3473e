"""Decoding and validation: every rejection reason, with raw bytes kept."""

from __future__ import annotations

import orjson
import pytest

from featurestore.schema import (
    MAX_MESSAGE_BYTES,
    REASONS,
    Fix,
    Rejection,
    decode_json,
    decode_row,
    to_epoch_ms,
)

GOOD = {"vehicle_id": "veh-1", "event_ts": 1780272000.25, "lat": -33.2, "lon": -20.6,
        "status": "vacant", "speed_mps": 4.5, "trip_id": "T-1", "arrival_ts": 1780272001.0}


def _msg(**change: object) -> bytes:
    d = {**GOOD, **change}
    return orjson.dumps({k: v for k, v in d.items() if v is not ...})


def test_good_message_decodes_to_milliseconds() -> None:
    fix = decode_json(_msg())
    assert isinstance(fix, Fix)
    assert (fix.event_ms, fix.arrival_ms) == (1780272000250, 1780272001000)
    assert (fix.lat, fix.lon, fix.status, fix.speed_mps, fix.trip_id) == (
        -33.2, -20.6, "vacant", 4.5, "T-1")


def test_record_timestamp_overrides_arrival() -> None:
    fix = decode_json(_msg(arrival_ts=...), arrival_ms=1780272009123)
    assert isinstance(fix, Fix) and fix.arrival_ms == 1780272009123


@pytest.mark.parametrize("text,ms", [
    ("2026-06-01T00:00:00Z", 1780272000000),
    ("2026-06-01T02:00:00.5+02:00", 1780272000500),
    (1780272000, 1780272000000),
    (1780272000.0004, 1780272000000),
    (1780272000.0006, 1780272000001),
])
def test_timestamps(text: object, ms: int) -> None:
    # 2026-06-01T00:00:00Z = 1780272000 epoch seconds (checked with `date -u -d @1780272000`)
    assert to_epoch_ms(text) == ms


CASES = [
    (b"{not json", "malformed"),
    (b"[1, 2, 3]", "malformed"),
    (b'"just text"', "malformed"),
    (b"\xff\xfe\x00", "malformed"),
    (b"{" + b'"pad": "' + b"x" * MAX_MESSAGE_BYTES + b'"}', "malformed"),
    (_msg(vehicle_id=...), "invalid:vehicle_id"),
    (_msg(vehicle_id=""), "invalid:vehicle_id"),
    (_msg(vehicle_id="x" * 65), "invalid:vehicle_id"),
    (_msg(vehicle_id="bad id!"), "invalid:vehicle_id"),
    (_msg(vehicle_id=42), "invalid:vehicle_id"),
    (_msg(event_ts=...), "invalid:event_ts"),
    (_msg(event_ts="yesterday"), "invalid:event_ts"),
    (_msg(event_ts="2026-06-01T00:00:00"), "invalid:event_ts"),  # no zone
    (_msg(event_ts=True), "invalid:event_ts"),
    (_msg(event_ts=1780272000000), "invalid:event_ts"),  # milliseconds by mistake
    (_msg(lat=90.0001), "invalid:lat"),
    (_msg(lat=-91), "invalid:lat"),
    (_msg(lat="-33.2"), "invalid:lat"),
    (_msg(lat=None), "invalid:lat"),
    (_msg(lon=180.5), "invalid:lon"),
    (_msg(lon=False), "invalid:lon"),
    (_msg(status="parked"), "invalid:status"),
    (_msg(status="VACANT"), "invalid:status"),
    (_msg(status=...), "invalid:status"),
    (_msg(speed_mps=-0.1), "invalid:speed_mps"),
    (_msg(speed_mps="fast"), "invalid:speed_mps"),
    (_msg(trip_id="no spaces allowed"), "invalid:trip_id"),
    (_msg(arrival_ts=...), "invalid:arrival_ts"),
]


@pytest.mark.parametrize("raw,reason", CASES)
def test_each_rejection_has_reason_and_raw(raw: bytes, reason: str) -> None:
    got = decode_json(raw)
    assert isinstance(got, Rejection)
    assert got.reason == reason
    assert got.raw == raw
    assert got.reason in REASONS
    assert got.detail


def test_boundaries_accepted() -> None:
    for change in ({"lat": 90}, {"lat": -90.0}, {"lon": 180}, {"lon": -180.0},
                   {"speed_mps": 0}, {"vehicle_id": "A_b.c:d-9" + "x" * 55}):
        assert isinstance(decode_json(_msg(**change)), Fix), change


def test_unknown_fields_are_ignored() -> None:
    assert isinstance(decode_json(_msg(heading=12, extra={"a": 1})), Fix)


def test_row_rejection_keeps_row_as_json() -> None:
    row = {**GOOD, "lat": 123.4}
    got = decode_row(row)
    assert isinstance(got, Rejection) and got.reason == "invalid:lat"
    assert orjson.loads(got.raw)["lat"] == 123.4
    assert got.vehicle_id == "veh-1" and got.arrival_ms == 1780272001000
