"""The engine's rules on small hand-made streams, and order independence."""

from __future__ import annotations

import math
import random

import h3
import pytest

from featurestore.config import EngineConfig
from featurestore.engine import Engine
from featurestore.lookup import AsOfError, Lookup
from featurestore.memory_store import MemoryStore
from featurestore.schema import Fix

T0 = 1_780_272_000_000  # 2026-06-01T00:00:00Z in ms
LAT, LON = -33.2, -20.6
# One millidegree of latitude is 111.2 m on a sphere of radius 6371008.8 m:
# 2*pi*6371008.8/360/1000 = 111.195 m (arithmetic, not a fitted value).
MDEG_M = 2 * math.pi * 6_371_008.8 / 360 / 1000


def fix(v: str, t_s: float, dlat_mdeg: float = 0.0, status: str = "vacant",
        delay_s: float = 1.0, dlon_mdeg: float = 0.0, trip_id: str | None = None) -> Fix:
    ev = T0 + round(t_s * 1000)
    return Fix(v, ev, LAT + dlat_mdeg / 1000, LON + dlon_mdeg / 1000, status,
               ev + round(delay_s * 1000), None, trip_id)


def run(fixes: list[Fix], cfg: EngineConfig | None = None) -> tuple[Engine, MemoryStore]:
    store = MemoryStore()
    eng = Engine(store, cfg)
    eng.process(fixes)
    return eng, store


def test_acceptance_reasons_and_counts() -> None:
    fixes = [
        fix("a", 0),
        fix("a", 0, delay_s=2),                    # duplicate (same vehicle, same event time)
        fix("a", 10, delay_s=301),                 # too late (> 300 s)
        fix("a", 20, delay_s=300),                 # exactly the maximum delay: accepted
        fix("a", 100, delay_s=-30.001),            # from the future (> 30 s skew)
        fix("a", 101, delay_s=-30),                # exactly the skew: accepted
        fix("a", 50, delay_s=60),                  # out of order, accepted
    ]
    eng, _ = run(fixes)
    s = eng.stats.as_dict()
    assert s["received"] == 7
    assert s["accepted"] == 4 and s["in_order"] == 3 and s["out_of_order"] == 1
    assert s["rejected"] == {"duplicate": 1, "too_late": 1, "from_future": 1}
    assert s["accepted"] + s["rejected_total"] == s["received"]


def test_rejections_keep_raw_and_batch_index() -> None:
    store = MemoryStore()
    res = Engine(store).process([fix("a", 0), fix("a", 0)], raws={1: b"RAW-BYTES"})
    assert [(i, r.reason, r.raw) for i, r in res.rejected] == [(1, "duplicate", b"RAW-BYTES")]


def test_pickup_trip_dropoff_and_route() -> None:
    # a drives north 1 millidegree (111.195 m) every 15 s: vacant, then a 4-fix trip.
    st = ["vacant", "vacant", "occupied", "occupied", "occupied", "vacant", "vacant"]
    fixes = [fix("a", 15 * k, dlat_mdeg=k, status=s) for k, s in enumerate(st)]
    eng, store = run(fixes)
    lk = Lookup(store)
    t_mid = T0 + 15 * 4 * 1000 + 1000  # as of the arrival of the 5th fix (a trip fix)
    # before the dropoff arrives the store watermark is later, so check the end state instead
    end = T0 + 15 * 6 * 1000 + 1000
    v = lk.vehicle("a", end)
    assert v["vehicle_status"] == "vacant" and v["trip_active"] == 0 and v["trip_fixes"] == 0
    assert v["vehicle_speed_mps"] == pytest.approx(MDEG_M / 15, rel=1e-9)
    assert v["vehicle_heading_deg"] == pytest.approx(0.0, abs=1e-9)  # due north
    assert v["vehicle_heading_r"] == pytest.approx(1.0)
    assert v["vehicle_fix_age_s"] == pytest.approx(1.0)
    assert math.isnan(v["trip_elapsed_s"]) and v["trip_start_cell"] is None
    pick_cell = h3.latlng_to_cell(LAT + 0.002, LON, 8)
    drop_cell = h3.latlng_to_cell(LAT + 0.005, LON, 8)
    c = lk.cell(pick_cell, end)
    assert c["cell_pickups_5m"] == 1 and c["cell_pickups_60m"] == 1
    d = lk.cell(drop_cell, end)
    assert d["cell_dropoffs_5m"] == (1 if drop_cell != pick_cell else 1)
    o7 = h3.latlng_to_cell(LAT + 0.002, LON, 7)
    d7 = h3.latlng_to_cell(LAT + 0.005, LON, 7)
    r = lk.route(o7, d7, end, hour=0)
    assert r["route_trips"] == 1
    assert r["route_mean_duration_s"] == 45.0 and r["route_std_duration_s"] == 0.0
    assert lk.route(o7, d7, end, hour=1)["route_trips"] == 0
    assert t_mid < end


def test_trip_features_mid_trip() -> None:
    st = ["vacant", "occupied", "occupied", "occupied"]
    fixes = [fix("a", 15 * k, dlat_mdeg=k, dlon_mdeg=0, status=s) for k, s in enumerate(st)]
    _, store = run(fixes)
    at = T0 + 45_000 + 1000
    v = Lookup(store).vehicle("a", at)
    assert v["trip_active"] == 1 and v["trip_fixes"] == 3
    assert v["trip_elapsed_s"] == pytest.approx(31.0)
    assert v["trip_distance_m"] == pytest.approx(2 * MDEG_M, rel=1e-6)
    assert v["trip_displacement_m"] == pytest.approx(2 * MDEG_M, rel=1e-6)
    assert v["trip_initial_heading_deg"] == pytest.approx(0.0, abs=1e-9)
    assert v["trip_start_cell"] == h3.latlng_to_cell(LAT + 0.001, LON, 8)


def test_short_steps_do_not_set_heading() -> None:
    # 0.05 millidegree = 5.6 m < 10 m: not a moving step
    fixes = [fix("a", 15 * k, dlat_mdeg=0.05 * k) for k in range(4)]
    _, store = run(fixes)
    v = Lookup(store).vehicle("a", T0 + 46_000)
    assert math.isnan(v["vehicle_heading_deg"]) and math.isnan(v["vehicle_heading_r"])
    assert v["vehicle_speed_mps"] == pytest.approx(0.05 * MDEG_M / 15, rel=1e-9)


def test_out_of_order_counts_only_in_fixes() -> None:
    fixes = [fix("a", 0), fix("a", 30, dlat_mdeg=3, status="occupied"),
             fix("a", 15, dlat_mdeg=9, status="vacant", delay_s=40)]
    _, store = run(fixes)
    lk = Lookup(store)
    at = T0 + 56_000
    v = lk.vehicle("a", at)
    assert v["vehicle_status"] == "occupied" and v["trip_active"] == 1
    late_cell = h3.latlng_to_cell(LAT + 0.009, LON, 8)
    c = lk.cell(late_cell, at)
    assert c["cell_fixes_5m"] == 1 and c["cell_dropoffs_5m"] == 0 and c["cell_vacant_now"] == 0


def test_presence_now_horizon() -> None:
    _, store = run([fix("a", 0), fix("b", 0, status="occupied")])
    lk = Lookup(store)
    cell = h3.latlng_to_cell(LAT, LON, 8)
    assert (lk.cell(cell, T0 + 120_000)["cell_vacant_now"],
            lk.cell(cell, T0 + 120_000)["cell_occupied_now"]) == (1, 1)
    assert lk.cell(cell, T0 + 120_001)["cell_vacant_now"] == 0
    ring = lk.cell(h3.grid_disk(cell, 1)[0] if h3.grid_disk(cell, 1)[0] != cell
                   else h3.grid_disk(cell, 1)[1], T0 + 60_000)
    assert ring["cell_ring_vacant_now"] == 1 and ring["cell_vacant_now"] == 0


def test_window_edges() -> None:
    # one fix in bucket 0; the 5-minute window at T covers buckets bT-4..bT
    _, store = run([fix("a", 30)])
    lk = Lookup(store)
    cell = h3.latlng_to_cell(LAT, LON, 8)
    assert lk.cell(cell, T0 + 4 * 60_000 + 59_999)["cell_fixes_5m"] == 1
    assert lk.cell(cell, T0 + 5 * 60_000)["cell_fixes_5m"] == 0
    assert lk.cell(cell, T0 + 5 * 60_000)["cell_fixes_15m"] == 1


def test_lookup_before_watermark_is_refused() -> None:
    _, store = run([fix("a", 0), fix("a", 60)])
    with pytest.raises(AsOfError):
        Lookup(store).vehicle("a", T0 + 30_000)


def test_vehicle_expires_after_ttl() -> None:
    cfg = EngineConfig(vehicle_ttl_s=600)
    _, store = run([fix("a", 0, status="vacant"), fix("a", 15, status="occupied", dlat_mdeg=1),
                    fix("a", 1000, status="occupied", dlat_mdeg=2)], cfg)
    v = Lookup(store, cfg).vehicle("a", T0 + 1_001_000)
    # the third fix came 984 s after the second was seen: the vehicle started afresh
    assert v["trip_active"] == 0 and v["vehicle_speed_mps"] == 0.0


def _stream(seed: int) -> list[Fix]:
    rng = random.Random(seed)
    out = []
    for v in range(6):
        t = rng.uniform(0, 30)
        lat = 0.0
        status = "vacant"
        for _ in range(60):
            t += rng.choice([15, 15, 15, 0, 7])
            lat += rng.uniform(0, 2)
            if rng.random() < 0.2:
                status = rng.choice(["vacant", "occupied", "offline"])
            delay = rng.choice([1, 2, 1, 50, 400]) if rng.random() < 0.3 else 1.0
            out.append(fix(f"v{v}", t, dlat_mdeg=lat, status=status, delay_s=delay,
                           dlon_mdeg=rng.uniform(-2, 2)))
    out.sort(key=lambda f: f.arrival_ms)
    return out


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_order_independence_across_vehicles(seed: int) -> None:
    fixes = _stream(seed)
    _, ref = run(fixes)
    rng = random.Random(seed + 100)
    by_vehicle: dict[str, list[Fix]] = {}
    for f in fixes:
        by_vehicle.setdefault(f.vehicle_id, []).append(f)
    queues = list(by_vehicle.values())
    shuffled = []
    while any(queues):
        q = rng.choice([q for q in queues if q])
        shuffled.append(q.pop(0))
    assert shuffled != fixes
    store = MemoryStore()
    eng = Engine(store)
    for i in range(0, len(shuffled), 7):  # and in other batch sizes
        eng.process(shuffled[i:i + 7])
    ref_dump, got_dump = ref.dump(), store.dump()
    assert got_dump == ref_dump
    assert sum(len(b) for b in ref_dump["cells"].values()) > 10
