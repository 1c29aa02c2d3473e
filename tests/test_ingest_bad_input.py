"""Bad input through the real broker into real Redis: every broken message lands in the
dead-letter topic with its exact reason, its raw bytes byte for byte and its source
coordinates; the consumer keeps going; the counts add up exactly. With each Kafka client
(kafka-python, and confluent-kafka when installed)."""

from __future__ import annotations

import uuid

import h3
import orjson
import pytest
from ingest_support import KAFKA_CLIENTS
from kafka import KafkaConsumer, KafkaProducer, TopicPartition

from featurestore.lookup import Lookup
from featurestore.redis_store import RedisStore
from ingest.consumer import ConsumerLoop, LoopOptions
from ingest.dead_letters import ConfluentDeadLetters, KafkaDeadLetters
from ingest.sources import KafkaSettings, KafkaSource

T0 = 1_780_000_000_000  # 2026-05-28T20:26:40Z, epoch ms
LAT, LON = 10.0, 20.0  # an arbitrary place (open sea): the engine needs no map


def fix(vid: str, event_ms: int, lat: float, lon: float, status: str, **extra: object) -> bytes:
    return orjson.dumps({"vehicle_id": vid, "event_ts": event_ms / 1000, "lat": lat, "lon": lon,
                         "status": status, **extra})


# (key, value, record timestamp, expected reason or None for accepted)
def messages() -> list[tuple[bytes | None, bytes, int, str | None]]:
    a, b = b"veh-A", b"veh-B"
    step = 0.001  # about 111 m of latitude
    out: list[tuple[bytes | None, bytes, int, str | None]] = [
        (a, fix("veh-A", T0, LAT, LON, "vacant"), T0 + 500, None),
        (b, fix("veh-B", T0, LAT + 0.05, LON, "vacant"), T0 + 700, None),
        (a, fix("veh-A", T0 + 15_000, LAT + step, LON, "vacant"), T0 + 15_400, None),
        # broken messages
        (a, b'{"vehicle_id": "veh-A", "event_ts": 1780000020, "lat": ', T0 + 20_000, "malformed"),
        (a, b"\xff\xfe not even text", T0 + 20_100, "malformed"),
        (a, b"[1, 2, 3]", T0 + 20_200, "malformed"),
        (a, fix("veh-A", T0 + 16_000, LAT, LON, "vacant", pad="x" * 17_000), T0 + 20_300,
         "malformed"),  # oversize: more than 16 KiB
        (a, orjson.dumps({"vehicle_id": "veh-A", "event_ts": (T0 + 17_000) / 1000,
                          "lat": "10.0", "lon": LON, "status": "vacant"}), T0 + 20_400,
         "invalid:lat"),  # wrong type: a string for a number
        (a, fix("veh-A", T0 + 17_500, True, LON, "vacant"), T0 + 20_450, "invalid:lat"),
        (a, fix("veh-A", T0 + 18_000, 91.5, LON, "vacant"), T0 + 20_500, "invalid:lat"),
        (a, fix("veh-A", T0 + 18_500, LAT, -180.5, "vacant"), T0 + 20_600, "invalid:lon"),
        (a, fix("veh-A", T0 + 19_000, LAT, LON, "parked"), T0 + 20_700, "invalid:status"),
        (a, orjson.dumps({"vehicle_id": "veh-A", "event_ts": (T0 + 19_500) / 1000, "lat": LAT,
                          "lon": LON}), T0 + 20_800, "invalid:status"),  # status missing
        (a, fix("veh-A", T0 + 19_600, LAT, LON, "vacant", speed_mps=-3.0), T0 + 20_850,
         "invalid:speed_mps"),
        (a, fix("veh-A", T0 + 19_700, LAT, LON, "vacant") .replace(b'"event_ts":', b'"event_ts'
                                                                    b'_x":'), T0 + 20_870,
         "invalid:event_ts"),  # event time missing
        (b"veh A!", fix("veh A!", T0 + 19_800, LAT, LON, "vacant"), T0 + 20_880,
         "invalid:vehicle_id"),
        (None, fix("veh-B", T0 + 20_000, LAT + 0.05, LON, "vacant"), T0 + 20_900,
         "invalid:key"),  # missing key
        (b"veh-Z", fix("veh-B", T0 + 20_000, LAT + 0.05, LON, "vacant"), T0 + 21_000,
         "invalid:key"),  # key is not the vehicle_id
        # engine rejections: timing and duplicates
        (b, fix("veh-B", T0 - 400_000, LAT + 0.05, LON, "vacant"), T0 + 21_100, "too_late"),
        (b, fix("veh-B", T0 + 90_000, LAT + 0.05, LON, "vacant"), T0 + 21_200, "from_future"),
        (a, fix("veh-A", T0 + 15_000, LAT + step, LON, "vacant"), T0 + 21_300, "duplicate"),
        # good fixes after the bad ones: veh-A picks up a passenger and drives on
        (a, fix("veh-A", T0 + 30_000, LAT + 2 * step, LON, "occupied"), T0 + 30_300, None),
        (a, fix("veh-A", T0 + 45_000, LAT + 3 * step, LON, "occupied"), T0 + 45_200, None),
        (b, fix("veh-B", T0 + 45_000, LAT + 0.05, LON + step, "offline"), T0 + 45_500, None),
    ]
    return out


@pytest.fixture
def topic(kafka_broker) -> str:
    name = f"bad-{uuid.uuid4().hex[:8]}"
    kafka_broker.create_topic(name, 2)
    kafka_broker.create_topic(f"{name}-dead-letters", 1)
    return name


def _produce(bootstrap: str, topic: str, msgs) -> list[tuple[str, int]]:
    producer = KafkaProducer(bootstrap_servers=bootstrap, acks="all")
    try:
        futures = [producer.send(topic, key=k, value=v, timestamp_ms=ts)
                   for k, v, ts, _ in msgs]
        producer.flush(timeout=30)
        return [(f"{topic}:{m.partition}", m.offset)
                for m in (f.get(timeout=10) for f in futures)]
    finally:
        producer.close(timeout=5)


def _read_all(bootstrap: str, topic: str, expected: int) -> list:
    consumer = KafkaConsumer(bootstrap_servers=bootstrap, enable_auto_commit=False)
    tp = TopicPartition(topic, 0)
    consumer.assign([tp])
    consumer.seek_to_beginning(tp)
    out: list = []
    try:
        for _ in range(50):  # bounded: at most 50 polls of 200 ms
            for recs in consumer.poll(timeout_ms=200).values():
                out.extend(recs)
            if len(out) >= expected:
                break
    finally:
        consumer.close()
    return out


@pytest.mark.parametrize("client", KAFKA_CLIENTS)
def test_broken_messages_land_in_dead_letters_and_the_consumer_goes_on(
        kafka_broker, redis_url: str, topic: str, client: str) -> None:
    msgs = messages()
    where = _produce(kafka_broker.bootstrap, topic, msgs)
    store = RedisStore.from_url(redis_url, history_ms=900_000)
    if client == "confluent":
        from ingest.confluent_source import ConfluentSource

        source_class, sink_class = ConfluentSource, ConfluentDeadLetters
    else:
        source_class, sink_class = KafkaSource, KafkaDeadLetters
    source = source_class(kafka_broker.bootstrap, topic, "bad-input", partitions=[0, 1],
                          settings=KafkaSettings(max_poll_records=4, fetch_max_wait_ms=100))
    sink = sink_class(kafka_broker.bootstrap, f"{topic}-dead-letters")
    loop = ConsumerLoop(source, store, sink,
                        options=LoopOptions(max_poll_records=4, poll_timeout_s=0.2,
                                            idle_exit_s=1.5))
    stats = loop.run()

    expected = [m[3] for m in msgs]
    want_rejected: dict[str, int] = {}
    for reason in expected:
        if reason is not None:
            want_rejected[reason] = want_rejected.get(reason, 0) + 1
    # the counts add up, exactly
    assert stats.received == len(msgs) == 24
    assert stats.accepted == expected.count(None) == 6
    assert dict(stats.rejected) == want_rejected
    assert stats.received == stats.accepted + stats.rejected_total
    assert stats.dead_letters == stats.rejected_total == 18
    assert stats.batches >= 24 // 4  # several batches: the consumer went on after each

    # every rejected message is in the dead-letter topic, exactly as it was sent
    letters = _read_all(kafka_broker.bootstrap, f"{topic}-dead-letters", 18)
    assert len(letters) == 18
    by_source = {}
    for rec in letters:
        h = {k: v.decode() for k, v in rec.headers}
        by_source[(h["source_partition"], int(h["source_offset"]))] = (rec, h)
    for (key, value, ts, reason), src in zip(msgs, where, strict=True):
        if reason is None:
            assert src not in by_source
            continue
        rec, h = by_source[src]
        assert h["reason"] == reason, (src, h)
        assert rec.value == value  # raw bytes, byte for byte
        assert rec.key == key
        assert h["source_timestamp"] == str(ts)
        assert h["detail"]
    oversize = next(h for _, h in by_source.values() if "exceeds" in h["detail"])
    assert oversize["detail"].endswith("exceeds 16384")

    # the good fixes after the bad ones were applied
    wm = store.watermark_ms()
    assert wm == T0 + 45_500
    look = Lookup(store)
    a = look.vehicle("veh-A", wm)
    assert a["vehicle_status"] == "occupied"
    assert a["trip_active"] == 1 and a["trip_fixes"] == 2
    pickup_cell = h3.latlng_to_cell(LAT + 0.002, LON, 8)
    assert a["trip_start_cell"] == pickup_cell
    assert look.cell(pickup_cell, wm)["cell_pickups_5m"] == 1
    assert look.vehicle("veh-B", wm)["vehicle_status"] == "offline"
    # 6 accepted fixes in total over all cells (the duplicate and the rejected count nowhere)
    total = sum(look.cell(c, wm)["cell_fixes_5m"] for c in {
        h3.latlng_to_cell(lat, lon, 8) for lat, lon in (
            (LAT, LON), (LAT + 0.001, LON), (LAT + 0.002, LON), (LAT + 0.003, LON),
            (LAT + 0.05, LON), (LAT + 0.05, LON + 0.001))})
    assert total == 6
    # offsets and end offsets stored: both partitions fully consumed
    ends: dict[str, int] = {}
    for part, _ in where:
        ends[part] = ends.get(part, 0) + 1
    assert store.offsets() == ends
    assert {p: e for p, e in store.highwaters().items() if e} == ends
