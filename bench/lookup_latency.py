"""Lookup latency of the live path, through the Python client and through HTTP, beside a floor.

    python -m bench.lookup_latency                      # a demo day, 200 vehicles (~450 k fixes)
    python -m bench.lookup_latency --vehicles 50 --hours 6 --repeat 500     # quicker

Starts its own redis-server on loopback, fills it with a demo-city day through the engine
(``ingest.citysim`` + ``Engine`` on a ``RedisStore``, one partition, in arrival order), starts
``cellpulse serve`` against it, then times lookups as of the watermark (what "now" is live):

- client: ``FeatureClient.vectors(...)`` in this process (one MULTI/EXEC round trip);
- HTTP: the same lookup through ``cellpulse serve`` with a keep-alive httpx client (parsing the
  JSON included); beside it the server's own mean time per request (its histogram);
- floor: one bare HMGET round trip with as many fields as the answer has values, on the same
  server: what a store of precomputed vectors would at least cost.

Cases: one vehicle, one cell, one route, a batch of 100 vehicles and a batch of 100 mixed keys
(40 vehicles, 40 cells, 20 routes). Every process (bench, server, redis-server) shares the
machine's cores. Not a test: figures vary by machine and run.
"""

from __future__ import annotations

import argparse
import collections
import os
import signal
import statistics
import subprocess
import sys
import time
from collections.abc import Callable
from typing import Any

import httpx

from featurestore.catalog import Catalog
from featurestore.client import FeatureClient
from featurestore.config import EngineConfig
from featurestore.engine import Engine
from featurestore.lookup import RouteQuery
from featurestore.redis_store import RedisStore
from featurestore.schema import decode_json
from featurestore.store import SourceSpan
from ingest.citysim import CityConfig, simulate, vehicle_name

BATCH_MESSAGES = 5000
PARTITION = "fixes:0"


def fill(store: RedisStore, city: CityConfig) -> tuple[int, collections.Counter, float]:
    """Apply a demo day in arrival order; return messages, completed route keys, seconds."""
    eng = Engine(store, store.config)
    routes: collections.Counter = collections.Counter()
    batch: list = []
    offset = 0
    t0 = time.perf_counter()

    def flush() -> None:
        nonlocal offset, batch
        if not batch:
            return
        last = max((m.arrival_ms for m in batch if m.arrival_ms is not None), default=None)
        res = eng.process(batch, spans={PARTITION: SourceSpan(offset, offset + len(batch), last)})
        for c in res.completed:
            routes[(c.origin_route_cell, c.dest_route_cell, c.pickup_hour)] += 1
        offset += len(batch)
        batch = []

    for raw in simulate(city):
        batch.append(decode_json(raw))
        if len(batch) >= BATCH_MESSAGES:
            flush()
    flush()
    store.set_highwaters({PARTITION: offset})
    return offset, routes, time.perf_counter() - t0


def timed(fn: Callable[[int], Any], repeat: int, warmup: int) -> list[float]:
    """Seconds per call of fn(i), after warmup calls."""
    for i in range(warmup):
        fn(i)
    out = []
    clock = time.perf_counter
    for i in range(repeat):
        t = clock()
        fn(i)
        out.append(clock() - t)
    return out


def pct(xs: list[float], q: float) -> float:
    return statistics.quantiles(xs, n=100, method="inclusive")[int(q) - 1]


def start_serve(url: str, port: int, history_s: float) -> subprocess.Popen:
    proc = subprocess.Popen(
        [sys.executable, "-m", "featurestore.cli", "serve", "--redis-url", url, "--host",
         "127.0.0.1", "--port", str(port), "--history", str(history_s), "--log-level",
         "warning"], stdin=subprocess.DEVNULL)
    deadline = time.monotonic() + 30
    while True:
        if proc.poll() is not None:
            raise RuntimeError(f"cellpulse serve exited with {proc.returncode}")
        try:
            if httpx.get(f"http://127.0.0.1:{port}/v1/health", timeout=2).status_code == 200:
                return proc
        except httpx.TransportError:
            pass
        if time.monotonic() > deadline:
            raise RuntimeError("cellpulse serve did not become healthy in 30 s")
        time.sleep(0.1)


def server_means(http: httpx.Client) -> dict[str, float]:
    """Mean seconds per successful lookup by endpoint, from the server's histogram."""
    from prometheus_client.parser import text_string_to_metric_families

    sums: dict[str, float] = {}
    counts: dict[str, float] = {}
    for fam in text_string_to_metric_families(http.get("/metrics").text):
        for s in fam.samples:
            if s.name == "cellpulse_lookup_duration_seconds_sum":
                sums[s.labels["endpoint"]] = s.value
            elif s.name == "cellpulse_lookup_duration_seconds_count":
                counts[s.labels["endpoint"]] = s.value
    return {k: sums[k] / counts[k] for k in sums if counts.get(k)}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--vehicles", type=int, default=200)
    ap.add_argument("--hours", type=float, default=24.0)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--repeat", type=int, default=2000, help="timed calls per single-key case")
    ap.add_argument("--batch-repeat", type=int, default=300, help="timed calls per batch case")
    ap.add_argument("--history", type=float, default=3600.0,
                    help="seconds of history the store keeps (consumers and server)")
    args = ap.parse_args()

    sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "tests"))
    from servers import RedisServer, free_port

    cfg = EngineConfig()
    cat = Catalog(cfg)
    widths = {"vehicle": len(cat.names("vehicle", "trip")), "cell": len(cat.names("cell")),
              "route": len(cat.names("route"))}
    server = RedisServer()
    server.start()
    serve = None
    try:
        history_ms = round(args.history * 1000)
        store = RedisStore.from_url(server.url, cfg, history_ms=history_ms)
        city = CityConfig(seed=args.seed, vehicles=args.vehicles, hours=args.hours)
        n, route_counts, fill_s = fill(store, city)
        t = store.watermark_ms()
        used = server.client().info("memory")["used_memory"] / 2**20
        print(f"filled redis-server {server.url} with {n:,} messages in {fill_s:.1f} s "
              f"({n / fill_s:,.0f} fixes/s, one process, batches of {BATCH_MESSAGES}); "
              f"{used:,.0f} MiB used; history {args.history:g} s")
        client = FeatureClient(store, cfg)
        # keys: vehicles live at the watermark, their cells, the routes with most trips
        ids = [vehicle_name(i) for i in range(args.vehicles)]
        known = [v for v, vec in zip(ids, client.vectors(vehicles=ids, as_of=t).vehicles,
                                     strict=True) if vec["vehicle_cell"] is not None]
        vehicles = known or ids
        cells = sorted({str(v["vehicle_cell"]) for v in
                        client.vectors(vehicles=vehicles, as_of=t).vehicles
                        if v["vehicle_cell"]})
        routes = [RouteQuery(o, d, h) for (o, d, h), _ in route_counts.most_common(200)]
        print(f"as of the watermark {t}: {len(vehicles)} live vehicles, {len(cells)} cells, "
              f"{len(routes)} routes with trips")

        port = free_port()
        serve = start_serve(server.url, port, args.history)
        http = httpx.Client(base_url=f"http://127.0.0.1:{port}", timeout=10)
        rc = server.client()
        floor_keys: dict[int, str] = {}

        def floor(nfields: int) -> Callable[[int], Any]:
            if nfields not in floor_keys:
                key = f"bench:floor:{nfields}"
                rc.hset(key, mapping={f"f{i}": f"{1234.5 + i:.6f}" for i in range(nfields)})
                floor_keys[nfields] = key
            fields = [f"f{i}" for i in range(nfields)]
            key = floor_keys[nfields]
            return lambda _: rc.hmget(key, fields)

        def pick(xs: list, i: int, k: int) -> list:
            return [xs[(i * k + j) % len(xs)] for j in range(k)]

        def body(i: int, nv: int, nc: int, nr: int) -> dict:
            keys = ([{"vehicle_id": v} for v in pick(vehicles, i, nv)]
                    + [{"cell": c} for c in pick(cells, i, nc)]
                    + [{"origin_cell": r.origin_cell, "dest_cell": r.dest_cell, "hour": r.hour}
                       for r in pick(routes, i, nr)])
            return {"keys": keys, "as_of": t}

        cases: list[tuple[str, int, Callable, Callable, int]] = [
            ("1 vehicle", args.repeat,
             lambda i: client.vectors(vehicles=[vehicles[i % len(vehicles)]], as_of=t),
             lambda i: http.get(f"/v1/vehicles/{vehicles[i % len(vehicles)]}",
                                params={"as_of": t}).json(),
             widths["vehicle"]),
            ("1 cell", args.repeat,
             lambda i: client.vectors(cells=[cells[i % len(cells)]], as_of=t),
             lambda i: http.get(f"/v1/cells/{cells[i % len(cells)]}",
                                params={"as_of": t}).json(),
             widths["cell"]),
            ("1 route", args.repeat,
             lambda i: client.vectors(routes=[routes[i % len(routes)]], as_of=t),
             lambda i: http.get(f"/v1/routes/{routes[i % len(routes)].origin_cell}/"
                                f"{routes[i % len(routes)].dest_cell}",
                                params={"hour": routes[i % len(routes)].hour, "as_of": t}).json(),
             widths["route"]),
            ("100 vehicles", args.batch_repeat,
             lambda i: client.vectors(vehicles=pick(vehicles, i, 100), as_of=t),
             lambda i: http.post("/v1/vectors", json=body(i, 100, 0, 0)).json(),
             100 * widths["vehicle"]),
            ("100 mixed (40 v, 40 c, 20 r)", args.batch_repeat,
             lambda i: client.vectors(vehicles=pick(vehicles, i, 40), cells=pick(cells, i, 40),
                                      routes=pick(routes, i, 20), as_of=t),
             lambda i: http.post("/v1/vectors", json=body(i, 40, 40, 20)).json(),
             40 * widths["vehicle"] + 40 * widths["cell"] + 20 * widths["route"]),
        ]
        # sanity: HTTP answers equal the client's for one key of each case
        assert http.get(f"/v1/vehicles/{vehicles[0]}", params={"as_of": t}).status_code == 200

        print(f"\n{'case':<30} {'client p50/p99 ms':>18} {'HTTP p50/p99 ms':>17} "
              f"{'HMGET floor p50/p99 ms':>23} {'fields':>6} {'client/floor':>12} "
              f"{'HTTP/floor':>10}")
        for name, repeat, via_client, via_http, nfields in cases:
            warm = max(20, repeat // 20)
            c = timed(via_client, repeat, warm)
            h = timed(via_http, repeat, warm)
            f = timed(floor(nfields), repeat, warm)
            cp, hp, fp = (pct(x, 50) * 1e3 for x in (c, h, f))
            print(f"{name:<30} {cp:>8.3f} / {pct(c, 99) * 1e3:<7.3f} {hp:>7.3f} / "
                  f"{pct(h, 99) * 1e3:<7.3f} {fp:>11.3f} / {pct(f, 99) * 1e3:<9.3f} "
                  f"{nfields:>6} {cp / fp:>12.1f} {hp / fp:>10.1f}")
        means = server_means(http)
        print("\nserver-side mean per request (its histogram, receipt to last byte): "
              + ", ".join(f"{k} {v * 1e3:.3f} ms" for k, v in sorted(means.items())))
        http.close()
    finally:
        if serve is not None and serve.poll() is None:
            os.kill(serve.pid, signal.SIGTERM)
            try:
                serve.wait(timeout=10)
            except subprocess.TimeoutExpired:
                os.kill(serve.pid, signal.SIGKILL)
                serve.wait(timeout=5)
        server.close()


if __name__ == "__main__":
    main()
