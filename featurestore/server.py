"""The HTTP API of the live path: point-in-time vectors, the catalog, health and metrics.

``create_app(client)`` builds a FastAPI app over a ``FeatureClient``; ``cellpulse serve`` runs
it with uvicorn. Vector responses are pydantic models built from the catalog of the engine
configuration, so the published OpenAPI schema names every feature of this configuration.
JSON has no NaN: a float feature that is undefined (NaN in Python) is sent as ``null``.

No ``from __future__ import annotations`` here: FastAPI reads the endpoints' annotations,
which refer to the app's catalog, at definition time.
"""

import datetime as dt
import logging
import re
import sys
import time
from collections.abc import Callable, Iterable, Mapping
from typing import Annotated, Any, Literal, Union

import orjson
import redis.exceptions
from fastapi import Body, FastAPI, Path, Query, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse, Response
from prometheus_client import (
    CONTENT_TYPE_LATEST,
    CollectorRegistry,
    Counter,
    Histogram,
    ProcessCollector,
    generate_latest,
)
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily
from pydantic import BaseModel, ConfigDict, Field, create_model, model_validator
from starlette.exceptions import HTTPException as StarletteHTTPException

from featurestore import __version__
from featurestore.catalog import Catalog, Feature
from featurestore.client import MAX_KEYS, BadRequest, FeatureClient, VectorResponse
from featurestore.config import ENV_PREFIX, EngineConfig, env_value
from featurestore.lookup import AsOfError, RouteQuery
from featurestore.progress import known_at
from featurestore.schema import MAX_TS_MS, MIN_TS_MS
from featurestore.store import ReadRequest

log = logging.getLogger("cellpulse.serve")

MAX_BODY_BYTES = 1 << 20  # a batch of 1,000 route keys is about 100 kB
NULL_NOTE = ("JSON has no NaN: a float feature whose value is undefined (NaN in Python and in "
             "training sets, e.g. a heading with no moving step) is sent as null.")
AS_OF_HELP = ("the moment the vector is for: epoch milliseconds, ISO 8601 text with a zone "
              "(2026-06-01T08:30:00Z), or `latest` (known_at: the moment up to which the "
              "consumers have applied every message); default: now by the server's clock")
LOOKUP_PATHS = ("/v1/vehicles/{vehicle_id}", "/v1/cells/{cell}",
                "/v1/routes/{origin_cell}/{dest_cell}", "/v1/vectors")
_DIGITS = re.compile(r"^-?\d+$")


# --- request parsing ---------------------------------------------------------------------------

def parse_as_of(value: object) -> int | Literal["latest"] | None:
    """``as_of`` as given by a caller -> epoch ms, "latest" or None (now). Raises BadRequest."""
    if value is None or value == "":
        return None
    if isinstance(value, bool):
        raise BadRequest(f"as_of {value!r} is not a moment; {AS_OF_HELP}")
    if isinstance(value, int):
        ms = value
    elif isinstance(value, str) and value.strip().lower() == "latest":
        return "latest"
    elif isinstance(value, str) and _DIGITS.match(value.strip()):
        ms = int(value.strip())
    elif isinstance(value, str):
        text = value.strip()
        if text.endswith(("Z", "z")):  # Python < 3.11 does not read the Z suffix
            text = text[:-1] + "+00:00"
        try:
            stamp = dt.datetime.fromisoformat(text)
        except ValueError:
            raise BadRequest(f"as_of {value!r} is not epoch milliseconds, ISO 8601 text with a "
                             "zone, or 'latest'") from None
        if stamp.tzinfo is None or stamp.utcoffset() is None:
            raise BadRequest(f"as_of {value!r} has no time zone; add Z or an offset like +02:00")
        ms = round(stamp.timestamp() * 1000)
    else:
        raise BadRequest(f"as_of {value!r} is not epoch milliseconds, ISO 8601 text with a "
                         "zone, or 'latest'")
    if not MIN_TS_MS <= ms < MAX_TS_MS:
        raise BadRequest(f"as_of {ms} is outside 2000-01-01 .. 2100-01-01 as epoch milliseconds "
                         "(epoch seconds given?)")
    return ms


def _reason(message: str) -> str:
    """A short machine-readable reason for a BadRequest message of the client."""
    for prefix, reason in (("vehicle_id", "invalid_vehicle_id"), ("cell", "invalid_cell"),
                           ("origin_cell", "invalid_cell"), ("dest_cell", "invalid_cell"),
                           ("hour", "invalid_hour"), ("as_of", "invalid_as_of"),
                           ("nothing has been applied", "no_data_yet")):
        if message.startswith(prefix):
            return reason
    if "keys in one request" in message:
        return "too_many_keys"
    return "bad_request"


# --- response models ---------------------------------------------------------------------------

class ErrorResponse(BaseModel):
    """What every 4xx and 5xx answer carries."""

    status: int = Field(description="the HTTP status code")
    reason: str = Field(description="machine-readable reason, e.g. invalid_cell, too_many_keys, "
                                    "as_of_unavailable, invalid_request, not_found, "
                                    "store_unavailable")
    detail: str = Field(description="what is wrong, in words")


class Staleness(BaseModel):
    """Per family, seconds from the newest data behind its values to as_of (0 when the data is
    complete for as_of; null when not defined, e.g. no vehicle was asked for)."""

    cell: float | None = Field(description="as_of - known_at, s")
    vehicle: float | None = Field(description="as_of minus the latest arrival among the "
                                              "requested vehicles, s")
    trip: float | None = Field(description="as for vehicle, s")
    route: float | None = Field(description="as_of - known_at, s")


class _Envelope(BaseModel):
    catalog_version: str = Field(description="version of the catalog (feature definitions and "
                                             "engine configuration) the server computes with; "
                                             "compare with the consumers' and the training "
                                             "set's")
    as_of: int = Field(description="the moment the vectors are for, epoch ms")
    known_at: int | None = Field(description="every message that arrived by then (epoch ms) "
                                             "has been applied; null before anything is")
    staleness: Staleness


class PartitionHealth(BaseModel):
    partition: str = Field(description="source partition, topic:partition")
    next_offset: int | None = Field(description="next offset to apply (null: nothing applied)")
    end_offset: int | None = Field(description="end offset its consumer last saw")
    lag: int | None = Field(description="end_offset - next_offset, messages")
    last_arrival: int | None = Field(description="latest arrival applied, epoch ms")


class HealthResponse(BaseModel):
    status: Literal["ok", "unavailable"]
    redis: bool = Field(description="whether Redis answered")
    detail: str | None = Field(None, description="why not, when it did not")
    catalog_version: str
    history_s: float = Field(description="how far before its watermark the store answers")
    watermark: int | None = Field(None, description="latest arrival applied, epoch ms")
    known_at: int | None = Field(None, description="every message that arrived by then has "
                                                   "been applied, epoch ms")
    lag: int | None = Field(None, description="sum of partition lags, messages")
    partitions: list[PartitionHealth] = Field(default_factory=list)


class FeatureModel(BaseModel):
    name: str
    family: Literal["cell", "vehicle", "trip", "route"]
    dtype: Literal["int", "float", "str"]
    window_min: int | None
    definition: str


class CatalogResponse(BaseModel):
    """The declared features (the same content as ``cellpulse catalog --json``)."""

    version: str = Field(description="the catalog version responses carry as catalog_version")
    catalog_version: int = Field(description="version of the catalog's layout scheme")
    config: dict[str, Any] = Field(description="the engine configuration")
    families: dict[str, list[str]] = Field(description="vector layout: names per family, "
                                                       "in order")
    features: list[FeatureModel]


class KeyIn(BaseModel):
    """One key of a batch: exactly one of ``vehicle_id``; ``cell``; ``origin_cell`` +
    ``dest_cell`` (+ optional ``hour``)."""

    model_config = ConfigDict(extra="forbid")
    vehicle_id: str | None = Field(None, description="a vehicle: vehicle and trip families")
    cell: str | None = Field(None, description="an H3 cell at the cell resolution: cell family")
    origin_cell: str | None = Field(None, description="route origin, H3 at the route resolution")
    dest_cell: str | None = Field(None, description="route destination, as origin_cell")
    hour: int | None = Field(None, description="route pickup hour 0..23 in the city's zone; "
                                               "default the hour of as_of")

    @model_validator(mode="after")
    def _one_kind(self) -> "KeyIn":
        kinds = [self.vehicle_id is not None, self.cell is not None,
                 self.origin_cell is not None or self.dest_cell is not None]
        if sum(kinds) != 1:
            raise ValueError("a key names exactly one of: vehicle_id; cell; origin_cell and "
                             "dest_cell (with an optional hour)")
        if kinds[2] and (self.origin_cell is None or self.dest_cell is None):
            raise ValueError("a route key needs both origin_cell and dest_cell")
        if self.hour is not None and not kinds[2]:
            raise ValueError("hour belongs to route keys only")
        return self


class BatchRequest(BaseModel):
    model_config = ConfigDict(extra="forbid")
    keys: list[KeyIn] = Field(description=f"up to {MAX_KEYS} keys, any mix of vehicles, cells "
                                          "and routes; vectors come back in this order",
                              json_schema_extra={"maxItems": MAX_KEYS})
    as_of: int | str | None = Field(None, description=AS_OF_HELP)


def _feature_field(f: Feature) -> tuple[Any, Any]:
    win = f" (window {f.window_min} min)" if f.window_min else ""
    if f.dtype == "int":
        return int, Field(description=f"{f.definition}{win}")
    if f.dtype == "float":
        return float | None, Field(description=f"{f.definition}{win}; null when undefined")
    return str | None, Field(description=f"{f.definition}{win}; null when unknown")


def vector_models(catalog: Catalog) -> dict[str, type[BaseModel]]:
    """Pydantic models of the vehicle, cell and route vectors of this catalog, by kind."""
    def fields(*families: str) -> dict[str, Any]:
        return {f.name: _feature_field(f) for fam in families for f in catalog.family(fam)}

    cfg = catalog.config
    doc = " " + NULL_NOTE
    return {
        "vehicle": create_model(
            "VehicleVector", __doc__="Vehicle and trip families of one vehicle." + doc,
            kind=(Literal["vehicle"], Field(description="which key this vector is for")),
            vehicle_id=(str, Field(description="the vehicle")),
            **fields("vehicle", "trip")),
        "cell": create_model(
            "CellVector", __doc__="Cell family of one H3 cell." + doc,
            kind=(Literal["cell"], Field(description="which key this vector is for")),
            cell=(str, Field(description=f"the H3 cell (resolution {cfg.cell_resolution}), "
                                         "lower case")),
            **fields("cell")),
        "route": create_model(
            "RouteVector", __doc__="Route family of one origin, destination and pickup hour."
                                   + doc,
            kind=(Literal["route"], Field(description="which key this vector is for")),
            origin_cell=(str, Field(description=f"origin H3 cell (resolution "
                                                f"{cfg.route_resolution}), lower case")),
            dest_cell=(str, Field(description="destination H3 cell, lower case")),
            hour=(int, Field(description="pickup hour used (0..23, city time zone)")),
            **fields("route")),
    }


def _ordered(vector: Mapping[str, object], kind: str, names: tuple[str, ...]
             ) -> dict[str, object]:
    """A vector with its kind, its fields in the order of its model (``names``: the model's
    fields after ``kind``); NaN stays NaN, which orjson writes as null."""
    if tuple(vector) == names:  # the feature functions build them in catalog order
        return {"kind": kind, **vector}
    out: dict[str, object] = {"kind": kind}
    for k in names:
        out[k] = vector[k]
    return out


def _json(body: Mapping[str, object]) -> Response:
    """A 200 answer written by orjson (NaN and infinities as null). Returning a Response skips
    FastAPI's validation of the answer against its response model, which only documents it:
    the vectors are built in the models' field order from the catalog's own features."""
    return Response(orjson.dumps(body), media_type="application/json")


def _envelope(r: VectorResponse) -> dict[str, object]:
    return {"catalog_version": r.catalog_version, "as_of": r.as_of_ms,
            "known_at": r.known_at_ms, "staleness": r.staleness_s}


# --- metrics -------------------------------------------------------------------------------

class Metrics:
    """The server's Prometheus metrics, in a registry of its own."""

    def __init__(self, client: FeatureClient, registry: CollectorRegistry) -> None:
        self.registry = registry
        self.latency = Histogram(
            "cellpulse_lookup_duration_seconds",
            "Time to answer a successful lookup request, from receipt to the last byte.",
            ["endpoint"], registry=registry,
            buckets=(.0005, .001, .002, .003, .005, .0075, .01, .02, .05, .1, .25, .5, 1, 2.5))
        self.keys = Histogram(
            "cellpulse_lookup_keys", "Keys per lookup request.", ["endpoint"], registry=registry,
            buckets=(1, 2, 5, 10, 20, 50, 100, 200, 500, 1000))
        self.requests = Counter(
            "cellpulse_http_requests", "HTTP requests answered, by endpoint and status code.",
            ["endpoint", "status"], registry=registry)
        self.rejected = Counter(
            "cellpulse_rejected_requests", "Requests answered with an error, by reason.",
            ["reason"], registry=registry)
        registry.register(LiveCollector(client))
        ProcessCollector(registry=registry)


class LiveCollector:
    """Gauges of the live path read from Redis at scrape time (positions, end offsets,
    watermark, known_at)."""

    def __init__(self, client: FeatureClient) -> None:
        self.client = client

    def describe(self) -> Iterable[Any]:
        return []  # collected lazily: describe() must not touch Redis at registration

    def collect(self) -> Iterable[Any]:
        client = self.client
        up = GaugeMetricFamily("cellpulse_redis_up",
                               "1 when Redis answered this scrape's progress read, else 0.")
        info = GaugeMetricFamily("cellpulse_serve_info", "The server's catalog version.",
                                 labels=["catalog_version", "version"])
        info.add_metric([client.catalog.version, __version__], 1)
        try:
            raw = _progress(client)
        except redis.exceptions.RedisError as exc:
            log.warning("metrics: Redis did not answer: %s", exc)
            up.add_metric([], 0)
            return [up, info]
        up.add_metric([], 1)
        lag = GaugeMetricFamily(
            "cellpulse_consumer_lag_messages",
            "Per source partition: end offset its consumer last saw minus the next offset "
            "applied to Redis.", labels=["partition"])
        applied = GaugeMetricFamily(
            "cellpulse_applied_offset",
            "Per source partition: the next offset to apply (every earlier one is applied).",
            labels=["partition"])
        end = GaugeMetricFamily("cellpulse_end_offset",
                                "Per source partition: end offset its consumer last saw.",
                                labels=["partition"])
        for part in sorted(set(raw.positions or {}) | set(raw.highwaters or {})):
            pos = (raw.positions or {}).get(part)
            hw = (raw.highwaters or {}).get(part)
            nxt = pos.next_offset if pos is not None else 0
            if pos is not None:
                applied.add_metric([part], nxt)
            if hw is not None:
                end.add_metric([part], hw)
                lag.add_metric([part], max(0, hw - nxt))
        out = [up, info, lag, applied, end]
        counts = raw.counts or {}
        msgs = CounterMetricFamily(
            "cellpulse_state_messages",
            "Messages applied to the state by all consumers, by outcome (received, accepted, "
            "in_order, out_of_order), counted once each: stored with the state in the same "
            "atomic step as the offsets. rate() gives messages per second.",
            labels=["outcome"])
        rejected = CounterMetricFamily(
            "cellpulse_state_rejected",
            "Messages rejected by all consumers, by reason (dead letters), counted once each.",
            labels=["reason"])
        for name, n in sorted(counts.items()):
            if name.startswith("rejected:"):
                rejected.add_metric([name.split(":", 1)[1]], n)
            else:
                msgs.add_metric([name], n)
        out += [msgs, rejected]
        known = known_at(raw.watermark_ms, raw.positions or {}, raw.highwaters or {})
        for name, value, text in (
            ("cellpulse_watermark_seconds", raw.watermark_ms,
             "Latest arrival applied to Redis, epoch seconds."),
            ("cellpulse_known_at_seconds", known,
             "Every message that arrived by this moment has been applied, epoch seconds."),
        ):
            if value is not None:
                out.append(GaugeMetricFamily(name, text, value=value / 1000.0))
        return out


def _history_ms(store: Any, raw: Any) -> int:
    """How far before the watermark lookups are answered: the server's own bound and the
    history the consumers record in the state, whichever is smaller."""
    effective = getattr(store, "effective_history_ms", None)
    if effective is not None:
        return effective(raw.history_ms)
    return int(getattr(store, "history_ms", 0) or 0)


def _progress(client: FeatureClient) -> Any:
    """Watermark, positions and end offsets in one store read (one Redis round trip)."""
    return client.store.read(ReadRequest(with_progress=True, as_of_ms=2**62))


class _MetricsMiddleware:
    """Counts every HTTP response by endpoint (route template) and status, times successful
    lookups, and refuses bodies over ``MAX_BODY_BYTES``."""

    def __init__(self, app: Any, metrics: Metrics) -> None:
        self.app = app
        self.metrics = metrics

    async def __call__(self, scope: dict, receive: Callable, send: Callable) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        t0 = time.perf_counter()
        status = [500]
        for name, value in scope.get("headers") or ():
            if name == b"content-length" and value.isdigit() and int(value) > MAX_BODY_BYTES:
                self.metrics.rejected.labels("body_too_large").inc()
                self.metrics.requests.labels("unmatched", "413").inc()
                resp = _error_response(413, "body_too_large",
                                       f"request body of {int(value)} bytes; at most "
                                       f"{MAX_BODY_BYTES}")
                await resp(scope, receive, send)
                return

        async def send_status(message: dict) -> None:
            if message["type"] == "http.response.start":
                status[0] = message["status"]
            await send(message)

        try:
            await self.app(scope, receive, send_status)
        finally:
            route = scope.get("route")
            endpoint = getattr(route, "path", None) or "unmatched"
            self.metrics.requests.labels(endpoint, str(status[0])).inc()
            if endpoint in LOOKUP_PATHS and status[0] < 400:
                self.metrics.latency.labels(endpoint).observe(time.perf_counter() - t0)


# --- the app -------------------------------------------------------------------------------

def _error_response(status: int, reason: str, detail: str) -> JSONResponse:
    return JSONResponse({"status": status, "reason": reason, "detail": detail},
                        status_code=status)


def _describe_validation(exc: RequestValidationError) -> str:
    parts = []
    for err in exc.errors():
        loc = ".".join(str(x) for x in err.get("loc", ()))
        msg = str(err.get("msg", "invalid")).removeprefix("Value error, ")
        parts.append(f"{loc}: {msg}" if loc else msg)
    return "; ".join(parts) or "invalid request"


def _redis_detail(exc: Exception) -> str:
    return f"Redis is unavailable: {exc}".rstrip(". ") + " (try again when it is back)"


AsOfQuery = Annotated[str | None, Query(description=AS_OF_HELP)]
BATCH_EXAMPLE = {"mixed": {"summary": "a vehicle, a cell and a route", "value": {
    "keys": [{"vehicle_id": "veh-0042"}, {"cell": "88c19cb94dfffff"},
             {"origin_cell": "87c19cbb2ffffff", "dest_cell": "87c19cb94ffffff", "hour": 8}],
    "as_of": "latest"}}}
ERRORS = {code: {"model": ErrorResponse} for code in (400, 409, 422, 503)}
DESCRIPTION = f"""Point-in-time feature vectors of the live path: what the consumers had
applied as of a moment, computed by the same feature code as replay and training sets.

Every vector response carries `catalog_version`, `as_of`, `known_at` (epoch milliseconds) and
`staleness` per family. Vectors are JSON objects whose fields are the catalog's features in
vector order. {NULL_NOTE}

Errors: 400 an invalid key, hour, as_of or more than {MAX_KEYS} keys; 409 an as_of the store
cannot answer (earlier than its history) or `latest` before anything is applied; 422 a
malformed request (missing or mistyped fields); 404 an unknown path; 503 Redis unreachable.
Every error body is `{{"status", "reason", "detail"}}`."""


def create_app(client: FeatureClient, *, registry: CollectorRegistry | None = None) -> FastAPI:
    """The HTTP API over ``client``. ``registry``: where its Prometheus metrics go (a new
    registry by default, so several apps in one process keep separate counts)."""
    catalog = client.catalog
    models = vector_models(catalog)
    vehicle_model, cell_model, route_model = models["vehicle"], models["cell"], models["route"]
    any_vector = Annotated[Union[vehicle_model, cell_model, route_model],  # noqa: UP007
                           Field(discriminator="kind")]
    one = {kind: create_model(f"{model.__name__}Response", __base__=_Envelope,
                              __doc__=f"One {kind} vector and what it is based on.",
                              vector=(model, ...))
           for kind, model in models.items()}
    batch_model = create_model(
        "BatchResponse", __base__=_Envelope,
        __doc__="Vectors for the requested keys, in request order, and what they are based on.",
        vectors=(list[any_vector], Field(description="one vector per key, in request order")))
    metrics = Metrics(client, registry or CollectorRegistry())
    fields = {kind: tuple(model.model_fields)[1:] for kind, model in models.items()}
    app = FastAPI(title="cellpulse", version=__version__, description=DESCRIPTION,
                  openapi_tags=[{"name": "lookups", "description": "feature vectors as of a "
                                                                   "moment"},
                                {"name": "service", "description": "catalog, health, metrics"}])
    app.state.client = client
    app.state.metrics = metrics
    app.add_middleware(_MetricsMiddleware, metrics=metrics)

    def rejected(status: int, reason: str, detail: str) -> JSONResponse:
        metrics.rejected.labels(reason).inc()
        return _error_response(status, reason, detail)

    @app.exception_handler(BadRequest)
    async def _bad(_: Request, exc: BadRequest) -> JSONResponse:
        reason = _reason(str(exc))
        return rejected(409 if reason == "no_data_yet" else 400, reason, str(exc))

    @app.exception_handler(AsOfError)
    async def _as_of(_: Request, exc: AsOfError) -> JSONResponse:
        return rejected(409, "as_of_unavailable", str(exc))

    @app.exception_handler(RequestValidationError)
    async def _invalid(_: Request, exc: RequestValidationError) -> JSONResponse:
        return rejected(422, "invalid_request", _describe_validation(exc))

    @app.exception_handler(redis.exceptions.RedisError)
    async def _redis(_: Request, exc: redis.exceptions.RedisError) -> JSONResponse:
        log.warning("Redis error: %s", exc)
        return rejected(503, "store_unavailable", _redis_detail(exc))

    @app.exception_handler(StarletteHTTPException)
    async def _http(request: Request, exc: StarletteHTTPException) -> JSONResponse:
        if exc.status_code == 404:
            return rejected(404, "not_found", f"no endpoint {request.method} {request.url.path}; "
                                              "the API is described at /docs and /openapi.json")
        if exc.status_code == 405:
            return rejected(405, "method_not_allowed",
                            f"{request.method} is not allowed on {request.url.path}")
        return rejected(exc.status_code, "http_error", str(exc.detail))

    @app.exception_handler(Exception)
    async def _internal(_: Request, exc: Exception) -> JSONResponse:
        log.error("internal error", exc_info=exc)
        return rejected(500, "internal_error", "internal error; the server log has the details")

    async def lookup(endpoint: str, n: int, **kwargs: Any) -> VectorResponse:
        resp = await run_in_threadpool(client.vectors, **kwargs)
        metrics.keys.labels(endpoint).observe(n)
        return resp

    @app.get("/v1/vehicles/{vehicle_id}", tags=["lookups"], response_model=one["vehicle"],
             responses=ERRORS, summary="Vehicle and trip vector of one vehicle")
    async def get_vehicle(
        vehicle_id: Annotated[str, Path(description="1-64 of A-Z a-z 0-9 _ . : -")],
        as_of: AsOfQuery = None,
    ) -> Response:
        r = await lookup(LOOKUP_PATHS[0], 1, vehicles=[vehicle_id], as_of=parse_as_of(as_of))
        return _json({**_envelope(r),
                      "vector": _ordered(r.vehicles[0], "vehicle", fields["vehicle"])})

    @app.get("/v1/cells/{cell}", tags=["lookups"], response_model=one["cell"],
             responses=ERRORS, summary="Cell vector of one H3 cell")
    async def get_cell(
        cell: Annotated[str, Path(description="H3 cell at resolution "
                                              f"{catalog.config.cell_resolution} (upper case "
                                              "is accepted)")],
        as_of: AsOfQuery = None,
    ) -> Response:
        r = await lookup(LOOKUP_PATHS[1], 1, cells=[cell], as_of=parse_as_of(as_of))
        return _json({**_envelope(r), "vector": _ordered(r.cells[0], "cell", fields["cell"])})

    @app.get("/v1/routes/{origin_cell}/{dest_cell}", tags=["lookups"],
             response_model=one["route"], responses=ERRORS,
             summary="Route vector of one origin, destination and pickup hour")
    async def get_route(
        origin_cell: Annotated[str, Path(description="H3 cell at resolution "
                                                     f"{catalog.config.route_resolution}")],
        dest_cell: Annotated[str, Path(description="H3 cell at the same resolution")],
        hour: Annotated[int | None, Query(description="pickup hour 0..23 in the city's zone "
                                                      "(default: the hour of as_of)")] = None,
        as_of: AsOfQuery = None,
    ) -> Response:
        q = RouteQuery(origin_cell.lower(), dest_cell.lower(), hour)
        r = await lookup(LOOKUP_PATHS[2], 1, routes=[q], as_of=parse_as_of(as_of))
        return _json({**_envelope(r),
                      "vector": _ordered(r.routes[0], "route", fields["route"])})

    @app.post("/v1/vectors", tags=["lookups"], response_model=batch_model, responses=ERRORS,
              summary=f"Vectors for up to {MAX_KEYS} keys from one store read")
    async def post_vectors(body: Annotated[BatchRequest, Body(openapi_examples=BATCH_EXAMPLE)]
                           ) -> Response:
        if len(body.keys) > MAX_KEYS:  # before any other work
            raise BadRequest(f"{len(body.keys)} keys in one request; at most {MAX_KEYS}")
        vehicles: list[str] = []
        cells: list[str] = []
        routes: list[RouteQuery] = []
        order: list[tuple[str, int]] = []
        for k in body.keys:
            if k.vehicle_id is not None:
                order.append(("vehicle", len(vehicles)))
                vehicles.append(k.vehicle_id)
            elif k.cell is not None:
                order.append(("cell", len(cells)))
                cells.append(k.cell)
            else:
                order.append(("route", len(routes)))
                routes.append(RouteQuery(str(k.origin_cell).lower(), str(k.dest_cell).lower(),
                                         k.hour))
        r = await lookup(LOOKUP_PATHS[3], len(body.keys), vehicles=vehicles, cells=cells,
                         routes=routes, as_of=parse_as_of(body.as_of))
        lists = {"vehicle": r.vehicles, "cell": r.cells, "route": r.routes}
        return _json({**_envelope(r), "vectors": [_ordered(lists[kind][i], kind, fields[kind])
                                                   for kind, i in order]})

    @app.get("/v1/catalog", tags=["service"], response_model=CatalogResponse,
             summary="The declared features and vector layout")
    async def get_catalog() -> dict[str, object]:
        return catalog.to_dict()

    @app.get("/v1/health", tags=["service"], response_model=HealthResponse,
             responses={503: {"model": HealthResponse, "description": "Redis did not answer"}},
             summary="Redis reachable, watermark, known_at, per-partition lag")
    async def get_health() -> Any:
        base = {"catalog_version": catalog.version, "history_s": 0.0}
        try:
            raw = await run_in_threadpool(_progress, client)
            base["history_s"] = _history_ms(client.store, raw) / 1000.0
        except redis.exceptions.RedisError as exc:
            metrics.rejected.labels("store_unavailable").inc()
            body = HealthResponse(status="unavailable", redis=False,
                                  detail=_redis_detail(exc), **base)
            return JSONResponse(body.model_dump(), status_code=503)
        return {"status": "ok", "redis": True, **base, **health_progress(raw)}

    @app.get("/metrics", tags=["service"], summary="Prometheus metrics",
             response_class=Response,
             responses={200: {"content": {CONTENT_TYPE_LATEST: {}},
                              "description": "Prometheus text format"}})
    def get_metrics() -> Response:
        return Response(generate_latest(metrics.registry), media_type=CONTENT_TYPE_LATEST)

    return app


def health_progress(raw: Any) -> dict[str, object]:
    """Watermark, known_at and per-partition positions, end offsets and lag of a progress read."""
    positions = raw.positions or {}
    highwaters = raw.highwaters or {}
    parts = []
    total: int | None = None
    for part in sorted(set(positions) | set(highwaters)):
        pos = positions.get(part)
        end = highwaters.get(part)
        lag = None
        if end is not None:
            lag = max(0, end - (pos.next_offset if pos is not None else 0))
            total = (total or 0) + lag
        parts.append({"partition": part,
                      "next_offset": pos.next_offset if pos is not None else None,
                      "end_offset": end, "lag": lag,
                      "last_arrival": pos.last_arrival_ms if pos is not None else None})
    return {"watermark": raw.watermark_ms,
            "known_at": known_at(raw.watermark_ms, positions, highwaters),
            "lag": total, "partitions": parts}


# --- running it ------------------------------------------------------------------------------

def _setting(flag: Any, name: str, parse: Callable[[str], Any], default: Any,
             environ: Mapping[str, str]) -> Any:
    """A flag's value, else ``CELLPULSE_<NAME>`` from the environment, else the default."""
    if flag is not None:
        return flag
    value = env_value(name, parse, environ)
    return default if value is None else value


def open_store(url: str, config: EngineConfig, history_ms: int | None) -> Any:
    """The RedisStore to serve from (``history_ms`` None: as far back as the consumers keep).
    Fails fast when Redis is away (one immediate retry, for a pooled connection that a Redis
    restart closed; 1 s to connect, 2 s to answer): callers have deadlines of their own, and
    a 503 now beats a late vector."""
    from redis.backoff import NoBackoff
    from redis.retry import Retry

    from featurestore.redis_store import RedisStore

    if url.startswith("memory://"):
        return RedisStore.from_url(url, config, history_ms=history_ms)
    client = redis.Redis.from_url(url, socket_timeout=2, socket_connect_timeout=1,
                                  health_check_interval=30, retry=Retry(NoBackoff(), 1))
    return RedisStore(client, config, history_ms=history_ms)


def serve(*, redis_url: str | None, host: str | None = None, port: int | None = None,
          history_s: float | None = None, log_level: str | None = None,
          config: EngineConfig | None = None, environ: Mapping[str, str] | None = None) -> int:
    """Run the API with uvicorn until SIGTERM/SIGINT. Unset arguments come from
    ``CELLPULSE_REDIS_URL``, ``CELLPULSE_HOST``, ``CELLPULSE_PORT``, ``CELLPULSE_HISTORY``
    (seconds) and ``CELLPULSE_LOG_LEVEL``; flags win."""
    import os

    import uvicorn

    env = os.environ if environ is None else environ
    url = _setting(redis_url, "REDIS_URL", str, None, env)
    if not url:
        raise ValueError("no Redis to serve from: give --redis-url redis://HOST:PORT/DB or set "
                         f"{ENV_PREFIX}REDIS_URL")
    if not url.startswith(("redis://", "rediss://", "unix://", "memory://")):
        raise ValueError(f"--redis-url {redact_url(url)!r} is not a redis://, rediss://, "
                         "unix:// or memory:// URL")
    host = _setting(host, "HOST", str, "127.0.0.1", env)
    port = _setting(port, "PORT", int, 8000, env)
    if not 0 <= port <= 65535:
        raise ValueError(f"port {port} is not 0..65535")
    history = _setting(history_s, "HISTORY", float, None, env)
    if history is not None and not history >= 0:
        raise ValueError(f"history {history} s must be >= 0")
    level = _setting(log_level, "LOG_LEVEL", str, "info", env).lower()
    cfg = config or EngineConfig()
    client = FeatureClient(open_store(url, cfg, None if history is None else round(history * 1000)),
                           cfg)
    try:
        _progress(client)
    except redis.exceptions.RedisError as exc:  # serve anyway: health says 503 until it is back
        print(f"cellpulse serve: warning: Redis at {redact_url(url)} does not answer yet ({exc}); "
              "lookups and /v1/health answer 503 until it does", file=sys.stderr)
    print(f"cellpulse serve: http://{host}:{port} (docs at /docs) from {redact_url(url)}, "
          f"catalog {client.catalog.version}, history "
          f"{'as the consumers keep' if history is None else f'up to {history:g} s'}",
          file=sys.stderr)
    uvicorn.run(create_app(client), host=host, port=port, log_level=level,
                access_log=level == "debug", timeout_graceful_shutdown=10)
    return 0


def redact_url(url: str) -> str:
    """A Redis URL without its password, for messages and logs."""
    return re.sub(r"//([^:@/]*):[^@/]*@", r"//\1:***@", url)


__all__ = ["create_app", "open_store", "parse_as_of", "redact_url", "serve", "vector_models"]
