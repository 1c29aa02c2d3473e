"""Redis store specifics on a real redis-server: key lifetimes, trimmed history, hash tags, and
stale batches refused atomically."""

from __future__ import annotations

from pathlib import Path

import h3
import orjson
import pytest
from redis.crc import key_slot

from featurestore.engine import Engine
from featurestore.lookup import AsOfError, Lookup
from featurestore.redis_store import RedisStore
from featurestore.schema import Fix
from featurestore.store import SourceSpan, StaleBatchError
from ingest.citysim import CityConfig, write_jsonl
from replay.ordering import arrival_order
from replay.readers import iter_file

HISTORY_MS = 600_000


@pytest.fixture(scope="module")
def fixes(tmp_path_factory: pytest.TempPathFactory) -> list[Fix]:
    path: Path = tmp_path_factory.mktemp("rs") / "day.jsonl"
    write_jsonl(path, CityConfig(seed=21, vehicles=15, hours=1.5))
    return [it.value for it in arrival_order(iter_file(path)) if isinstance(it.value, Fix)]


def _filled(url: str, fixes: list[Fix], rejected: set[int] | None = None) -> RedisStore:
    store = RedisStore.from_url(url, history_ms=HISTORY_MS, namespace="t")
    eng = Engine(store)
    for i in range(0, len(fixes), 500):
        result = eng.process(fixes[i:i + 500])
        if rejected is not None:
            rejected.update(i + j for j, _ in result.rejected)
    return store


def test_every_key_but_the_markers_has_its_lifetime(redis_url: str, fixes: list[Fix]) -> None:
    store = _filled(redis_url, fixes)
    lay = store.layout
    want = {"v": lay.vehicle_ttl_s, "vl": lay.log_ttl_s, "c": lay.cell_ttl_s,
            "cl": lay.log_ttl_s, "pv": lay.presence_ttl_s, "po": lay.presence_ttl_s,
            "r": lay.route_ttl_s, "rl": lay.log_ttl_s}
    # 6 h vehicle expiry + 10 min history + 10 min margin
    assert lay.vehicle_ttl_s == 6 * 3600 + 600 + 600
    # a block of 60 one-minute buckets, read for 60 min after it, written up to 300 s late
    assert lay.cell_ttl_s == 3600 + 3600 + 300 + 600 + 600
    seen: dict[str, int] = {}
    markers = set()
    for key in store.client.scan_iter("t:*", count=1000):
        kind = key.decode().split(":")[1]
        ttl = store.client.ttl(key)
        if kind in ("pos", "arr", "hw", "meta", "counts"):
            markers.add(kind)
            assert ttl == -1
            continue
        assert 0 < ttl <= want[kind], (key, ttl)
        seen[kind] = seen.get(kind, 0) + 1
    assert set(seen) == set(want), seen
    assert markers == {"meta", "counts"}  # no source partitions in this test


def test_history_logs_are_trimmed_to_the_history(redis_url: str, fixes: list[Fix]) -> None:
    rejected: set[int] = set()
    store = _filled(redis_url, fixes, rejected)
    assert store.watermark_ms() == fixes[-1].arrival_ms
    assert rejected  # the demo day has duplicates and late fixes; they leave no history
    # Expected, computed independently: each cell's log keeps the entries that arrived at or
    # after (watermark of the last batch that wrote the cell) - history.
    last_wm: dict[str, int] = {}
    per_cell: dict[str, dict[int, list[int]]] = {}
    for i in range(0, len(fixes), 500):
        batch = fixes[i:i + 500]
        wm = max(f.arrival_ms for f in batch)
        for j, f in enumerate(batch):
            if i + j in rejected:
                continue
            cell = h3.latlng_to_cell(f.lat, f.lon, 8)
            last_wm[cell] = wm
            groups = per_cell.setdefault(cell, {})
            groups.setdefault(i, []).append(f.arrival_ms)
    # a batch's entries of one cell form one group, kept while its latest arrival is
    want = {c: sum(len(arrs) for arrs in groups.values() if max(arrs) >= last_wm[c] - HISTORY_MS)
            for c, groups in per_cell.items()}
    got = {k.decode().split("{")[1].rstrip("}"):
           sum(m.count(b"\x1d") for m in store.client.zrange(k, 0, -1))
           for k in store.client.scan_iter("t:cl:*", count=1000)}
    assert got == {c: n for c, n in want.items() if n}
    assert sum(got.values()) < len(fixes) / 2  # most of the 1.5 h was trimmed away


def test_one_vehicle_one_slot(redis_url: str) -> None:
    lay = RedisStore.from_url(redis_url).layout
    assert key_slot(lay.vehicle("veh-7").encode()) == key_slot(lay.vehicle_log("veh-7").encode())
    cell = "88c19cb94dfffff"
    slots = {key_slot(k.encode()) for k in (lay.cell_block(cell, 1), lay.cell_block(cell, 2),
                                            lay.cell_log(cell), lay.presence(cell, "vacant"),
                                            lay.presence(cell, "occupied"))}
    assert len(slots) == 1


def test_two_consumers_of_one_partition_cannot_both_apply(redis_url: str) -> None:
    a = RedisStore.from_url(redis_url)
    b = RedisStore.from_url(redis_url)
    t0 = 1_780_272_000_000
    fx = [Fix("v1", t0 + 15_000 * k, -33.2, -20.6, "vacant", t0 + 15_000 * k + 300)
          for k in range(4)]
    Engine(a).process(fx[:2], spans={"fixes:0": SourceSpan(0, 2, fx[1].arrival_ms)})
    # a zombie that still believes it owns the partition re-applies offsets 1..3
    with pytest.raises(StaleBatchError, match="fixes:0 has applied up to offset 1"):
        Engine(b).process(fx[1:], spans={"fixes:0": SourceSpan(1, 4, fx[3].arrival_ms)})
    assert b.load_vehicles(["v1"])["v1"].event_ms == fx[1].event_ms
    assert dict(b.offsets()) == {"fixes:0": 2}


def test_readers_never_answer_beyond_the_writers_history(redis_url: str) -> None:
    t0 = 1_780_272_000_000
    fx = [Fix("v1", t0 + 15_000 * k, -33.2 + k / 100, -20.6, "vacant", t0 + 15_000 * k + 300)
          for k in range(8)]
    writer = RedisStore.from_url(redis_url, history_ms=60_000)
    Engine(writer).process(fx)
    wm = fx[-1].arrival_ms
    auto = Lookup(RedisStore.from_url(redis_url, history_ms=None))  # what serve opens
    greedy = Lookup(RedisStore.from_url(redis_url, history_ms=3_600_000))
    want = Lookup(writer).vehicle("v1", wm - 60_000)
    assert want["vehicle_fix_age_s"] == 0.3  # as of the 4th fix's arrival, 300 ms after it
    for reader in (auto, greedy):
        assert reader.vehicle("v1", wm - 60_000) == want
        with pytest.raises(AsOfError, match="keeps 60000 ms of history"):
            reader.vehicle("v1", wm - 60_001)
    with pytest.raises(TypeError, match="writers must give their own history_ms"):
        Engine(auto.store).process(fx)


def test_vehicle_state_codec_is_compact_and_exact() -> None:
    from featurestore.redis_layout import decode_state, encode_state
    from featurestore.state import TripState, VehicleState

    trip = TripState("veh-7:1780300000000", 1780300000000, 1780300000400, -33.2, -20.6,
                     "88c19cb94dfffff", "87c19cb94ffffff", 1234.5678901234567, 3,
                     (237.68982047907218, 0.1 + 0.2))
    state = VehicleState("veh-7", 1780300045000, 1780300045600, 1780300046000, -33.2244749,
                         -20.6855664, "88c19c1669fffff", "occupied", 10.45169384436638,
                         (237.68982047907218, 236.55419012882183), (1780300015000,
                         1780300030000, 1780300045000), trip)
    raw = encode_state(state)
    assert decode_state(raw) == state  # floats round-trip bit for bit (shortest repr)
    assert decode_state(orjson.dumps(state.to_dict())) == state  # the older field-named form
    assert '"recent"' not in raw and "[30000,15000,0]" in raw  # offsets back from event_ms
    assert (len(raw), len(orjson.dumps(state.to_dict()))) == (340, 629)
    logged = decode_state(encode_state(state, with_recent=False))
    assert logged.recent == () and logged._replace(recent=state.recent) == state


def test_one_batch_writes_thousands_of_members_of_one_key(redis_url: str) -> None:
    """Sorted-set writes are coalesced per key into chunks of ZSET_CHUNK members: a batch of
    2,500 fixes of one vehicle (2,500 log entries, presence intervals in one cell) lands
    whole, and reads as of moments inside it equal the in-memory store's."""
    from featurestore.memory_store import MemoryStore
    from featurestore.redis_layout import ZSET_CHUNK

    t0 = 1_780_300_000_000
    batch = [Fix(vehicle_id="veh-1", event_ms=t0 + 2000 * i, lat=-33.2 + 1e-7 * i, lon=-20.6,
                 status="vacant" if (i // 100) % 2 else "occupied",
                 arrival_ms=t0 + 2000 * i + 500) for i in range(2500)]
    redis_store = RedisStore.from_url(redis_url, history_ms=10**8, namespace="chunk")
    mem = MemoryStore(history_ms=10**8)
    Engine(redis_store).process(batch)
    Engine(mem).process(batch)
    assert 2500 > 2 * ZSET_CHUNK
    assert redis_store.client.zcard("chunk:vl:{veh-1}") == 1  # one group: the batch
    assert [m.count(b"\x1d") for m in redis_store.client.zrange("chunk:vl:{veh-1}", 0, -1)
            ] == [2500]
    # presence: one interval per fix (a new event each time), all in one cell: 1,300
    # occupied and 1,200 vacant ones, each key written in chunks
    lay = redis_store.layout
    cell = redis_store.load_vehicles(["veh-1"])["veh-1"].cell
    assert [redis_store.client.zcard(lay.presence(cell, status))
            for status in ("occupied", "vacant")] == [1300, 1200]
    for k in (0, 999, 1000, 1001, 2001, 2499):
        at = batch[k].arrival_ms
        assert Lookup(redis_store).vehicle("veh-1", at) == Lookup(mem).vehicle("veh-1", at)
        assert Lookup(redis_store).cell(cell, at) == Lookup(mem).cell(cell, at)
        # the 5-minute window: the as-of minute and the 4 before it, fixes known by then
        want = sum(1 for f in batch[:k + 1] if f.event_ms // 60_000 >= at // 60_000 - 4)
        assert Lookup(redis_store).cell(cell, at)["cell_fixes_5m"] == want
        assert want == 1 if k == 0 else want > 100
