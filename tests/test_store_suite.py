"""One suite for every StateStore implementation: in memory, Redis on fakeredis, and Redis on a
real ``redis-server`` (started by the tests), each without and with history."""

from __future__ import annotations

from collections.abc import Callable

import pytest

from featurestore.memory_store import MemoryStore
from featurestore.redis_store import RedisStore
from featurestore.state import TripState, VehicleState
from featurestore.store import (
    Delta,
    PresenceMove,
    ReadRequest,
    Retention,
    SourcePosition,
    SourceSpan,
    StaleBatchError,
    StateStore,
)

HOUR = 3_600_000


def _fake(history_ms: int) -> Callable[[pytest.FixtureRequest], StateStore]:
    def make(_: pytest.FixtureRequest) -> StateStore:
        import fakeredis

        return RedisStore(fakeredis.FakeRedis(), history_ms=history_ms)

    return make


def _real(history_ms: int) -> Callable[[pytest.FixtureRequest], StateStore]:
    def make(request: pytest.FixtureRequest) -> StateStore:
        return RedisStore.from_url(request.getfixturevalue("redis_url"), history_ms=history_ms)

    return make


STORES: dict[str, Callable[[pytest.FixtureRequest], StateStore]] = {
    "memory": lambda _: MemoryStore(),
    "memory-history": lambda _: MemoryStore(history_ms=HOUR),
    "fakeredis": _fake(0),
    "fakeredis-history": _fake(HOUR),
    "redis": _real(0),
    "redis-history": _real(HOUR),
}


@pytest.fixture(params=sorted(STORES))
def store(request: pytest.FixtureRequest) -> StateStore:
    return STORES[request.param](request)


def _vehicle(vid: str, ev: int, cell: str = "88c19cbb27fffff", status: str = "vacant",
             trip: bool = False) -> VehicleState:
    t = TripState("T1", ev - 5000, ev - 4000, -33.2, -20.6, cell, "87c19cbb2ffffff", 12.5, 2,
                  (10.0,)) if trip else None
    return VehicleState(vid, ev, ev + 1000, ev + 1000, -33.2, -20.6, cell, status, 3.25,
                        (1.5, 359.0), (ev - 15000, ev), t)


def test_is_a_state_store(store: StateStore) -> None:
    assert isinstance(store, StateStore)
    assert store.watermark_ms() is None and dict(store.offsets()) == {}


def test_vehicle_round_trip(store: StateStore) -> None:
    v = _vehicle("a", 1_000_000, trip=True)
    store.apply(Delta(vehicles={"a": v}))
    assert store.load_vehicles(["a", "b"]) == {"a": v}
    assert VehicleState.from_dict(v.to_dict()) == v


def test_counters_add_up_and_ranges_are_inclusive(store: StateStore) -> None:
    store.apply(Delta(cells={("c1", 10): [1, 0, 0], ("c1", 11): [2, 1, 0]}))
    store.apply(Delta(cells={("c1", 11): [3, 0, 1], ("c1", 12): [1, 1, 1], ("c2", 11): [5, 5, 5]}))
    got = store.read(ReadRequest(cells={"c1": 11, "c3": 11}, bucket_hi=12))
    assert got.cells == {"c1": {11: (5, 1, 1), 12: (1, 1, 1)}}
    got = store.read(ReadRequest(cells={"c1": 12, "c2": 10}, bucket_hi=12))
    assert got.cells == {"c1": {12: (1, 1, 1)}, "c2": {11: (5, 5, 5)}}


def test_routes_sum_over_day_range(store: StateStore) -> None:
    store.apply(Delta(routes={("o", "d", 8, 100): [1, 600_000, 600_000 ** 2],
                              ("o", "d", 8, 101): [2, 1_300_000, 650_000 ** 2 * 2],
                              ("o", "d", 9, 101): [1, 1, 1]}))
    got = store.read(ReadRequest(routes=[("o", "d", 8), ("x", "y", 1)], day_lo=101, day_hi=101))
    assert got.routes == {("o", "d", 8): (2, 1_300_000, 845_000_000_000)}
    got = store.read(ReadRequest(routes=[("o", "d", 8)], day_lo=80, day_hi=101))
    assert got.routes[("o", "d", 8)] == (3, 1_900_000, 1_205_000_000_000)


def test_presence_moves_between_cells(store: StateStore) -> None:
    store.apply(Delta(presence={"a": PresenceMove(None, None, "c1", "vacant", 1000, 1100),
                                "b": PresenceMove(None, None, "c1", "occupied", 2000, 2100)}))
    req = ReadRequest(presence_cells=["c1", "c2"], presence_min_event_ms=1000, as_of_ms=2100)
    assert store.read(req).presence == {"c1": (1, 1), "c2": (0, 0)}
    store.apply(Delta(presence={"a": PresenceMove("c1", "vacant", "c2", "occupied", 3000, 3100,
                                                  1000, 1100)}))
    req = ReadRequest(presence_cells=["c1", "c2"], presence_min_event_ms=1000, as_of_ms=3100)
    assert store.read(req).presence == {"c1": (0, 1), "c2": (0, 1)}
    req2 = ReadRequest(presence_cells=["c1", "c2"], presence_min_event_ms=2001, as_of_ms=3100)
    assert store.read(req2).presence == {"c1": (0, 0), "c2": (0, 1)}


def test_watermark_and_offsets_move_with_the_batch(store: StateStore) -> None:
    store.apply(Delta(cells={("c", 1): [1, 0, 0]}, watermark_ms=5000,
                      spans={"fixes:0": SourceSpan(0, 11, 5000)}))
    store.apply(Delta(watermark_ms=4000, spans={"fixes:1": SourceSpan(0, 3, 4000)}))
    assert store.watermark_ms() == 5000
    assert dict(store.offsets()) == {"fixes:0": 11, "fixes:1": 3}
    assert dict(store.positions()) == {"fixes:0": SourcePosition(11, 5000),
                                       "fixes:1": SourcePosition(3, 4000)}
    store.set_highwaters({"fixes:0": 11, "fixes:1": 9})
    store.set_highwaters({"fixes:1": 7})  # an older report never lowers it
    assert store.highwaters() == {"fixes:0": 11, "fixes:1": 9}
    got = store.read(ReadRequest(as_of_ms=6000, with_progress=True))
    assert got.highwaters == {"fixes:0": 11, "fixes:1": 9}
    assert got.positions == {"fixes:0": SourcePosition(11, 5000),
                             "fixes:1": SourcePosition(3, 4000)}


def test_a_batch_already_applied_is_refused_whole(store: StateStore) -> None:
    v = _vehicle("a", 1_000_000)
    store.apply(Delta(cells={("c", 1): [1, 0, 0]}, vehicles={"a": v}, watermark_ms=100,
                      spans={"p:0": SourceSpan(0, 10, 100)}))
    stale = Delta(cells={("c", 1): [5, 5, 5]}, vehicles={"a": _vehicle("a", 2_000_000)},
                  watermark_ms=200, spans={"p:1": SourceSpan(0, 1, 200),
                                           "p:0": SourceSpan(9, 12, 200)})
    with pytest.raises(StaleBatchError, match="p:0"):
        store.apply(stale)
    # nothing of the refused batch was written
    assert store.read(ReadRequest(cells={"c": 1}, bucket_hi=1, as_of_ms=100)).cells == {
        "c": {1: (1, 0, 0)}}
    assert store.load_vehicles(["a"]) == {"a": v}
    assert dict(store.offsets()) == {"p:0": 10} and store.watermark_ms() == 100
    store.apply(Delta(spans={"p:0": SourceSpan(10, 12, 150)}, watermark_ms=150))  # continues
    store.apply(Delta(spans={"p:0": SourceSpan(15, 16, 140)}))  # a gap (compacted) is fine
    assert dict(store.positions()) == {"p:0": SourcePosition(16, 150)}


def test_prune_forgets_only_before_horizons() -> None:
    s = MemoryStore()
    s.apply(Delta(cells={("c", 1): [1, 0, 0], ("c", 2): [1, 0, 0]},
                  vehicles={"a": _vehicle("a", 1000), "b": _vehicle("b", 90_000)},
                  presence={"a": PresenceMove(None, None, "c", "vacant", 1000)},
                  routes={("o", "d", 1, 5): [1, 2, 4], ("o", "d", 1, 6): [1, 2, 4]}))
    s.prune(Retention(bucket_min=2, presence_min_event_ms=1001, vehicle_min_seen_ms=50_000,
                      route_day_min=6))
    assert s.sizes() == {"vehicles": 1, "cell_buckets": 1, "route_days": 1, "presence": 0}


def test_reads_as_of_earlier_moments(store: StateStore) -> None:
    from featurestore.engine import Engine
    from featurestore.lookup import AsOfError, Lookup
    from featurestore.schema import Fix

    t0 = 1_780_272_000_000
    fixes = [Fix("a", t0 + 15_000 * k, -33.2 + k / 100, -20.6,  # 1.1 km steps
                 "occupied" if k in (1, 2) else "vacant", t0 + 15_000 * k + 500)
             for k in range(4)]
    Engine(store).process(fixes)
    lk = Lookup(store)
    cell = lk.vehicle("a", t0 + 45_500)["vehicle_cell"]
    if store.history_ms == 0:
        with pytest.raises(AsOfError):
            lk.vehicle("a", t0 + 15_500)
        return
    mid = lk.vehicle("a", t0 + 15_500)  # as of the pickup fix's arrival
    assert mid["trip_active"] == 1 and mid["trip_fixes"] == 1 and mid["vehicle_cell"] != cell
    assert lk.vehicle("a", t0 + 499)["vehicle_cell"] is None
    first = lk.cell(mid["vehicle_cell"], t0 + 15_500)
    assert first["cell_pickups_5m"] == 1 and first["cell_occupied_now"] == 1
    assert lk.cell(mid["vehicle_cell"], t0 + 15_499)["cell_pickups_5m"] == 0


def test_message_counts_are_applied_with_the_batch(store: StateStore) -> None:
    from featurestore.engine import Engine
    from featurestore.schema import Fix, Rejection

    t0 = 1_780_272_000_000
    fx = [Fix("a", t0 + 15_000 * k, -33.2, -20.6, "vacant", t0 + 15_000 * k + 500)
          for k in range(3)]
    eng = Engine(store)
    eng.process([fx[0], fx[2], Rejection("malformed", "not JSON", b"{"), fx[1]],
                spans={"p:0": SourceSpan(0, 4, fx[1].arrival_ms)})
    eng.process([fx[2], fx[0]], spans={"p:0": SourceSpan(4, 6, fx[2].arrival_ms)})
    with pytest.raises(StaleBatchError):  # a refused batch counts nothing
        eng.process([fx[0]], spans={"p:0": SourceSpan(5, 6, fx[2].arrival_ms)})
    assert store.counters() == {"received": 6, "accepted": 3, "in_order": 2, "out_of_order": 1,
                                "rejected:malformed": 1, "rejected:duplicate": 2}


def test_a_refused_batch_leaves_the_engine_totals_alone(store: StateStore) -> None:
    from featurestore.engine import Engine
    from featurestore.schema import Rejection

    eng = Engine(store)
    eng.process([Rejection("malformed", "not JSON", b"{")], spans={"p:0": SourceSpan(0, 1)})
    with pytest.raises(StaleBatchError):
        eng.process([Rejection("malformed", "not JSON", b"[")], spans={"p:0": SourceSpan(0, 1)})
    assert eng.stats.as_dict()["rejected"] == {"malformed": 1}
    assert eng.stats.received == 1
