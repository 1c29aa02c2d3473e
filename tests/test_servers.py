"""The real test servers themselves: redis-server (plain and AOF restart) and the Tansu
broker (partitioned produce, consume by manual assignment)."""

from __future__ import annotations

import redis
from kafka import KafkaConsumer, KafkaProducer, TopicPartition
from servers import RedisServer


def test_redis_ping_set_get(redis_url):
    client = redis.Redis.from_url(redis_url)
    try:
        assert client.ping() is True
        assert client.dbsize() == 0  # the fixture flushed it
        client.set("cellpulse:probe", b"\x00\xffok")
        assert client.get("cellpulse:probe") == b"\x00\xffok"
    finally:
        client.close()


def test_redis_aof_survives_restart_on_same_port(tmp_path):
    with RedisServer(workdir=tmp_path, appendonly=True) as server:
        port, first_pid = server.port, server.pid
        client = server.client()
        client.set("kept", "42")
        client.hset("h", mapping={"a": "1", "b": "2"})
        client.close()
        server.kill()  # a crash: AOF with appendfsync always has every write
        assert not server.running
        server.start()
        assert server.port == port and server.pid != first_pid
        client = server.client()
        try:
            assert client.get("kept") == b"42"
            assert client.hgetall("h") == {b"a": b"1", b"b": b"2"}
        finally:
            client.close()
    assert not server.running


def test_kafka_broker_keyed_records_round_trip(kafka_broker):
    topic = "servers-roundtrip"
    kafka_broker.create_topic(topic, 4)
    base_ms = 1_700_000_000_000
    sent = {}
    producer = KafkaProducer(bootstrap_servers=kafka_broker.bootstrap, acks="all", linger_ms=5)
    try:
        futures = []
        for i in range(20):
            key = f"veh-{i % 5}".encode()
            ts = base_ms + i * 1000
            futures.append(
                producer.send(topic, key=key, value=f"fix-{i}".encode(), timestamp_ms=ts)
            )
        producer.flush(timeout=10)
        for i, fut in enumerate(futures):
            meta = fut.get(timeout=10)
            sent[(meta.partition, meta.offset)] = (f"veh-{i % 5}".encode(), base_ms + i * 1000)
    finally:
        producer.close(timeout=5)
    assert len(sent) == 20

    parts = [TopicPartition(topic, p) for p in range(4)]
    consumer = KafkaConsumer(
        bootstrap_servers=kafka_broker.bootstrap, enable_auto_commit=False,
        consumer_timeout_ms=3000,
    )
    got = {}
    try:
        consumer.assign(parts)
        consumer.seek_to_beginning(*parts)
        for _ in range(50):  # bounded: each poll waits at most 200 ms
            for _tp, records in consumer.poll(timeout_ms=200).items():
                for r in records:
                    got[(r.partition, r.offset)] = (r.key, r.timestamp, r.value)
            if len(got) >= 20:
                break
    finally:
        consumer.close()
    assert {k: (key, ts) for k, (key, ts, _v) in got.items()} == sent
    # the default partitioner keeps one key on one partition
    partitions_of = {}
    for (p, _o), (key, _ts, _v) in got.items():
        partitions_of.setdefault(key, set()).add(p)
    assert all(len(ps) == 1 for ps in partitions_of.values())
    assert sorted(v for _k, _t, v in got.values()) == sorted(f"fix-{i}".encode() for i in range(20))
