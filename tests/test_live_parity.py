"""Parity through real servers: a recorded day with late, duplicate, out-of-order and broken
messages, pushed through a real broker into real Redis by two consumers in one group over four
partitions, served over HTTP and through the Python client, equals `cellpulse replay` of the
same file as of every checkpoint (integers exactly, floats within 1e-9 relative). With each
Kafka client (``--kafka-client``; the confluent run also pushes with the confluent producer)."""

from __future__ import annotations

import math
import os
import random
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import h3
import httpx
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from ingest_support import KAFKA_CLIENTS
from servers import free_port

from featurestore.catalog import Catalog
from featurestore.client import FeatureClient
from featurestore.engine import Engine
from featurestore.lookup import RouteQuery
from featurestore.memory_store import MemoryStore
from featurestore.redis_store import RedisStore
from featurestore.schema import Fix
from ingest.citysim import CityConfig, write_jsonl
from replay.ordering import arrival_order
from replay.readers import iter_file
from replay.to_kafka import push_to_kafka

TOPIC = "parity-fixes"
HISTORY_S = 2 * 86400  # the whole recorded day can be asked about
WAIT_S = 120.0
CATALOG = Catalog()


def _cli(*args: str) -> list[str]:
    return [sys.executable, "-m", "featurestore.cli", *args]


def _stop(proc: subprocess.Popen) -> None:
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(5)


@pytest.fixture(scope="module")
def day(tmp_path_factory: pytest.TempPathFactory) -> dict:
    """A recorded morning with faults at several times the demo's shares, split in two parts
    by arrival time so that the second part can be pushed after the first is checked."""
    d: Path = tmp_path_factory.mktemp("parity")
    path = d / "day.jsonl"
    write_jsonl(path, CityConfig(seed=13, vehicles=30, hours=9, late_share=0.03,
                                 duplicate_share=0.02, out_of_order_share=0.02,
                                 broken_share=0.01, future_share=0.005))
    items = list(arrival_order(iter_file(path)))
    arrivals = sorted(it.arrival_ms for it in items if it.arrival_ms is not None)
    mid = arrivals[len(arrivals) * 9 // 20]
    parts = (d / "part1.jsonl", d / "part2.jsonl")
    lines = path.read_bytes().splitlines()
    with parts[0].open("wb") as a, parts[1].open("wb") as b:
        for it in iter_file(path):  # file order; row = line number
            late = it.arrival_ms is not None and it.arrival_ms > mid
            (b if late else a).write(lines[it.row] + b"\n")
    fixes = [it.value for it in items if isinstance(it.value, Fix)]
    oracle = MemoryStore()
    result = Engine(oracle).process([it.value for it in items])
    return {"path": path, "parts": parts, "mid": mid, "last": arrivals[-1], "fixes": fixes,
            "routes": [tuple(k.split("|")) for k in oracle.dump()["routes"]],
            "reasons": {r.reason for _, r in result.rejected},
            "out_of_order": result.out_of_order}


def _keys(day: dict) -> tuple[list[str], list[str], list[RouteQuery]]:
    rng = random.Random(4)
    fixes = day["fixes"]
    vehicles = sorted({f.vehicle_id for f in fixes})
    cells = sorted({h3.latlng_to_cell(f.lat, f.lon, 8) for f in fixes})
    cells = rng.sample(cells, 40) + [h3.latlng_to_cell(10.0, 10.0, 8)]  # one never seen
    routes = [RouteQuery(o, d, int(h)) for o, d, h in rng.sample(day["routes"], 15)]
    routes += [RouteQuery(routes[0].origin_cell, routes[0].dest_cell)]  # the hour of T
    return vehicles, cells, routes


def _same(want: object, got: object) -> bool:
    if isinstance(want, float) and math.isnan(want):
        return got is None or (isinstance(got, float) and math.isnan(got))
    if isinstance(want, float):
        return isinstance(got, (int, float)) and math.isclose(want, got, rel_tol=1e-9,
                                                              abs_tol=1e-12)
    return want == got and type(want) is type(got)


def _replay_at(day: dict, moments: list[int], tmp: Path) -> dict:
    """`cellpulse replay --labels` of the whole recorded file: the answers as of each moment."""
    vehicles, cells, routes = _keys(day)
    rows: dict[str, list] = {"ts": [], "vehicle_id": [], "cell": [], "origin_cell": [],
                             "dest_cell": []}

    def add(t: int, vid: str | None = None, cell: str | None = None,
            route: RouteQuery | None = None) -> None:
        rows["ts"].append(t / 1000)
        rows["vehicle_id"].append(vid)
        rows["cell"].append(cell)
        rows["origin_cell"].append(route.origin_cell if route else None)
        rows["dest_cell"].append(route.dest_cell if route else None)

    for t in moments:
        for v in vehicles:
            add(t, vid=v)
        for c in cells:
            add(t, cell=c)
        for r in routes:
            if r.hour is None:  # label rows take the route hour from ts, as the live path does
                add(t, route=r)
    labels = tmp / "labels.parquet"
    pq.write_table(pa.table(rows), labels)
    out = tmp / "train.parquet"
    subprocess.run(_cli("replay", str(day["path"]), "--labels", str(labels), "--out", str(out),
                        "--no-progress"), check=True, capture_output=True, timeout=300)
    table = pq.read_table(out).to_pylist()
    got: dict = {}
    for row in table:
        t = round(row["ts"] * 1000)
        if row["vehicle_id"] is not None:
            got[(t, "vehicle", row["vehicle_id"])] = row
        elif row["cell"] is not None:
            got[(t, "cell", row["cell"])] = row
        else:
            got[(t, "route", row["origin_cell"], row["dest_cell"])] = row
    return got


def _held(log: Path) -> set[str]:
    """The partitions a consumer holds, from its log's latest assignment."""
    held: set[str] = set()
    for line in log.read_text(errors="replace").splitlines():
        if " assigned " in f" {line} ":
            held = set(line.split("assigned ", 1)[1].split(", "))
        elif " revoked " in f" {line} ":
            held = set()
    return {p.strip() for p in held}


def _wait_assigned(live: dict) -> list[set[str]]:
    """Wait until the two consumers share the four partitions between them."""
    deadline = time.monotonic() + WAIT_S
    while True:
        held = [_held(log) for log in live["logs"]]
        if all(held) and sum(len(h) for h in held) == 4:
            return held
        assert time.monotonic() < deadline, [log.read_text()[-1500:] for log in live["logs"]]
        time.sleep(0.2)


def _wait_known(client: FeatureClient, t: int, procs: list[subprocess.Popen]) -> int:
    deadline = time.monotonic() + WAIT_S
    while time.monotonic() < deadline:
        for p in procs:
            assert p.poll() is None, f"a process stopped early with code {p.returncode}"
        known = client.known_at_ms()
        if known is not None and known >= t:
            return known
        time.sleep(0.2)
    raise AssertionError(f"known_at did not reach {t} in {WAIT_S} s (is {client.known_at_ms()})")


@pytest.fixture(params=KAFKA_CLIENTS)
def live(request, kafka_broker, redis_url: str, tmp_path: Path) -> Iterator[dict]:
    """Two consumers in one group over a 4-partition topic, and the HTTP server."""
    client = request.param
    topic = f"{TOPIC}-{client}"
    kafka_broker.create_topic(topic, 4)
    kafka_broker.create_topic(f"{topic}-dead-letters", 1)
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    procs: list[subprocess.Popen] = []
    logs = [tmp_path / f"ingest-{i}.log" for i in range(2)]
    port = free_port()
    try:
        for log in logs:
            procs.append(subprocess.Popen(
                _cli("ingest", "--bootstrap", kafka_broker.bootstrap, "--topic", topic,
                     "--kafka-client", client, "--group", f"parity-{client}",
                     "--redis-url", redis_url, "--history", str(HISTORY_S),
                     "--session-timeout-ms", "3000", "--heartbeat-interval-ms", "1000",
                     "--max-poll-records", "400"),
                stdout=log.open("wb"), stderr=subprocess.STDOUT, env=env))
        serve_log = tmp_path / "serve.log"
        procs.append(subprocess.Popen(
            _cli("serve", "--redis-url", redis_url, "--port", str(port)),  # consumers' history
            stdout=serve_log.open("wb"), stderr=subprocess.STDOUT, env=env))
        base = f"http://127.0.0.1:{port}"
        deadline = time.monotonic() + 30
        while True:
            try:
                if httpx.get(f"{base}/v1/health", timeout=2).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            assert time.monotonic() < deadline, serve_log.read_text()[-2000:]
            time.sleep(0.2)
        yield {"procs": procs, "base": base, "logs": logs, "bootstrap": kafka_broker.bootstrap,
               "client": client, "topic": topic}
    finally:
        for p in procs:
            _stop(p)


def _check(day: dict, live: dict, client: FeatureClient, moments: list[int],
           expected: dict) -> int:
    vehicles, cells, routes = _keys(day)
    keys = ([{"vehicle_id": v} for v in vehicles] + [{"cell": c} for c in cells]
            + [{"origin_cell": r.origin_cell, "dest_cell": r.dest_cell,
                **({"hour": r.hour} if r.hour is not None else {})} for r in routes])
    fixed = _fixed_hour_routes(day, moments)
    compared = 0
    for t in moments:
        resp = httpx.post(f"{live['base']}/v1/vectors", json={"keys": keys, "as_of": t},
                          timeout=30)
        assert resp.status_code == 200, resp.text
        body = resp.json()
        assert body["as_of"] == t and body["catalog_version"] == CATALOG.version
        assert body["known_at"] >= t
        http = body["vectors"]
        py = client.vectors(vehicles, cells, routes, as_of=t)
        py_all = py.vehicles + py.cells + py.routes
        assert len(http) == len(py_all) == len(keys)
        for i, key in enumerate(keys):
            if "vehicle_id" in key:
                want = expected[(t, "vehicle", key["vehicle_id"])]
                names = CATALOG.names("vehicle", "trip")
            elif "cell" in key:
                want = expected[(t, "cell", key["cell"])]
                names = CATALOG.names("cell")
            elif "hour" in key:
                want = fixed[(t, i - len(vehicles) - len(cells))]
                names = CATALOG.names("route")
            else:
                want = expected[(t, "route", key["origin_cell"], key["dest_cell"])]
                names = CATALOG.names("route")
            for name in names:
                assert _same(want[name], http[i][name]), (t, key, name, want[name], http[i])
                assert _same(want[name], py_all[i][name]), (t, key, name, want[name], py_all[i])
                compared += 1
    return compared


def _fixed_hour_routes(day: dict, moments: list[int]) -> dict[tuple[int, int], dict]:
    """Route vectors with a fixed pickup hour as of each moment, from a replay session of the
    same file (label tables take the hour from ts, so they cannot ask for these)."""
    from replay.session import ReplaySession

    _, _, routes = _keys(day)
    fixed = [r for r in routes if r.hour is not None]
    out: dict[tuple[int, int], dict] = {}
    session = ReplaySession()
    for t in moments:
        session.ask(t, routes=fixed, answer=lambda v, c, r, t=t: out.update(
            {(t, i): vec for i, vec in enumerate(r)}))
    session.run(arrival_order(iter_file(day["path"])))
    return out


def test_live_path_equals_replay(day: dict, live: dict, redis_url: str, tmp_path: Path) -> None:
    client = FeatureClient(RedisStore.from_url(redis_url, history_ms=None))
    rng = random.Random(9)
    fixes = day["fixes"]
    first, mid, last = fixes[0].arrival_ms, day["mid"], day["last"]
    in_first = [f.arrival_ms for f in fixes if f.arrival_ms <= mid]
    in_second = [f.arrival_ms for f in fixes if f.arrival_ms > mid]
    # stage 1 moments: the end of what was pushed (answered from current state), an exact
    # arrival and the millisecond before it, and random moments (answered from history)
    stage1 = sorted({mid, in_first[len(in_first) // 2], in_first[len(in_first) // 2] - 1,
                     *(rng.randrange(first, mid) for _ in range(3))})
    stage2 = sorted({last, in_second[len(in_second) // 3], in_second[len(in_second) // 3] - 1,
                     rng.randrange(first, mid), *(rng.randrange(mid, last) for _ in range(3))})
    expected = _replay_at(day, stage1 + stage2, tmp_path)

    topic = live["topic"]
    held = _wait_assigned(live)
    assert all(held) and set().union(*held) == {f"{topic}:{p}" for p in range(4)}, held
    pushed = push_to_kafka([day["parts"][0]], live["bootstrap"], topic,
                           kafka_client=live["client"])
    assert pushed.delivered == pushed.sent > 0
    _wait_known(client, mid, live["procs"])
    compared = _check(day, live, client, stage1, expected)

    pushed = push_to_kafka([day["parts"][1]], live["bootstrap"], topic,
                           kafka_client=live["client"])
    assert pushed.delivered == pushed.sent > 0
    _wait_known(client, last, live["procs"])
    compared += _check(day, live, client, stage2, expected)
    vehicles, cells, routes = _keys(day)
    per_moment = (len(vehicles) * len(CATALOG.names("vehicle", "trip"))
                  + len(cells) * len(CATALOG.names("cell"))
                  + len(routes) * len(CATALOG.names("route")))
    assert compared == per_moment * (len(stage1) + len(stage2))

    # every partition was applied, and the group still had both members at the end
    assert sorted(client.store.positions()) == [f"{topic}:{p}" for p in range(4)]
    assert all(_held(log) for log in live["logs"])
    # the consumers ran with the client asked for
    uses_librdkafka = ["with librdkafka" in log.read_text() for log in live["logs"]]
    assert uses_librdkafka == [live["client"] == "confluent"] * 2
    # the checkpoints caught trips in progress, and the day had every kind of fault
    assert any(row["trip_active"] for k, row in expected.items() if k[1] == "vehicle")
    assert {"too_late", "duplicate", "from_future", "malformed"} <= day["reasons"]
    assert day["out_of_order"] > 0
