"""Helpers of the ingest tests: produce records, replay the same messages, compare stores."""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from pathlib import Path

import orjson
import pytest

from featurestore.config import EngineConfig
from featurestore.lookup import Lookup, RouteQuery
from featurestore.memory_store import MemoryStore
from ingest.confluent_source import INSTALL_HINT, confluent_available
from replay.readers import iter_file
from replay.session import ReplaySession

# The Kafka clients the live-path tests run with (``--kafka-client``); confluent-kafka is optional.
KAFKA_CLIENTS = [
    pytest.param("kafka-python", id="kafka-python"),
    pytest.param("confluent", id="confluent", marks=pytest.mark.skipif(
        not confluent_available(), reason=f"confluent-kafka not installed: {INSTALL_HINT}")),
]


def key_and_arrival(raw: bytes) -> tuple[bytes | None, int | None]:
    """The record key (the message's vehicle_id, when it has a text one) and its arrival in ms
    (its arrival_ts, when numeric) of a recorded JSON line."""
    try:
        d = orjson.loads(raw)
    except orjson.JSONDecodeError:
        return None, None
    if not isinstance(d, dict):
        return None, None
    vid = d.get("vehicle_id")
    arr = d.get("arrival_ts")
    key = vid.encode() if isinstance(vid, str) else None
    ms = round(arr * 1000) if isinstance(arr, (int, float)) and not isinstance(arr, bool) else None
    return key, ms


def produce_day(bootstrap: str, topic: str, lines: Iterable[bytes]) -> int:
    """Send recorded lines to ``topic`` as the live producers would: key = vehicle_id, record
    timestamp = arrival_ts (a line without one takes its predecessor's). Returns the count."""
    from kafka import KafkaProducer

    producer = KafkaProducer(bootstrap_servers=bootstrap, acks="all", linger_ms=5)
    n = 0
    last: int | None = None
    try:
        for raw in lines:
            key, ms = key_and_arrival(raw)
            ms = ms if ms is not None else last
            last = ms
            producer.send(topic, key=key, value=raw, timestamp_ms=ms)
            n += 1
        producer.flush(timeout=30)
    finally:
        producer.close(timeout=5)
    return n


def replayed(path: str | Path, config: EngineConfig | None = None) -> tuple[MemoryStore, object]:
    """The state ``cellpulse replay`` builds from a JSON Lines file (and its engine stats)."""
    session = ReplaySession(config=config)
    session.run(iter_file(path))
    assert isinstance(session.store, MemoryStore)
    return session.store, session.engine.stats


def keys_of(store: MemoryStore) -> tuple[list[str], list[str], list[RouteQuery]]:
    """Every vehicle, cell and route (origin, destination, hour) the store holds."""
    dump = store.dump()
    vehicles = sorted(dump["vehicles"])  # type: ignore[arg-type]
    cells = sorted(dump["cells"])  # type: ignore[arg-type]
    routes = []
    for key in dump["routes"]:  # type: ignore[union-attr]
        o, d, h = key.split("|")
        routes.append(RouteQuery(o, d, int(h)))
    return vehicles, cells, routes


def same_value(a: object, b: object) -> bool:
    """Integers (and text, None) equal; floats within 1e-9 relative (NaN equals NaN)."""
    if isinstance(a, float) or isinstance(b, float):
        if a is None or b is None:
            return a is b
        fa, fb = float(a), float(b)  # type: ignore[arg-type]
        if math.isnan(fa) or math.isnan(fb):
            return math.isnan(fa) and math.isnan(fb)
        return math.isclose(fa, fb, rel_tol=1e-9, abs_tol=1e-12)
    return type(a) is type(b) and a == b


def differences(live: Sequence[dict], want: Sequence[dict], names: Sequence[object]) -> list:
    """(key, feature, live value, replay value) of every mismatch."""
    out = []
    for name, lv, rv in zip(names, live, want, strict=True):
        assert lv.keys() == rv.keys(), name
        for feature in rv:
            if not same_value(lv[feature], rv[feature]):
                out.append((name, feature, lv[feature], rv[feature]))
    return out


def compare_with_replay(live_store: object, replay_store: MemoryStore,
                        config: EngineConfig | None = None) -> dict[str, int]:
    """Assert the live store answers exactly as the replayed one at their common watermark,
    for every vehicle, cell and route the replay holds. Returns how many keys were compared."""
    wm = replay_store.watermark_ms()
    assert wm is not None
    assert live_store.watermark_ms() == wm  # type: ignore[attr-defined]
    vehicles, cells, routes = keys_of(replay_store)
    got = Lookup(live_store, config).vectors(wm, vehicles, cells, routes)  # type: ignore[arg-type]
    want = Lookup(replay_store, config).vectors(wm, vehicles, cells, routes)
    diffs = (differences(got[0], want[0], vehicles) + differences(got[1], want[1], cells)
             + differences(got[2], want[2], routes))
    assert not diffs, diffs[:10]
    return {"vehicles": len(vehicles), "cells": len(cells), "routes": len(routes)}


def redis_cell_fixes(client, namespace: str = "cellpulse") -> int:
    """The sum of every per-cell, per-bucket fix counter held in Redis."""
    total = 0
    for key in client.scan_iter(f"{namespace}:c:*", count=1000):
        for field, value in client.hgetall(key).items():
            if field.startswith(b"f"):
                total += int(value)
    return total


def memory_cell_fixes(store: MemoryStore) -> int:
    return sum(v[0] for buckets in store.dump()["cells"].values()  # type: ignore[union-attr]
               for v in buckets.values())


def replay_counters(engine_stats) -> dict[str, int]:
    """A replay's message counts in the form the stores keep them (``StateStore.counters``)."""
    out = {"received": engine_stats.received, "accepted": engine_stats.accepted,
           "in_order": engine_stats.in_order, "out_of_order": engine_stats.out_of_order}
    out.update({f"rejected:{reason}": n for reason, n in engine_stats.rejected.items()})
    return {k: v for k, v in out.items() if v}
