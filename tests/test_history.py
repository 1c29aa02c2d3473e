"""Reads as of an earlier moment from a store that has applied later data (what the live
path does with several partitions) equal replay answers at that moment."""

from __future__ import annotations

import math
import random
from pathlib import Path

import h3
import pytest

from featurestore.engine import Engine
from featurestore.lookup import AsOfError, Lookup, RouteQuery
from featurestore.memory_store import MemoryStore
from featurestore.schema import Fix
from ingest.citysim import CityConfig, write_jsonl
from replay.ordering import arrival_order
from replay.readers import iter_file
from replay.session import ReplaySession


def _same(a: dict, b: dict) -> bool:
    for k, x in a.items():
        y = b[k]
        if isinstance(x, float) and math.isnan(x):
            if not (isinstance(y, float) and math.isnan(y)):
                return False
        elif isinstance(x, float):
            if not math.isclose(x, y, rel_tol=1e-9, abs_tol=1e-9):
                return False
        elif x != y:
            return False
    return True


@pytest.fixture(scope="module")
def day(tmp_path_factory: pytest.TempPathFactory) -> list:
    path: Path = tmp_path_factory.mktemp("hist") / "day.jsonl"
    write_jsonl(path, CityConfig(seed=5, vehicles=25, hours=1.5))
    return list(arrival_order(iter_file(path)))


def _history_store(kind: str, request: pytest.FixtureRequest):
    if kind == "memory":
        return MemoryStore(history_ms=10**12)
    from featurestore.redis_store import RedisStore

    if kind == "fakeredis":
        import fakeredis

        return RedisStore(fakeredis.FakeRedis(), history_ms=10**12)
    return RedisStore.from_url(request.getfixturevalue("redis_url"), history_ms=10**12)


@pytest.mark.parametrize("kind", ["memory", "fakeredis", "redis"])
def test_past_reads_equal_replay_at_that_moment(day: list, kind: str,
                                                request: pytest.FixtureRequest) -> None:
    fixes = [it.value for it in day if isinstance(it.value, Fix)]
    vehicles = sorted({f.vehicle_id for f in fixes})
    first, last = fixes[0].arrival_ms, fixes[-1].arrival_ms
    rng = random.Random(8)
    moments = sorted(rng.randrange(first, last) for _ in range(12)) + [
        fixes[len(fixes) // 2].arrival_ms, fixes[len(fixes) // 2].arrival_ms - 1]
    # the keys: every vehicle, a spread of cells, and the routes trips completed on
    store = _history_store(kind, request)
    eng = Engine(store)
    i = 0
    while i < len(day):  # batches of random size, as a consumer would poll them
        n = rng.randint(1, 400)
        eng.process([it.value for it in day[i:i + n]])
        i += n
    cells = sorted({h3.latlng_to_cell(f.lat, f.lon, 8) for f in fixes})
    cells = rng.sample(cells, 40)
    oracle = MemoryStore()
    Engine(oracle).process([it.value for it in day])
    route_keys = [tuple(k.split("|")) for k in oracle.dump()["routes"]]
    rq = [RouteQuery(o, d, int(h)) for o, d, h in route_keys][:20]
    rq.append(RouteQuery(route_keys[0][0], route_keys[0][1]))  # the hour of T
    assert len(rq) >= 5
    live = Lookup(store)

    expected: dict[int, tuple] = {}
    session = ReplaySession()
    for t in moments:
        session.ask(t, vehicles, cells, rq,
                    lambda v, c, r, t=t: expected.__setitem__(t, (v, c, r)))
    session.run(day)
    compared = 0
    for t in moments:
        got = live.vectors(t, vehicles, cells, rq)
        for want_list, got_list in zip(expected[t], got, strict=True):
            for want, have in zip(want_list, got_list, strict=True):
                assert _same(want, have), (t, want, have)
                compared += 1
    assert compared == len(moments) * (len(vehicles) + len(cells) + len(rq))
    busy = [r for t in moments for r in expected[t][0] if r["trip_active"]]
    assert busy, "the moments should catch trips in progress"


def test_past_beyond_history_is_refused(day: list) -> None:
    store = MemoryStore(history_ms=60_000)
    Engine(store).process([it.value for it in day])
    wm = store.watermark_ms()
    assert wm is not None
    lk = Lookup(store)
    lk.vehicle("veh-0001", wm - 60_000)  # the edge of the kept history is answered
    with pytest.raises(AsOfError, match="keeps 60000 ms of history"):
        lk.vehicle("veh-0001", wm - 60_001)
    with pytest.raises(AsOfError, match="keeps 0 ms of history"):
        Lookup(_advanced()).vehicle("x", 1_780_272_000_499)


def _advanced() -> MemoryStore:
    s = MemoryStore()
    Engine(s).process([Fix("x", 1_780_272_000_000, 0.0, 0.0, "vacant", 1_780_272_000_500)])
    return s
