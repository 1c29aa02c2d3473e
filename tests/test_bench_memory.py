"""The memory benchmark's parts that decide what it counts: the steady fleet's stream and the
key families (no memory figure is asserted)."""

from __future__ import annotations

from bench.memory import FAMILIES, SteadyFleet, family_of
from featurestore.config import EngineConfig
from featurestore.redis_layout import Layout


def test_every_layout_key_falls_in_its_family():
    lay = Layout(EngineConfig(), "cellpulse", history_ms=900_000)
    keys = {
        "v": lay.vehicle("veh-00001"), "vl": lay.vehicle_log("veh-00001"),
        "c": lay.cell_block("88c19c8cadfffff", 494520), "cl": lay.cell_log("88c19c8cadfffff"),
        "pv": lay.presence("88c19c8cadfffff", "vacant"),
        "po": lay.presence("88c19c8cadfffff", "occupied"),
        "r": lay.route(("87c19c8c9ffffff", "87c19cb96ffffff", 7)),
        "rl": lay.route_log(("87c19c8c9ffffff", "87c19cb96ffffff", 7)),
    }
    assert {fam: family_of(key.encode()) for fam, key in keys.items()} == {f: f for f in keys}
    for marker in (lay.positions, lay.arrivals, lay.highwaters, lay.counts, lay.meta):
        assert family_of(marker.encode()) == "markers"
    assert set(FAMILIES) == set(keys) | {"markers"}


def test_steady_fleet_reports_every_vehicle_every_interval_in_arrival_order():
    start = 1_780_272_000_000
    fleet = SteadyFleet(10, start, interval_s=15.0, seed=3)
    ticks = list(fleet.fixes(start + 60_000))
    fixes = [f for tick in ticks for f in tick]
    # each vehicle's first fix falls within the first interval, then one every 15 s: 4 in
    # 60 s; those taken in the last seconds arrive after the end and are not yet delivered
    by_vehicle: dict[str, list[int]] = {}
    for f in fixes:
        by_vehicle.setdefault(f.vehicle_id, []).append(f.event_ms)
    assert len(by_vehicle) == 10
    for events in by_vehicle.values():
        assert 3 <= len(events) <= 4
        assert all(b - a == 15_000 for a, b in zip(events, events[1:], strict=False))
    arrivals = [f.arrival_ms for f in fixes]
    assert arrivals == sorted(arrivals)
    assert all(200 <= f.arrival_ms - f.event_ms <= 3000 for f in fixes)
    assert all((f.status == "occupied") == (f.trip_id is not None) for f in fixes)
    again = [f for tick in SteadyFleet(10, start, seed=3).fixes(start + 60_000) for f in tick]
    assert again == fixes
