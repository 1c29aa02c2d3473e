"""The live client: known_at over partitions, responses, bad requests."""

from __future__ import annotations

import fakeredis
import pytest

from featurestore.client import BadRequest, FeatureClient
from featurestore.engine import Engine
from featurestore.lookup import Lookup, RouteQuery
from featurestore.progress import known_at
from featurestore.redis_store import RedisStore
from featurestore.schema import Fix
from featurestore.store import SourcePosition, SourceSpan

T0 = 1_780_272_000_000  # 2026-06-01T00:00:00Z
P = SourcePosition


def test_known_at_waits_for_partitions_behind_only() -> None:
    pos = {"f:0": P(10, 5000), "f:1": P(4, 3000), "f:2": P(7, 9000)}
    # f:1 is behind (end 6 > next 4): messages of its last millisecond may still wait
    assert known_at(9000, pos, {"f:0": 10, "f:1": 6, "f:2": 7}) == 2999
    # every partition fully consumed: idle ones hold nothing back
    assert known_at(9000, pos, {"f:0": 10, "f:1": 4, "f:2": 7}) == 9000
    # a partition with messages and nothing applied: nothing is known yet
    assert known_at(9000, pos, {"f:0": 10, "f:3": 1}) is None
    assert known_at(9000, pos, {"f:3": 0}) == 9000  # an empty partition
    assert known_at(None, {}, {}) is None


def _client(history_ms: int = 3_600_000) -> tuple[FeatureClient, RedisStore]:
    store = RedisStore(fakeredis.FakeRedis(), history_ms=history_ms)
    fixes = [Fix("veh-1", T0 + 15_000 * k, -33.2 + k / 200, -20.6,
                 "occupied" if k >= 2 else "vacant", T0 + 15_000 * k + 700) for k in range(6)]
    eng = Engine(store)
    eng.process(fixes[:3], spans={"fixes:0": SourceSpan(0, 3, fixes[2].arrival_ms)})
    eng.process(fixes[3:], spans={"fixes:0": SourceSpan(3, 6, fixes[5].arrival_ms)})
    store.set_highwaters({"fixes:0": 6, "fixes:1": 0})
    return FeatureClient(store, clock=lambda: (T0 + 100_000) / 1000), store


def test_response_carries_version_known_at_and_staleness() -> None:
    client, store = _client()
    last = T0 + 75_700
    got = client.vectors(vehicles=["veh-1", "veh-9"], as_of="latest")
    assert got.as_of_ms == got.known_at_ms == last
    assert got.catalog_version == client.catalog.version
    assert got.staleness_s == {"cell": 0.0, "vehicle": 0.0, "trip": 0.0, "route": 0.0}
    want = Lookup(store).vehicle("veh-1", last)
    assert got.vehicles[0] == {"vehicle_id": "veh-1", **want}
    assert got.vehicles[0]["trip_fixes"] == 4 and got.vehicles[1]["vehicle_cell"] is None
    now = client.vectors(vehicles=["veh-1"])  # as of the wall clock: 24.3 s after the last
    assert now.as_of_ms == T0 + 100_000
    assert now.staleness_s["cell"] == pytest.approx(24.3)
    assert now.staleness_s["vehicle"] == pytest.approx(24.3)
    past = client.vectors(vehicles=["veh-1"], as_of=T0 + 30_700)  # as of the pickup's arrival
    assert past.vehicles[0]["trip_fixes"] == 1 and past.staleness_s["cell"] == 0.0
    assert past.staleness_s["vehicle"] == 0.0


def test_cells_and_routes_in_request_order() -> None:
    client, _ = _client()
    cell = client.vehicle("veh-1", as_of="latest")["vehicle_cell"]
    got = client.vectors(cells=[cell.upper(), cell], routes=[("87C19CBB2FFFFFF",
                                                            "87c19cbb2ffffff", 3)],
                         as_of="latest")
    assert [c["cell"] for c in got.cells] == [cell, cell]
    assert got.cells[0]["cell_fixes_5m"] >= 1
    assert got.routes[0]["route_trips"] == 0 and got.routes[0]["hour"] == 3
    assert got.routes[0]["origin_cell"] == "87c19cbb2ffffff"  # upper case read as lower


@pytest.mark.parametrize(("kwargs", "message"), [
    ({"vehicles": ["bad id!"]}, "vehicle_id 'bad id!'"),
    ({"cells": ["88c19cb94dfffff0"]}, "not an H3 cell of resolution 8"),
    ({"cells": ["87c19cbb2ffffff"]}, "not an H3 cell of resolution 8"),
    ({"routes": [RouteQuery("88c19cb94dfffff", "87c19cbb2ffffff")]}, "origin_cell"),
    ({"routes": [RouteQuery("87c19cbb2ffffff", "87c19cbb2ffffff", 24)]}, "hour 24"),
    ({"vehicles": ["v"] * 1001}, "1001 keys in one request; at most 1000"),
    ({"vehicles": ["v"], "as_of": "yesterday"}, "as_of must be epoch milliseconds"),
])
def test_bad_requests_say_what_is_wrong(kwargs: dict, message: str) -> None:
    client, _ = _client()
    with pytest.raises(BadRequest, match=message):
        client.vectors(**kwargs)


def test_latest_before_anything_applied() -> None:
    client = FeatureClient(RedisStore(fakeredis.FakeRedis()))
    with pytest.raises(BadRequest, match="nothing has been applied yet"):
        client.vectors(vehicles=["a"], as_of="latest")
