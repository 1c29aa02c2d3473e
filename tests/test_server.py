"""The HTTP API (featurestore/server.py): vectors equal the lookups', batches keep request
order, bad requests get their status and message, the schema and the metrics say what they
should; and `cellpulse serve` over real HTTP against a real redis-server."""

from __future__ import annotations

import json
import math
import os
import signal
import subprocess
import sys
import time
import warnings

import fakeredis
import httpx
import pytest
from prometheus_client.parser import text_string_to_metric_families
from servers import LOOPBACK, RedisServer, free_port

from featurestore.catalog import Catalog
from featurestore.cells import cell_of
from featurestore.cli import main as cli_main
from featurestore.client import FeatureClient
from featurestore.config import EngineConfig
from featurestore.engine import Engine
from featurestore.lookup import Lookup
from featurestore.redis_store import RedisStore
from featurestore.schema import Fix
from featurestore.server import create_app, open_store, parse_as_of, redact_url
from featurestore.store import SourceSpan

with warnings.catch_warnings():  # starlette >= 1.10 announces a switch to httpx2 for this
    warnings.simplefilter("ignore", UserWarning)
    from fastapi.testclient import TestClient

T0 = 1_780_272_000_000  # 2026-06-01T00:00:00Z
HOUR = 3_600_000
CELL = "88c19cb94dfffff"  # an H3 cell at resolution 8 (no fix lands there)
ROUTE_CELL = "87c19cbb2ffffff"  # resolution 7


def _fixes() -> list[Fix]:
    """veh-1: two vacant fixes, then four occupied (a trip in progress); veh-2: a whole trip,
    picked up at T0+20 s and dropped off at T0+80 s (event time), then a vacant fix."""
    v1 = [Fix("veh-1", T0 + 15_000 * k, -33.2 + k / 200, -20.6,
              "occupied" if k >= 2 else "vacant", T0 + 15_000 * k + 700) for k in range(6)]
    v2 = [Fix("veh-2", T0 + 20_000 * k, -33.25 - k / 100, -20.65, s, T0 + 20_000 * k + 400)
          for k, s in enumerate(("vacant", "occupied", "occupied", "occupied", "vacant"))]
    return sorted(v1 + v2, key=lambda f: f.arrival_ms)


def _fill(store: RedisStore) -> list[Fix]:
    """Apply the fixes in two batches on partition fixes:0; its consumer saw end offset 11."""
    fixes = _fixes()
    eng = Engine(store, store.config)
    eng.process(fixes[:5], spans={"fixes:0": SourceSpan(0, 5, fixes[4].arrival_ms)})
    eng.process(fixes[5:], spans={"fixes:0": SourceSpan(5, 11, fixes[-1].arrival_ms)})
    store.set_highwaters({"fixes:0": 11, "fixes:1": 0})
    return fixes


LAST = T0 + 80_400  # the latest arrival: veh-2's dropoff fix
NOW = T0 + 100_000  # the server's clock in these tests


@pytest.fixture
def served() -> tuple[TestClient, RedisStore]:
    store = RedisStore(fakeredis.FakeRedis(), history_ms=HOUR)
    _fill(store)
    client = FeatureClient(store, clock=lambda: NOW / 1000)
    return TestClient(create_app(client)), store


def _json_vector(vector: dict[str, object]) -> dict[str, object]:
    """What a vector from Python looks like in JSON: NaN as null."""
    return {k: None if isinstance(v, float) and math.isnan(v) else v for k, v in vector.items()}


def _same(got: dict[str, object], want: dict[str, object], names: list[str]) -> None:
    """Field by field: NaN <-> null, every other value exactly."""
    for name in names:
        w = want[name]
        if isinstance(w, float) and math.isnan(w):
            assert got[name] is None, name
        else:
            assert got[name] == w and type(got[name]) is type(w), name


# --- vectors ---------------------------------------------------------------------------------

def test_vehicle_vector_equals_the_lookup_field_by_field(served) -> None:
    http, store = served
    cat = Catalog()
    names = cat.names("vehicle", "trip")
    r = http.get("/v1/vehicles/veh-1", params={"as_of": "latest"})
    assert r.status_code == 200
    body = r.json()
    assert body["catalog_version"] == cat.version
    assert body["as_of"] == body["known_at"] == LAST
    # veh-1's latest fix arrived at T0+75.7 s, 4.7 s before as_of
    assert body["staleness"] == {"cell": 0.0, "vehicle": 4.7, "trip": 4.7, "route": 0.0}
    got = body["vector"]
    assert list(got) == ["kind", "vehicle_id", *names]  # catalog order
    assert got["kind"] == "vehicle" and got["vehicle_id"] == "veh-1"
    _same(got, Lookup(store).vehicle("veh-1", LAST), names)
    assert got["trip_fixes"] == 4 and got["trip_active"] == 1
    assert got["vehicle_status"] == "occupied"

    # as of the pickup's arrival (from history): the trip has one fix, no initial heading yet
    pickup = T0 + 30_700
    for as_of in (str(pickup), "2026-06-01T00:00:30.700Z", "2026-06-01T02:00:30.700+02:00"):
        body = http.get("/v1/vehicles/veh-1", params={"as_of": as_of}).json()
        assert body["as_of"] == pickup
        want = Lookup(store).vehicle("veh-1", pickup)
        assert math.isnan(want["trip_initial_heading_deg"])  # NaN in Python ...
        assert body["vector"]["trip_initial_heading_deg"] is None  # ... null in JSON
        assert body["vector"]["trip_fixes"] == 1
        _same(body["vector"], want, names)

    # default as_of: the server's clock, 19.6 s after the last arrival
    body = http.get("/v1/vehicles/veh-1").json()
    assert body["as_of"] == NOW and body["known_at"] == LAST
    assert body["staleness"]["cell"] == pytest.approx(19.6)
    assert body["staleness"]["vehicle"] == pytest.approx(24.3)
    _same(body["vector"], Lookup(store).vehicle("veh-1", NOW), names)

    # a vehicle never seen: counts 0, every other value null
    unseen = http.get("/v1/vehicles/veh-9", params={"as_of": "latest"}).json()["vector"]
    assert unseen["trip_fixes"] == 0 and unseen["vehicle_cell"] is None
    assert unseen["vehicle_speed_mps"] is None and unseen["trip_elapsed_s"] is None


def test_cell_and_route_vectors(served) -> None:
    http, store = served
    fixes = _fixes()
    v1 = [f for f in fixes if f.vehicle_id == "veh-1"][-1]
    cell = cell_of(v1.lat, v1.lon, 8)  # veh-1's latest cell
    body = http.get(f"/v1/cells/{cell.upper()}", params={"as_of": LAST}).json()
    got = body["vector"]
    assert got["kind"] == "cell" and got["cell"] == cell
    _same(got, Lookup(store).cell(cell, LAST), Catalog().names("cell"))
    # by hand: every fix arrived within 5 min and was accepted; veh-1 is there, occupied
    assert got["cell_fixes_5m"] == sum(cell_of(f.lat, f.lon, 8) == cell for f in fixes) == 2
    assert got["cell_occupied_now"] == 1 and got["cell_vacant_now"] == 0

    # veh-2's trip: picked up at T0+20 s, dropped off at T0+80 s -> one trip of 60 s (by hand)
    pick = next(f for f in fixes if f.vehicle_id == "veh-2" and f.status == "occupied")
    drop = [f for f in fixes if f.vehicle_id == "veh-2"][-1]
    o, d = cell_of(pick.lat, pick.lon, 7), cell_of(drop.lat, drop.lon, 7)
    r = http.get(f"/v1/routes/{o.upper()}/{d.upper()}", params={"hour": 0, "as_of": "latest"})
    got = r.json()["vector"]
    assert got == {"kind": "route", "origin_cell": o, "dest_cell": d, "hour": 0,
                   "route_trips": 1, "route_mean_duration_s": 60.0,
                   "route_std_duration_s": 0.0}
    # the hour defaults to the hour of as_of in the city's zone (UTC): 0 here
    assert http.get(f"/v1/routes/{o}/{d}", params={"as_of": LAST}).json()["vector"] == got
    empty = http.get(f"/v1/routes/{o}/{d}", params={"hour": 5, "as_of": LAST}).json()["vector"]
    assert empty["route_trips"] == 0 and empty["route_mean_duration_s"] is None


def test_batch_answers_in_request_order_from_one_store_read(served, monkeypatch) -> None:
    http, store = served
    fixes = _fixes()
    v1 = [f for f in fixes if f.vehicle_id == "veh-1"][-1]
    cell = cell_of(v1.lat, v1.lon, 8)
    pick = next(f for f in fixes if f.vehicle_id == "veh-2" and f.status == "occupied")
    o = cell_of(pick.lat, pick.lon, 7)
    reads = []
    real_read = store.read
    monkeypatch.setattr(store, "read", lambda rq: reads.append(rq) or real_read(rq))
    keys = [{"vehicle_id": "veh-2"}, {"cell": cell.upper()},
            {"origin_cell": o, "dest_cell": ROUTE_CELL, "hour": 3}, {"vehicle_id": "veh-1"},
            {"cell": CELL}, {"vehicle_id": "veh-9"}, {"vehicle_id": "veh-1"}]
    r = http.post("/v1/vectors", json={"keys": keys, "as_of": LAST})
    assert r.status_code == 200
    assert len(reads) == 1  # one store read for the whole batch (one MULTI/EXEC on Redis)
    body = r.json()
    assert body["as_of"] == LAST and body["known_at"] == LAST
    got = body["vectors"]
    assert [(v["kind"], v.get("vehicle_id") or v.get("cell") or v["origin_cell"])
            for v in got] == [("vehicle", "veh-2"), ("cell", cell), ("route", o),
                              ("vehicle", "veh-1"), ("cell", CELL), ("vehicle", "veh-9"),
                              ("vehicle", "veh-1")]
    lk = Lookup(store)
    for key, v in zip(keys, got, strict=True):
        if "vehicle_id" in key:
            want = {"kind": "vehicle", "vehicle_id": key["vehicle_id"],
                    **lk.vehicle(key["vehicle_id"], LAST)}
        elif "cell" in key:
            want = {"kind": "cell", "cell": key["cell"].lower(), **lk.cell(key["cell"].lower(),
                                                                          LAST)}
        else:
            want = {"kind": "route", **key, **lk.route(o, ROUTE_CELL, LAST, hour=3)}
        assert v == _json_vector(want)
    # the largest batch allowed
    r = http.post("/v1/vectors", json={"keys": [{"vehicle_id": "veh-1"}] * 1000, "as_of": LAST})
    assert r.status_code == 200 and len(r.json()["vectors"]) == 1000


# --- bad requests ----------------------------------------------------------------------------

ROUTE = f"/v1/routes/{ROUTE_CELL}/{ROUTE_CELL}"


@pytest.mark.parametrize(("method", "path", "body", "status", "reason", "message"), [
    ("GET", "/v1/vehicles/bad id!", None, 400, "invalid_vehicle_id",
     "vehicle_id 'bad id!' is not 1-64 of A-Z a-z 0-9 _ . : -"),
    ("GET", "/v1/vehicles/" + "v" * 65, None, 400, "invalid_vehicle_id", "is not 1-64"),
    ("GET", f"/v1/cells/{ROUTE_CELL}", None, 400, "invalid_cell",
     f"cell '{ROUTE_CELL}' is not an H3 cell of resolution 8"),
    ("GET", "/v1/cells/88c19cb94dfffzz", None, 400, "invalid_cell", "not an H3 cell"),
    ("GET", f"/v1/routes/{CELL}/{ROUTE_CELL}", None, 400, "invalid_cell",
     f"origin_cell '{CELL}' is not an H3 cell of resolution 7"),
    ("GET", ROUTE + "?hour=24", None, 400, "invalid_hour", "hour 24 is not 0..23"),
    ("GET", ROUTE + "?hour=-1", None, 400, "invalid_hour", "hour -1 is not 0..23"),
    ("GET", ROUTE + "?hour=noon", None, 422, "invalid_request",
     "query.hour: Input should be a valid integer"),
    ("GET", "/v1/vehicles/veh-1?as_of=yesterday", None, 400, "invalid_as_of",
     "as_of 'yesterday' is not epoch milliseconds, ISO 8601 text with a zone, or 'latest'"),
    ("GET", "/v1/vehicles/veh-1?as_of=2026-06-01T00:01:00", None, 400, "invalid_as_of",
     "has no time zone"),
    ("GET", "/v1/vehicles/veh-1?as_of=1780272060", None, 400, "invalid_as_of",
     "as_of 1780272060 is outside 2000-01-01 .. 2100-01-01 as epoch milliseconds "
     "(epoch seconds given?)"),
    ("GET", f"/v1/vehicles/veh-1?as_of={T0 - HOUR}", None, 409, "as_of_unavailable",
     f"as of {T0 - HOUR} ms is before what this store can answer: its watermark is "
     f"{LAST} ms and it keeps {HOUR} ms of history"),
    ("POST", "/v1/vectors", {"keys": [{"vehicle_id": "v"}] * 1001}, 400, "too_many_keys",
     "1001 keys in one request; at most 1000"),
    ("POST", "/v1/vectors", {"keys": [{"cell": CELL}, {"vehicle_id": "a b"}]}, 400,
     "invalid_vehicle_id", "vehicle_id 'a b'"),
    ("POST", "/v1/vectors", {"keys": [{"origin_cell": ROUTE_CELL, "dest_cell": ROUTE_CELL,
                                       "hour": 99}]}, 400, "invalid_hour", "hour 99"),
    ("POST", "/v1/vectors", {"keys": [], "as_of": "soon"}, 400, "invalid_as_of",
     "as_of 'soon' is not"),
    ("POST", "/v1/vectors", {}, 422, "invalid_request", "body.keys: Field required"),
    ("POST", "/v1/vectors", {"keys": [{"vehicle_id": "a", "cell": CELL}]}, 422,
     "invalid_request", "body.keys.0: a key names exactly one of: vehicle_id; cell; "
                        "origin_cell and dest_cell"),
    ("POST", "/v1/vectors", {"keys": [{"origin_cell": ROUTE_CELL}]}, 422, "invalid_request",
     "body.keys.0: a route key needs both origin_cell and dest_cell"),
    ("POST", "/v1/vectors", {"keys": [{"vehicle_id": "a", "hour": 3}]}, 422, "invalid_request",
     "hour belongs to route keys only"),
    ("POST", "/v1/vectors", {"keys": [{"vehicle": "a"}]}, 422, "invalid_request",
     "body.keys.0.vehicle: Extra inputs are not permitted"),
    ("POST", "/v1/vectors", {"keys": [{"vehicle_id": 7}]}, 422, "invalid_request",
     "body.keys.0.vehicle_id: Input should be a valid string"),
    ("POST", "/v1/vectors", "{not json", 422, "invalid_request", "JSON decode error"),
    ("GET", "/v1/vehicle/veh-1", None, 404, "not_found",
     "no endpoint GET /v1/vehicle/veh-1; the API is described at /docs and /openapi.json"),
    ("DELETE", "/v1/catalog", None, 405, "method_not_allowed",
     "DELETE is not allowed on /v1/catalog"),
])
def test_bad_requests_get_status_reason_and_message(served, method, path, body, status, reason,
                                                    message) -> None:
    http, _ = served
    if isinstance(body, str):
        r = http.request(method, path, content=body, headers={"content-type": "application/json"})
    else:
        r = http.request(method, path, json=body)
    assert r.status_code == status, r.text
    got = r.json()
    assert got["status"] == status and got["reason"] == reason
    assert message in got["detail"]
    assert "Traceback" not in r.text


def test_oversized_body_is_refused_unread(served) -> None:
    http, _ = served
    r = http.post("/v1/vectors", content=b" " * (2 << 20),
                  headers={"content-type": "application/json"})
    assert r.status_code == 413
    assert r.json() == {"status": 413, "reason": "body_too_large",
                        "detail": "request body of 2097152 bytes; at most 1048576"}


def test_latest_before_anything_applied_is_a_conflict() -> None:
    http = TestClient(create_app(FeatureClient(RedisStore(fakeredis.FakeRedis()))))
    r = http.get("/v1/cells/" + CELL, params={"as_of": "latest"})
    assert r.status_code == 409
    assert r.json()["detail"] == "nothing has been applied yet: there is no latest moment"


def test_redis_down_is_503_with_a_readable_message() -> None:
    port = free_port()  # nothing listens there
    down = open_store(f"redis://{LOOPBACK}:{port}/0", EngineConfig(), 0)  # as serve() does
    http = TestClient(create_app(FeatureClient(down)), raise_server_exceptions=False)
    for path in ("/v1/vehicles/veh-1", "/v1/cells/" + CELL):
        r = http.get(path)
        assert r.status_code == 503
        got = r.json()
        assert got["reason"] == "store_unavailable"
        assert got["detail"].startswith(f"Redis is unavailable: Error 111 connecting to "
                                        f"{LOOPBACK}:{port}")
    r = http.post("/v1/vectors", json={"keys": [{"vehicle_id": "a"}]})
    assert r.status_code == 503 and "Traceback" not in r.text
    health = http.get("/v1/health")
    assert health.status_code == 503
    assert health.json()["status"] == "unavailable" and health.json()["redis"] is False
    assert "Connection refused" in health.json()["detail"]
    metrics = _samples(http.get("/metrics").text)
    assert metrics[("cellpulse_redis_up", ())] == 0
    assert metrics[("cellpulse_rejected_requests_total", (("reason", "store_unavailable"),))] == 4


def test_answers_again_when_a_stopped_redis_server_is_back(tmp_path) -> None:
    """A real redis-server stopped under a running app gives 503s; started again on the same
    port, the same app answers 200 (a closed pooled connection is retried once)."""
    with RedisServer(workdir=tmp_path, appendonly=True) as server:
        store = open_store(server.url, EngineConfig(), HOUR)
        _fill(store)
        http = TestClient(create_app(FeatureClient(store)), raise_server_exceptions=False)
        path = "/v1/vehicles/veh-1?as_of=latest"
        want = http.get(path).json()
        assert want["vector"]["trip_fixes"] == 4
        server.stop()
        assert http.get(path).status_code == 503
        assert http.get("/v1/health").status_code == 503
        server.start()  # same port, state back from its append-only file
        assert http.get("/v1/health").status_code == 200
        assert http.get(path).json() == want


def test_parse_as_of() -> None:
    assert parse_as_of(None) is None and parse_as_of("") is None
    assert parse_as_of("latest") == "latest" and parse_as_of(" LATEST ") == "latest"
    assert parse_as_of(T0) == parse_as_of(str(T0)) == T0
    assert parse_as_of("2026-06-01T00:00:00Z") == T0
    assert parse_as_of("2026-06-01T05:30:00.250+05:30") == T0 + 250
    with pytest.raises(ValueError, match="is not a moment"):
        parse_as_of(True)


def test_redact_url() -> None:
    assert redact_url("redis://user:s3cret@db:6379/0") == "redis://user:***@db:6379/0"
    assert redact_url("redis://:s3cret@db:6379/0") == "redis://:***@db:6379/0"
    assert redact_url("redis://db:6379/0") == "redis://db:6379/0"


# --- catalog, health, schema, metrics --------------------------------------------------------

def test_catalog_is_the_cli_catalog(served, capsys) -> None:
    http, _ = served
    assert cli_main(["catalog", "--json"]) == 0
    assert http.get("/v1/catalog").json() == json.loads(capsys.readouterr().out)
    # another engine configuration: other cell features, in the schema and the catalog
    cfg = EngineConfig(windows_min=(10, 30), ring_window_min=10)
    other = TestClient(create_app(FeatureClient(RedisStore(fakeredis.FakeRedis(), cfg), cfg)))
    assert cli_main(["catalog", "--json", "--windows", "10,30", "--ring-window", "10"]) == 0
    assert other.get("/v1/catalog").json() == json.loads(capsys.readouterr().out)
    props = other.get("/openapi.json").json()["components"]["schemas"]["CellVector"]["properties"]
    assert "cell_pickups_10m" in props and "cell_pickups_5m" not in props


def test_health_reports_positions_lag_and_known_at(served) -> None:
    http, store = served
    r = http.get("/v1/health")
    assert r.status_code == 200
    assert r.json() == {
        "status": "ok", "redis": True, "detail": None, "catalog_version": Catalog().version,
        "history_s": 3600.0, "watermark": LAST, "known_at": LAST, "lag": 0,
        "partitions": [
            {"partition": "fixes:0", "next_offset": 11, "end_offset": 11, "lag": 0,
             "last_arrival": LAST},
            {"partition": "fixes:1", "next_offset": None, "end_offset": 0, "lag": 0,
             "last_arrival": None},
        ]}
    store.set_highwaters({"fixes:0": 14})  # its consumer saw 3 more messages
    body = http.get("/v1/health").json()
    assert body["lag"] == 3 and body["partitions"][0]["lag"] == 3
    assert body["known_at"] == LAST - 1  # messages of that same millisecond may wait


def test_openapi_lists_endpoints_and_response_fields(served) -> None:
    http, _ = served
    schema = http.get("/openapi.json").json()
    assert {p: sorted(ops) for p, ops in schema["paths"].items()} == {
        "/v1/vehicles/{vehicle_id}": ["get"], "/v1/cells/{cell}": ["get"],
        "/v1/routes/{origin_cell}/{dest_cell}": ["get"], "/v1/vectors": ["post"],
        "/v1/catalog": ["get"], "/v1/health": ["get"], "/metrics": ["get"]}
    assert "JSON has no NaN" in schema["info"]["description"]
    comp = schema["components"]["schemas"]
    cat = Catalog()
    veh = comp["VehicleVector"]
    assert list(veh["properties"]) == ["kind", "vehicle_id", *cat.names("vehicle", "trip")]
    assert "JSON has no NaN" in veh["description"]
    speed = veh["properties"]["vehicle_speed_mps"]
    assert speed["anyOf"] == [{"type": "number"}, {"type": "null"}]
    assert "null when undefined" in speed["description"]
    assert veh["properties"]["trip_fixes"]["type"] == "integer"
    assert list(comp["CellVector"]["properties"]) == ["kind", "cell", *cat.names("cell")]
    assert list(comp["RouteVector"]["properties"]) == [
        "kind", "origin_cell", "dest_cell", "hour", *cat.names("route")]
    for name in ("VehicleVectorResponse", "CellVectorResponse", "RouteVectorResponse",
                 "BatchResponse"):
        assert {"catalog_version", "as_of", "known_at", "staleness"} <= set(
            comp[name]["properties"]), name
    assert list(comp["Staleness"]["properties"]) == ["cell", "vehicle", "trip", "route"]
    assert comp["BatchRequest"]["properties"]["keys"]["maxItems"] == 1000
    get_vehicle = schema["paths"]["/v1/vehicles/{vehicle_id}"]["get"]
    assert set(get_vehicle["responses"]) == {"200", "400", "409", "422", "503"}
    assert http.get("/docs").status_code == 200


def _samples(text: str) -> dict[tuple[str, tuple], float]:
    return {(s.name, tuple(sorted(s.labels.items()))): s.value
            for fam in text_string_to_metric_families(text) for s in fam.samples}


def test_metrics_count_requests_keys_rejections_and_live_progress(served) -> None:
    http, store = served
    http.get("/v1/vehicles/veh-1", params={"as_of": "latest"})
    http.get("/v1/vehicles/veh-2", params={"as_of": "latest"})
    http.get(f"/v1/cells/{ROUTE_CELL}")  # wrong resolution: 400
    http.get("/v1/nowhere")
    http.post("/v1/vectors", json={"keys": [{"vehicle_id": "veh-1"}, {"cell": CELL}] * 30,
                                   "as_of": LAST})
    http.post("/v1/vectors", json={"keys": [{"vehicle_id": "veh-1"}] * 3, "as_of": LAST})
    store.set_highwaters({"fixes:0": 14})
    r = http.get("/metrics")
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/plain")
    m = _samples(r.text)
    veh = (("endpoint", "/v1/vehicles/{vehicle_id}"),)
    batch = (("endpoint", "/v1/vectors"),)
    assert m[("cellpulse_http_requests_total", (*veh, ("status", "200")))] == 2
    assert m[("cellpulse_http_requests_total",
              (("endpoint", "/v1/cells/{cell}"), ("status", "400")))] == 1
    assert m[("cellpulse_http_requests_total", (("endpoint", "unmatched"), ("status", "404")))] == 1
    assert m[("cellpulse_http_requests_total", (*batch, ("status", "200")))] == 2
    assert m[("cellpulse_rejected_requests_total", (("reason", "invalid_cell"),))] == 1
    assert m[("cellpulse_rejected_requests_total", (("reason", "not_found"),))] == 1
    # latency of the successful lookups only
    assert m[("cellpulse_lookup_duration_seconds_count", veh)] == 2
    assert ("cellpulse_lookup_duration_seconds_count", (("endpoint", "/v1/cells/{cell}"),)
            ) not in m
    assert m[("cellpulse_lookup_duration_seconds_bucket", (*veh, ("le", "+Inf")))] == 2
    # keys per request: 60 and 3
    assert m[("cellpulse_lookup_keys_sum", batch)] == 63
    assert m[("cellpulse_lookup_keys_bucket", (*batch, ("le", "5.0")))] == 1
    assert m[("cellpulse_lookup_keys_bucket", (*batch, ("le", "50.0")))] == 1
    assert m[("cellpulse_lookup_keys_bucket", (*batch, ("le", "100.0")))] == 2
    # live progress, read from Redis at scrape time
    assert m[("cellpulse_redis_up", ())] == 1
    assert m[("cellpulse_consumer_lag_messages", (("partition", "fixes:0"),))] == 3
    assert m[("cellpulse_consumer_lag_messages", (("partition", "fixes:1"),))] == 0
    assert m[("cellpulse_applied_offset", (("partition", "fixes:0"),))] == 11
    assert m[("cellpulse_end_offset", (("partition", "fixes:0"),))] == 14
    assert m[("cellpulse_watermark_seconds", ())] == LAST / 1000
    assert m[("cellpulse_known_at_seconds", ())] == (LAST - 1) / 1000
    assert m[("cellpulse_serve_info", (("catalog_version", Catalog().version),
                                       ("version", "0.1.0")))] == 1


# --- the command line ------------------------------------------------------------------------

def test_serve_settings_from_flags_and_environment(monkeypatch, capsys) -> None:
    import uvicorn

    runs: list[dict] = []
    monkeypatch.setattr(uvicorn, "run", lambda app, **kw: runs.append({"app": app, **kw}))
    monkeypatch.delenv("CELLPULSE_HISTORY", raising=False)
    monkeypatch.setenv("CELLPULSE_REDIS_URL", "memory://")
    monkeypatch.setenv("CELLPULSE_HOST", "127.0.0.2")
    monkeypatch.setenv("CELLPULSE_PORT", "9001")
    monkeypatch.setenv("CELLPULSE_CELL_RESOLUTION", "9")
    assert cli_main(["serve", "--port", "9002", "--history", "60"]) == 0  # the flag wins
    run = runs[-1]
    assert (run["host"], run["port"], run["log_level"], run["access_log"]) == (
        "127.0.0.2", 9002, "info", False)
    client = run["app"].state.client
    assert client.config.cell_resolution == 9 and client.store.history_ms == 60_000
    assert f"catalog {client.catalog.version}, history up to 60 s" in capsys.readouterr().err
    assert cli_main(["serve"]) == 0  # by default, as far back as the consumers keep history
    store = runs[-1]["app"].state.client.store
    assert store.history_from_state and runs[-1]["port"] == 9001
    assert "history as the consumers keep" in capsys.readouterr().err

    monkeypatch.delenv("CELLPULSE_REDIS_URL")
    assert cli_main(["serve"]) == 2
    assert ("cellpulse serve: error: no Redis to serve from: give --redis-url "
            "redis://HOST:PORT/DB or set CELLPULSE_REDIS_URL") in capsys.readouterr().err
    assert cli_main(["serve", "--redis-url", "http://x:1@db"]) == 2
    assert "--redis-url 'http://x:***@db' is not a redis://" in capsys.readouterr().err
    monkeypatch.setenv("CELLPULSE_PORT", "eighty")
    assert cli_main(["serve", "--redis-url", "memory://"]) == 2
    assert "environment variable CELLPULSE_PORT='eighty'" in capsys.readouterr().err
    assert len(runs) == 2


def test_cellpulse_serve_over_real_http_and_real_redis(redis_url) -> None:
    """`cellpulse serve` as a process on a loopback port against a real redis-server; one
    vector over HTTP equals the client's; stopped by PID with SIGTERM (exits cleanly)."""
    store = RedisStore.from_url(redis_url, history_ms=HOUR)
    _fill(store)
    port = free_port()
    proc = subprocess.Popen(
        [sys.executable, "-m", "featurestore.cli", "serve", "--redis-url", redis_url,
         "--host", LOOPBACK, "--port", str(port), "--history", "3600", "--log-level", "warning"],
        stdout=subprocess.PIPE, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL)
    base = f"http://{LOOPBACK}:{port}"
    try:
        deadline = time.monotonic() + 30
        with httpx.Client(base_url=base, timeout=5) as http:
            while True:  # bounded: until healthy, the process exits, or the deadline
                assert proc.poll() is None, proc.stdout.read().decode(errors="replace")
                try:
                    if http.get("/v1/health").status_code == 200:
                        break
                except httpx.TransportError:
                    pass
                assert time.monotonic() < deadline, "cellpulse serve did not become healthy"
                time.sleep(0.1)
            got = http.get("/v1/vehicles/veh-1", params={"as_of": "latest"}).json()
            health = http.get("/v1/health").json()
        want = FeatureClient(RedisStore.from_url(redis_url, history_ms=HOUR)).vectors(
            vehicles=["veh-1"], as_of="latest")
        assert got == {"catalog_version": want.catalog_version, "as_of": LAST, "known_at": LAST,
                       "staleness": want.staleness_s,
                       "vector": _json_vector({"kind": "vehicle", **want.vehicles[0]})}
        assert got["vector"]["trip_fixes"] == 4
        assert health["partitions"][0] == {"partition": "fixes:0", "next_offset": 11,
                                           "end_offset": 11, "lag": 0, "last_arrival": LAST}
        os.kill(proc.pid, signal.SIGTERM)
        # uvicorn shuts down gracefully, then re-raises the signal (exit status -SIGTERM)
        assert proc.wait(timeout=15) in (0, -signal.SIGTERM)
    finally:
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait(timeout=5)
        proc.stdout.close()


def test_metrics_count_the_messages_applied_to_the_state_once(served) -> None:
    from featurestore.schema import Rejection

    http, store = served
    eng = Engine(store, store.config)
    dup = _fixes()[3]  # veh-1's fourth fix again, from another partition's point of view
    eng.process([Rejection("malformed", "not JSON", b"{"), dup],
                spans={"fixes:1": SourceSpan(0, 2, dup.arrival_ms)})
    m = _samples(http.get("/metrics").text)
    outcome = "cellpulse_state_messages_total"
    assert m[(outcome, (("outcome", "received"),))] == 13
    assert m[(outcome, (("outcome", "accepted"),))] == 11
    assert m[(outcome, (("outcome", "in_order"),))] == 11
    assert m[("cellpulse_state_rejected_total", (("reason", "malformed"),))] == 1
    assert m[("cellpulse_state_rejected_total", (("reason", "duplicate"),))] == 1
    assert ("cellpulse_state_rejected_total", (("reason", "too_late"),)) not in m
