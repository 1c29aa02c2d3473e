"""The Port Veyra generator: determinism, order, geography, traffic rhythm and injected faults."""

from __future__ import annotations

import json
import math
import re
from collections import Counter, defaultdict
from itertools import pairwise

import numpy as np
import pyarrow.parquet as pq
import pytest
from geographiclib.geodesic import Geodesic

from ingest.citysim import (
    BBOX,
    BROKEN_KINDS,
    CITY_NAME,
    COASTLINE,
    PLACES,
    CityConfig,
    expected_counts,
    on_land,
    simulate,
    write_jsonl,
    write_parquet,
)

DAY0 = 1780272000.0  # 2026-06-01T00:00:00Z as epoch seconds (date -u -d 2026-06-01 +%s)
STATUSES = {"vacant", "occupied", "offline"}
GEOD = Geodesic.WGS84  # external geodesic oracle (geographiclib, Karney 2013)

CFG = CityConfig(seed=11, vehicles=100, hours=10.0)


def _valid(o: object) -> bool:
    """A stand-alone validity check, independent of the generator's own code."""
    if not isinstance(o, dict):
        return False

    def num(v: object) -> bool:
        return isinstance(v, (int, float)) and not isinstance(v, bool)

    if not isinstance(o.get("vehicle_id"), str):
        return False
    if not all(num(o.get(k)) for k in ("event_ts", "arrival_ts", "lat", "lon")):
        return False
    if not (-90 <= o["lat"] <= 90 and -180 <= o["lon"] <= 180):
        return False
    if o.get("status") not in STATUSES:
        return False
    if "speed_mps" in o and not (num(o["speed_mps"]) and o["speed_mps"] >= 0):
        return False
    return "trip_id" not in o or isinstance(o["trip_id"], str)


def _parse(line: bytes) -> object:
    try:
        return json.loads(line)
    except (ValueError, UnicodeDecodeError):
        return None


@pytest.fixture(scope="module")
def lines() -> list[bytes]:
    return list(simulate(CFG))


@pytest.fixture(scope="module")
def parsed(lines: list[bytes]) -> list[object]:
    return [_parse(b) for b in lines]


@pytest.fixture(scope="module")
def fixes(parsed: list[object]) -> list[dict]:
    return [o for o in parsed if _valid(o)]


@pytest.fixture(scope="module")
def counts() -> dict[str, int]:
    return expected_counts(CFG)


@pytest.fixture(scope="module")
def tracks(fixes: list[dict]) -> dict[str, list[dict]]:
    """Per vehicle, its fixes in event order, without duplicate copies and fast-clock fixes."""
    seen = set()
    by: dict[str, list[dict]] = defaultdict(list)
    for o in fixes:
        key = (o["vehicle_id"], o["event_ts"])
        if key in seen or o["event_ts"] > o["arrival_ts"]:
            continue
        seen.add(key)
        by[o["vehicle_id"]].append(o)
    for v in by.values():
        v.sort(key=lambda o: o["event_ts"])
    return by


def _transitions(tracks: dict[str, list[dict]], a: str, b: str) -> list[float]:
    """Event hours (from 00:00) of the fixes where a vehicle's status went from a to b."""
    out = []
    for v in tracks.values():
        for p, q in pairwise(v):
            if p["status"] == a and q["status"] == b:
                out.append((q["event_ts"] - DAY0) / 3600.0)
    return out


def test_identity_and_defaults() -> None:
    cfg = CityConfig()
    assert CITY_NAME == "Port Veyra"
    assert (cfg.seed, cfg.vehicles, cfg.day, cfg.fix_interval_s, cfg.hours) == (
        7, 200, "2026-06-01", 15.0, 24.0)
    assert cfg.day_start_ms == 1_780_272_000_000
    assert PLACES["station"] == (-33.2, -20.6)
    assert {"station", "airport", "old_town", "beach"} <= set(PLACES)
    assert sum(name.startswith("suburb_") for name in PLACES) >= 4
    with pytest.raises(ValueError, match="ISO date"):
        CityConfig(day="June 1st")
    with pytest.raises(ValueError, match="hours"):
        CityConfig(hours=0)


def test_same_seed_same_bytes_and_other_seed_differs() -> None:
    small = CityConfig(seed=3, vehicles=15, hours=3.0)
    first = b"\n".join(simulate(small))
    assert first == b"\n".join(simulate(small))
    assert len(first) > 100_000
    assert first != b"\n".join(simulate(CityConfig(seed=4, vehicles=15, hours=3.0)))


def test_geography_against_geodesic_oracle() -> None:
    st, ap = PLACES["station"], PLACES["airport"]
    g = GEOD.Inverse(st[0], st[1], ap[0], ap[1])
    assert 8_500 < g["s12"] < 9_500  # about 9 km out
    assert 225 < g["azi1"] % 360 < 270  # west-southwest
    lat_min, lat_max, lon_min, lon_max = BBOX
    ew = GEOD.Inverse(-33.2, lon_min, -33.2, lon_max)["s12"]
    ns = GEOD.Inverse(lat_min, -20.6, lat_max, -20.6)["s12"]
    assert 13_000 < ew < 16_000 and 11_000 < ns < 13_500
    for name, (lat, lon) in PLACES.items():
        assert on_land(lat, lon), name
    # the coast runs north-south east of the station; a point 1 km beyond it is sea
    for lat, lon in COASTLINE[1:-1]:
        assert lon > -20.6 and not on_land(lat, lon + 0.011)
        assert on_land(lat, lon - 0.011)


def test_arrival_order_nondecreasing(parsed: list[object], lines: list[bytes]) -> None:
    ts = [o["arrival_ts"] for o in parsed
          if isinstance(o, dict) and isinstance(o.get("arrival_ts"), float)]
    assert len(ts) > 0.99 * len(lines)
    assert all(a <= b for a, b in pairwise(ts))
    assert not any(b"\n" in b for b in lines)


def test_valid_records_fields_and_land(fixes: list[dict], counts: dict[str, int]) -> None:
    assert counts["lines"] > 50_000
    keys = {"vehicle_id", "event_ts", "lat", "lon", "status", "speed_mps", "trip_id",
            "arrival_ts"}
    for o in fixes:
        assert set(o) <= keys
        assert re.fullmatch(r"veh-\d{4}", o["vehicle_id"])
        assert DAY0 <= o["event_ts"] < DAY0 + 10 * 3600 + 200  # fast clocks run 120 s ahead
        assert o["arrival_ts"] >= DAY0
    lat = np.array([o["lat"] for o in fixes])
    lon = np.array([o["lon"] for o in fixes])
    lat_min, lat_max, lon_min, lon_max = BBOX
    assert lat.min() >= lat_min and lat.max() <= lat_max
    assert lon.min() >= lon_min and lon.max() <= lon_max
    # east of the coastline is sea: interpolate the published coastline vertices here
    c_lat = np.array([p[0] for p in COASTLINE])
    c_lon = np.array([p[1] for p in COASTLINE])
    assert np.all(lon < np.interp(lat, c_lat, c_lon))
    assert np.all(on_land(lat, lon))
    # seven decimals at most in the text
    assert all(round(o["lat"], 7) == o["lat"] for o in fixes[:2000])


def test_pickups_dropoffs_and_rush(tracks: dict[str, list[dict]]) -> None:
    both = 0
    for v in tracks.values():
        s = [o["status"] for o in v]
        pairs = set(pairwise(s))
        both += ("vacant", "occupied") in pairs and ("occupied", "vacant") in pairs
    assert both >= 0.8 * len(tracks)
    picks = _transitions(tracks, "vacant", "occupied")
    drops = _transitions(tracks, "occupied", "vacant")
    assert len(picks) > 300
    # every vehicle starts vacant; at most one trip per vehicle is still open when the span ends
    assert 0 <= len(picks) - len(drops) <= len(tracks)
    morning = sum(7 <= h < 9 for h in picks)
    night = sum(2 <= h < 4 for h in picks)
    assert morning > 2 * night > 0


def test_fix_interval_and_offline(tracks: dict[str, list[dict]]) -> None:
    medians = [np.median(np.diff([o["event_ts"] for o in v])) for v in tracks.values()
               if len(v) > 20]
    assert abs(float(np.median(medians)) - 15.0) < 0.1
    assert min(medians) > 14.5 and max(medians) < 15.5
    offline = 0
    for v in tracks.values():
        for p, q in pairwise(v):
            if p["status"] == "offline":
                offline += 1
                assert q["event_ts"] - p["event_ts"] > 10 * 60  # a break: silent a while
                assert "trip_id" not in p
    assert offline > 10


def test_trip_ids(tracks: dict[str, list[dict]]) -> None:
    trips = with_id = 0
    for vid, v in tracks.items():
        run: list[dict] = []
        for o in [*v, {"status": "end"}]:
            if o["status"] == "occupied":
                run.append(o)
                continue
            if "trip_id" in o:
                raise AssertionError(f"trip_id on a {o['status']} fix")
            if run:
                trips += 1
                ids = {r.get("trip_id") for r in run}
                assert len(ids) == 1, ids
                tid = ids.pop()
                if tid is not None:
                    with_id += 1
                    assert re.fullmatch(rf"T-{vid}-\d+", tid)
                run = []
    assert trips > 300
    assert 0.6 < with_id / trips < 0.8  # about 70 % of trips carry an id


def test_speeds(tracks: dict[str, list[dict]]) -> None:
    def median_speed(h0: float, h1: float) -> float:
        v = [o["speed_mps"] for t in tracks.values() for o in t
             if o.get("speed_mps", 0) > 3 and h0 <= (o["event_ts"] - DAY0) / 3600 < h1]
        return float(np.median(v))

    night, rush = median_speed(1.0, 5.0), median_speed(7.5, 8.5)
    assert 8.0 < night < 14.0
    assert rush < 0.75 * night  # rush-hour traffic is slower
    # speed implied by consecutive positions (geographiclib) stays in a taxi's range
    rng = np.random.default_rng(0)
    pairs = [(p, q) for t in tracks.values() for p, q in pairwise(t)
             if q["event_ts"] - p["event_ts"] < 16]
    implied = []
    for i in rng.choice(len(pairs), 3000, replace=False):
        p, q = pairs[i]
        d = GEOD.Inverse(p["lat"], p["lon"], q["lat"], q["lon"])["s12"]
        implied.append(d / (q["event_ts"] - p["event_ts"]))
    assert max(implied) < 20.0
    assert 3.0 < float(np.median(implied)) < 12.0


def test_anomaly_shares(fixes: list[dict], parsed: list[object], lines: list[bytes],
                        counts: dict[str, int]) -> None:
    n = counts["fixes"]
    assert len(lines) == counts["lines"]
    broken = sum(not _valid(o) for o in parsed)
    assert broken == counts["broken"]
    assert 0.001 < broken / n < 0.004  # default 0.2 %
    assert sum(counts[f"broken_{k}"] for k in BROKEN_KINDS) == broken
    assert all(counts[f"broken_{k}"] > 0 for k in BROKEN_KINDS)
    delays = [o["arrival_ts"] - o["event_ts"] for o in fixes]
    assert sum(d >= 10 for d in delays) == counts["late"] + counts["out_of_order"]
    assert sum(d > 300 for d in delays) == counts["late_over_300s"]
    assert 0 < counts["late_over_300s"] < 0.5 * counts["late"]  # most late fixes are kept
    assert 0.007 < counts["late"] / n < 0.013  # default 1 %
    assert 0.003 < counts["out_of_order"] / n < 0.007  # default 0.5 %
    assert sum(abs(d + 120) < 1e-6 for d in delays) == counts["future"]
    assert 0.0005 < counts["future"] / n < 0.002  # default 0.1 %
    normal = [d for d in delays if 0 <= d < 10]
    assert min(normal) >= 0.2 and np.percentile(normal, 99) <= 5.0
    keys = Counter((o["vehicle_id"], o["event_ts"], o["lat"], o["lon"], o["status"])
                   for o in fixes)
    dups = sum(c - 1 for c in keys.values())
    assert dups == counts["duplicate"]
    assert 0.003 < dups / n < 0.007  # default 0.5 %
    # out of order: delivered after a later fix of the same vehicle
    newest: dict[str, float] = {}
    behind = 0
    for o in fixes:
        if o["event_ts"] > o["arrival_ts"]:
            continue
        last = newest.get(o["vehicle_id"], -math.inf)
        behind += o["event_ts"] < last
        newest[o["vehicle_id"]] = max(last, o["event_ts"])
    assert behind >= 0.9 * (counts["out_of_order"] + counts["late"])
    # a sample of the broken forms
    text = b"\n".join(b for b, o in zip(lines, parsed, strict=True) if not _valid(o))
    assert b'"status":"parked"' in text and b'"lat":123.4' in text
    assert any(isinstance(o, list) for o in parsed)
    objects_without_id = [o for o in parsed if isinstance(o, dict) and "vehicle_id" not in o]
    assert objects_without_id and all("arrival_ts" in o for o in objects_without_id)


def test_write_jsonl_and_parquet(tmp_path) -> None:
    cfg = CityConfig(seed=5, vehicles=30, hours=4.0, broken_share=0.02)
    lines = list(simulate(cfg))
    n = write_jsonl(tmp_path / "day.jsonl", cfg)
    assert n == len(lines)
    assert (tmp_path / "day.jsonl").read_bytes() == b"\n".join(lines) + b"\n"
    objects = [o for o in map(_parse, lines) if isinstance(o, dict)]
    rows = write_parquet(tmp_path / "day.parquet", cfg)
    assert rows == len(objects) < len(lines)
    table = pq.read_table(tmp_path / "day.parquet")
    assert table.num_rows == rows
    assert [str(t) for t in table.schema.types] == [
        "string", "double", "double", "double", "double", "string", "double", "string"]
    got = table.to_pylist()

    def cell(o: dict, k: str, text: bool) -> object:
        v = o.get(k)
        if text:
            return v if isinstance(v, str) else None
        return float(v) if isinstance(v, (int, float)) and not isinstance(v, bool) else None

    text_cols = {"vehicle_id", "status", "trip_id"}
    for o, r in zip(objects, got, strict=True):
        assert r == {k: cell(o, k, k in text_cols) for k in r}
        # the table rejects exactly what the lines reject (a null required value is invalid)
        assert _valid({k: v for k, v in r.items() if v is not None}) == _valid(o)
    assert any(r["lat"] == 123.4 for r in got)
    assert any(r["event_ts"] is None for r in got)
