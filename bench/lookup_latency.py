"""Lookup latency of the live path, through the Python client and through HTTP, beside a floor.

    python -m bench.lookup_latency              # 400 vehicles, idle and under 5,000 fixes/s
    python -m bench.lookup_latency --quick      # a smoke run: fewer vehicles, calls and fixes/s

Fills a redis-server (the runner's, else one it starts on loopback) with the first 12 hours of
a demo-city day through the engine (``ingest.citysim`` + ``Engine`` on a ``RedisStore``, one
partition, in arrival order, with an hour of history), starts ``cellpulse serve`` against it,
then times each lookup as of the watermark (what "now" is live):

- client: ``FeatureClient.vectors(...)`` in this process (one read-script call);
- HTTP: the same lookup through ``cellpulse serve`` over one keep-alive connection
  (``http.client``; the JSON answer is parsed);
- floor: one bare ``HMGET`` round trip of as many fields as the answer has values, on the same
  server with the same client library: what a store of precomputed vectors would at least cost.

Cases: one vehicle (vehicle and trip families), one cell (with its ring), one route, a batch of
100 vehicles, and mixed batches of 100 and 1,000 keys (40 % vehicles, 40 % cells, 20 % routes,
distinct where the fleet allows). The three paths take turns call by call, so each sees the
same background. Each case runs twice: idle, then while a separate process applies the rest of
the day and the next one to the same store through the engine at a steady rate (decode, engine,
one atomic apply per batch: what a consumer does; ``--load-rate`` fixes/s), reading as of its
moving watermark. Figures: p50, p99 and p99.9 per case, path and run; the p99 carries the
issue's targets. Every process shares the machine's cores. Not a test: figures vary by machine
and run.
"""

from __future__ import annotations

import argparse
import collections
import http.client
import math
import multiprocessing as mp
import os
import signal
import subprocess
import sys
import tempfile
import time
import urllib.parse
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import orjson

from bench.common import BenchEnv, BenchOptions, Figure
from featurestore.catalog import Catalog
from featurestore.cells import cell_of
from featurestore.client import FeatureClient
from featurestore.config import EngineConfig
from featurestore.engine import Engine
from featurestore.lookup import RouteQuery
from featurestore.redis_store import RedisStore
from featurestore.schema import Fix, decode_json
from featurestore.store import SourceSpan
from ingest.citysim import CityConfig, vehicle_name, write_jsonl

BATCH_MESSAGES = 5000  # messages per engine batch while filling
LOAD_BATCH = 500  # messages per batch of the background load
PARTITION = "fixes:0"
DB = 3  # the database of the runner's redis-server this benchmark uses (flushed before, after)
HISTORY_S = 3600.0
FILL_HOURS = 12.0  # the store holds the day up to noon: "now" is a busy moment
PCTS = (50.0, 99.0, 99.9)


@dataclass(frozen=True)
class Sizes:
    vehicles: int
    repeat_one: int  # timed calls per path of each one-key case
    repeat_100: int
    repeat_1000: int
    load_rate: float  # fixes/s applied in the background during the loaded run

    @classmethod
    def of(cls, opts: BenchOptions) -> Sizes:
        if opts.quick:
            return cls(vehicles=60, repeat_one=300, repeat_100=60, repeat_1000=10,
                       load_rate=2000.0)
        return cls(vehicles=400, repeat_one=2000, repeat_100=500, repeat_1000=100,
                   load_rate=5000.0)


@dataclass(frozen=True)
class Case:
    name: str  # "1 vehicle", ...
    nv: int
    nc: int
    nr: int
    repeat: int
    target_ms: dict[str, float]  # path -> p99 target in ms (absent: only the floor ratio)

    @property
    def keys(self) -> int:
        return self.nv + self.nc + self.nr


def cases(sizes: Sizes) -> list[Case]:
    one = {"client": 1.0, "HTTP": 3.0}
    return [
        Case("1 vehicle", 1, 0, 0, sizes.repeat_one, one),
        Case("1 cell (with its ring)", 0, 1, 0, sizes.repeat_one, one),
        Case("1 route", 0, 0, 1, sizes.repeat_one, one),
        Case("100 vehicles", 100, 0, 0, sizes.repeat_100, {"client": 5.0, "HTTP": 5.0}),
        Case("100 mixed keys (40 v, 40 c, 20 r)", 40, 40, 20, sizes.repeat_100,
             {"client": 5.0, "HTTP": 5.0}),
        Case("1,000 mixed keys (400 v, 400 c, 200 r)", 400, 400, 200, sizes.repeat_1000, {}),
    ]


# ------------------------------------------------------------------------------------------
# Data: two demo days, the first half-day applied before timing, the rest as background load
# ------------------------------------------------------------------------------------------
def demo_days(folder: Path, seed: int, vehicles: int) -> list[Path]:
    """Two consecutive simulated days as JSON Lines (cached in ``folder``)."""
    out = []
    for day in ("2026-06-01", "2026-06-02"):
        path = folder / f"lookup-{seed}-{vehicles}-{day}.jsonl"
        if not path.exists():
            tmp = path.with_suffix(".part")
            write_jsonl(tmp, CityConfig(seed=seed, vehicles=vehicles, day=day))
            tmp.replace(path)
        out.append(path)
    return out


def _batches(lines: Sequence[bytes], size: int) -> Any:
    for i in range(0, len(lines), size):
        yield [decode_json(raw) for raw in lines[i:i + size]]


def _apply(eng: Engine, msgs: list, offset: int) -> Any:
    last = max((m.arrival_ms for m in msgs if getattr(m, "arrival_ms", None) is not None),
               default=None)
    return eng.process(msgs, spans={PARTITION: SourceSpan(offset, offset + len(msgs), last)})


def fill(store: RedisStore, lines: Sequence[bytes]) -> tuple[collections.Counter, float]:
    """Apply ``lines`` in arrival order; return the completed trips per route key, seconds."""
    eng = Engine(store, store.config)
    routes: collections.Counter = collections.Counter()
    offset = 0
    t0 = time.perf_counter()
    for msgs in _batches(lines, BATCH_MESSAGES):
        res = _apply(eng, msgs, offset)
        for c in res.completed:
            routes[(c.origin_route_cell, c.dest_route_cell, c.pickup_hour)] += 1
        offset += len(msgs)
    store.set_highwaters({PARTITION: offset})
    return routes, time.perf_counter() - t0


def split_at(lines: Sequence[bytes], hours: float) -> int:
    """Index of the first line that arrived ``hours`` after the day's first arrival."""
    first = None
    for i, raw in enumerate(lines):
        m = decode_json(raw)
        arr = getattr(m, "arrival_ms", None)
        if arr is None:
            continue
        if first is None:
            first = arr
        elif arr - first >= hours * 3_600_000:
            return i
    return len(lines)


def load_worker(url: str, history_ms: int, paths: list[str], start: int, first_offset: int,
                rate: float, stop: Any, applied: Any, ready: Any) -> None:
    """The background load: apply the days from line ``start`` on at ``rate`` fixes/s in
    batches of LOAD_BATCH (decode, engine, one atomic apply each), until ``stop`` is set."""
    cfg = EngineConfig()
    store = RedisStore.from_url(url, cfg, history_ms=history_ms)
    eng = Engine(store, cfg)
    lines = Path(paths[0]).read_bytes().splitlines()[start:]
    for p in paths[1:]:
        lines += Path(p).read_bytes().splitlines()
    offset = first_offset
    interval = LOAD_BATCH / rate
    ready.set()
    due = time.perf_counter()
    for i in range(0, len(lines), LOAD_BATCH):
        if stop.is_set():
            break
        msgs = [decode_json(raw) for raw in lines[i:i + LOAD_BATCH]]
        _apply(eng, msgs, offset)
        offset += len(msgs)
        with applied.get_lock():
            applied.value += len(msgs)
        due += interval
        pause = due - time.perf_counter()
        if pause > 0:
            stop.wait(pause)


# ------------------------------------------------------------------------------------------
# Timing
# ------------------------------------------------------------------------------------------
def percentile(sorted_xs: Sequence[float], q: float) -> float:
    """Nearest-rank percentile of an ascending list."""
    k = max(0, min(len(sorted_xs) - 1, math.ceil(q / 100.0 * len(sorted_xs)) - 1))
    return sorted_xs[k]


def with_db(url: str, db: int) -> str:
    parts = urllib.parse.urlsplit(url)
    return urllib.parse.urlunsplit((parts.scheme, parts.netloc, f"/{db}", parts.query, ""))


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
            conn = http.client.HTTPConnection("127.0.0.1", port, timeout=2)
            conn.request("GET", "/v1/health")
            if conn.getresponse().status == 200:
                conn.close()
                return proc
        except OSError:
            pass
        if time.monotonic() > deadline:
            stop_process(proc)
            raise RuntimeError("cellpulse serve did not become healthy in 30 s")
        time.sleep(0.1)


def stop_process(proc: subprocess.Popen) -> None:
    if proc.poll() is None:
        os.kill(proc.pid, signal.SIGTERM)
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait(timeout=5)


class Http:
    """One keep-alive connection to ``cellpulse serve``; answers parsed with orjson. The server
    closes a connection idle for 5 s: ``reconnect`` before each run."""

    def __init__(self, port: int) -> None:
        self.port = port
        self.conn = http.client.HTTPConnection("127.0.0.1", port, timeout=30)

    def reconnect(self) -> None:
        self.conn.close()
        self.conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=30)

    def get(self, path: str, **params: Any) -> Any:
        return self._call("GET", f"{path}?{urllib.parse.urlencode(params)}", None, {})

    def post(self, path: str, body: Any) -> Any:
        return self._call("POST", path, orjson.dumps(body), {"content-type": "application/json"})

    def _call(self, method: str, path: str, body: bytes | None, headers: dict) -> Any:
        for attempt in (1, 2):
            try:
                self.conn.request(method, path, body=body, headers=headers)
                r = self.conn.getresponse()
                data = r.read()
                break
            except (http.client.RemoteDisconnected, ConnectionError):
                if attempt == 2:
                    raise
                self.reconnect()  # the server closed the idle connection
        if r.status != 200:
            raise RuntimeError(f"HTTP {r.status}: {data[:300]!r}")
        return orjson.loads(data)

    def close(self) -> None:
        self.conn.close()


@dataclass
class Keys:
    vehicles: list[str]
    cells: list[str]
    routes: list[RouteQuery]

    def pick(self, i: int, case: Case) -> tuple[list[str], list[str], list[RouteQuery]]:
        def take(xs: list, n: int) -> list:
            return [xs[(i * n + j) % len(xs)] for j in range(n)]

        return take(self.vehicles, case.nv), take(self.cells, case.nc), take(self.routes, case.nr)


def choose_keys(lines: Sequence[bytes], routes: collections.Counter, cfg: EngineConfig,
                vehicles: int) -> Keys:
    """Every vehicle of the fleet; the cells with most fixes in the last hour applied; the
    routes with most completed trips."""
    tail: collections.Counter = collections.Counter()
    last = None
    for raw in reversed(lines):
        m = decode_json(raw)
        if not isinstance(m, Fix):
            continue
        if last is None:
            last = m.arrival_ms
        if last - m.arrival_ms > 3_600_000:
            break
        tail[cell_of(m.lat, m.lon, cfg.cell_resolution)] += 1
    return Keys([vehicle_name(i) for i in range(vehicles)], [c for c, _ in tail.most_common()],
                [RouteQuery(o, d, h) for (o, d, h), _ in routes.most_common()])


def run_cases(client: FeatureClient, web: Http, rc: Any, keys: Keys, case_list: list[Case],
              widths: dict[str, int], as_of: Callable[[], int], label: str
              ) -> tuple[list[Figure], list[str]]:
    """Time every case through the three paths in turn; figures and printable lines."""
    floor_keys: dict[int, str] = {}
    figures: list[Figure] = []
    web.reconnect()
    lines: list[str] = []
    for case in case_list:
        nfields = (case.nv * widths["vehicle"] + case.nc * widths["cell"]
                   + case.nr * widths["route"])
        if nfields not in floor_keys:
            key = f"bench:floor:{nfields}"
            rc.delete(key)
            for lo in range(0, nfields, 1000):
                rc.hset(key, mapping={f"f{i}": f"{1234.5 + i:.6f}"
                                      for i in range(lo, min(nfields, lo + 1000))})
            floor_keys[nfields] = key
        floor_key, fields = floor_keys[nfields], [f"f{i}" for i in range(nfields)]

        def via_client(i: int, t: int, case: Case = case) -> Any:
            v, c, r = keys.pick(i, case)
            return client.vectors(vehicles=v, cells=c, routes=r, as_of=t)

        def via_http(i: int, t: int, case: Case = case) -> Any:
            v, c, r = keys.pick(i, case)
            if case.keys == 1 and v:
                return web.get(f"/v1/vehicles/{v[0]}", as_of=t)
            if case.keys == 1 and c:
                return web.get(f"/v1/cells/{c[0]}", as_of=t)
            if case.keys == 1:
                return web.get(f"/v1/routes/{r[0].origin_cell}/{r[0].dest_cell}",
                               hour=r[0].hour, as_of=t)
            body = ([{"vehicle_id": x} for x in v] + [{"cell": x} for x in c]
                    + [{"origin_cell": q.origin_cell, "dest_cell": q.dest_cell, "hour": q.hour}
                       for q in r])
            return web.post("/v1/vectors", {"keys": body, "as_of": t})

        def via_floor(i: int, t: int, key: str = floor_key, fields: list = fields) -> Any:
            return rc.hmget(key, fields)

        paths = {"client": via_client, "HTTP": via_http, "floor": via_floor}
        times: dict[str, list[float]] = {p: [] for p in paths}
        clock = time.perf_counter
        for i in range(-max(5, case.repeat // 20), case.repeat):  # negative i: warm-up
            t = as_of()
            for name, fn in paths.items():
                t0 = clock()
                fn(i, t)
                dt = clock() - t0
                if i >= 0:
                    times[name].append(dt * 1e3)
        pcts = {p: [percentile(sorted(xs), q) for q in PCTS] for p, xs in times.items()}
        fl = pcts["floor"]
        for path in ("client", "HTTP"):
            for q, value, floor in zip(PCTS, pcts[path], fl, strict=True):
                target, met = "", None
                if q == 99.0:
                    limit = case.target_ms.get(path)
                    met = value <= 3 * floor and (limit is None or value <= limit)
                    target = ("≤ 3× floor" if limit is None
                              else f"≤ {limit:g} ms and ≤ 3× floor")
                figures.append(Figure(
                    bench="lookup", what=f"{case.name}, {path}, {label}, p{q:g}",
                    value=round(value, 4), unit="ms", floor=round(floor, 4),
                    floor_what=f"HMGET of {nfields:,} fields, p{q:g}", better="lower",
                    target=target, met=met,
                    extra={"case": case.name, "path": path, "run": label, "percentile": q,
                           "calls": len(times[path]), "fields": nfields,
                           "keys": case.keys}))
        lines.append(
            f"{case.name:<40} " + "  ".join(
                f"{p} {' / '.join(f'{x:.3f}' for x in pcts[p])}"
                for p in ("client", "HTTP", "floor"))
            + f"  ({len(times['client'])} calls, {nfields:,} fields)")
    return figures, lines


# ------------------------------------------------------------------------------------------
# The benchmark
# ------------------------------------------------------------------------------------------
def run(opts: BenchOptions, env: BenchEnv, *, log: Callable[[str], None] | None = None,
        sizes: Sizes | None = None) -> list[Figure]:
    """Fill, serve, then time every case idle and under load; the figures (see module doc)."""
    log = log or (lambda s: print(s, file=sys.stderr, flush=True))
    sizes = sizes or Sizes.of(opts)
    own_server = None
    if env.redis_url is None:
        from bench.servers import RedisServer

        own_server = RedisServer()
        own_server.start()
        base_url = own_server.url
    else:
        base_url = env.redis_url
    url = with_db(base_url, DB)
    serve = web = None
    stop = mp.get_context("spawn").Event()
    loader = None
    tmp = tempfile.TemporaryDirectory() if opts.data_dir is None else None
    try:
        folder = Path(opts.data_dir or tmp.name)  # type: ignore[union-attr]
        folder.mkdir(parents=True, exist_ok=True)
        cfg = EngineConfig()
        cat = Catalog(cfg)
        widths = {"vehicle": len(cat.names("vehicle", "trip")), "cell": len(cat.names("cell")),
                  "route": len(cat.names("route"))}
        history_ms = round(HISTORY_S * 1000)
        store = RedisStore.from_url(url, cfg, history_ms=history_ms)
        store.client.flushdb()
        t0 = time.perf_counter()
        days = demo_days(folder, opts.seed, sizes.vehicles)
        log(f"lookup: two demo days of {sizes.vehicles} vehicles in "
            f"{time.perf_counter() - t0:.1f} s")
        day1 = days[0].read_bytes().splitlines()
        split = split_at(day1, FILL_HOURS)
        routes, fill_s = fill(store, day1[:split])
        t_idle = store.watermark_ms()
        assert t_idle is not None
        used = store.client.info("memory")["used_memory"] / 2**20
        log(f"lookup: applied {split:,} messages ({FILL_HOURS:g} h) in {fill_s:.1f} s; "
            f"{used:,.0f} MiB used; history {HISTORY_S:g} s")
        keys = choose_keys(day1[:split], routes, cfg, sizes.vehicles)
        log(f"lookup: keys: {len(keys.vehicles)} vehicles, {len(keys.cells)} cells with fixes "
            f"in the last hour, {len(keys.routes)} routes with trips")
        client = FeatureClient(store, cfg)

        from bench.servers import free_port

        port = free_port()
        serve = start_serve(url, port, HISTORY_S)
        web = Http(port)
        # sanity: the HTTP answer is the client's
        a = client.vectors(vehicles=keys.vehicles[:1], as_of=t_idle).vehicles[0]
        b = web.get(f"/v1/vehicles/{keys.vehicles[0]}", as_of=t_idle)["vector"]
        assert all(b[k] == v or (v != v and b[k] is None) for k, v in a.items()), (a, b)

        case_list = cases(sizes)
        figures, lines = run_cases(client, web, store.client, keys, case_list, widths,
                                   lambda: t_idle, "idle")
        header = "case; then p50 / p99 / p99.9 ms of client, HTTP and the HMGET floor"
        log(f"lookup: idle, as of the watermark {t_idle}\n  {header}\n  " + "\n  ".join(lines))

        ctx = mp.get_context("spawn")
        applied = ctx.Value("q", 0)
        ready = ctx.Event()
        loader = ctx.Process(target=load_worker, daemon=True, args=(
            url, history_ms, [str(days[0]), str(days[1])], split, split, sizes.load_rate,
            stop, applied, ready))
        loader.start()
        if not ready.wait(120):
            raise RuntimeError("the load process did not start in 120 s")
        time.sleep(1.0)  # let it reach its pace
        n0, l0 = applied.value, time.perf_counter()
        last_wm = [store.watermark_ms() or t_idle, time.perf_counter()]

        def moving() -> int:
            now = time.perf_counter()
            if now - last_wm[1] > 0.05:  # the watermark, read afresh every 50 ms (untimed)
                last_wm[:] = [store.watermark_ms() or last_wm[0], now]
            return last_wm[0]

        loaded, lines = run_cases(client, web, store.client, keys, case_list, widths, moving,
                                  "under load")
        n1, l1 = applied.value, time.perf_counter()
        alive = loader.is_alive()
        rate = (n1 - n0) / (l1 - l0)
        label = (f"{rate:,.0f} fixes/s applied in the background (asked {sizes.load_rate:,.0f}; "
                 f"decode + engine + one apply per {LOAD_BATCH})"
                 + ("" if alive else "; the load ran out before the end"))
        log(f"lookup: under load, {label}\n  {header}\n  " + "\n  ".join(lines))
        for f in loaded:
            f.extra["load_fixes_per_s"] = round(rate)
        figures += loaded
        return figures
    finally:
        stop.set()
        if loader is not None:
            loader.join(15)
            if loader.is_alive():
                loader.kill()
                loader.join(5)
        if web is not None:
            web.close()
        if serve is not None:
            stop_process(serve)
        try:
            import redis

            redis.Redis.from_url(url).flushdb()
        except Exception:  # noqa: BLE001 - cleanup only
            pass
        if own_server is not None:
            own_server.close()
        if tmp is not None:
            tmp.cleanup()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="a smoke run (fewer of everything)")
    ap.add_argument("--redis-url", help="a redis-server to use (database 3 is flushed); "
                                        "default: start one on loopback")
    ap.add_argument("--data-dir", help="where to keep the generated demo days between runs")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--vehicles", type=int, help="fleet size (default 400; quick 60)")
    ap.add_argument("--repeat", type=int, help="timed calls per one-key case (default 2000)")
    ap.add_argument("--load-rate", type=float, help="fixes/s of the background load "
                                                    "(default 5000; quick 2000)")
    args = ap.parse_args()
    opts = BenchOptions(quick=args.quick, data_dir=args.data_dir, seed=args.seed)
    sizes = Sizes.of(opts)
    if args.vehicles or args.repeat or args.load_rate:
        sizes = Sizes(args.vehicles or sizes.vehicles, args.repeat or sizes.repeat_one,
                      sizes.repeat_100, sizes.repeat_1000, args.load_rate or sizes.load_rate)
    figures = run(opts, BenchEnv(redis_url=args.redis_url), sizes=sizes)
    print(f"\n{'what':<62} {'figure':>10} {'floor':>10} {'ratio':>7}  target")
    for f in figures:
        ratio = f.ratio
        print(f"{f.what:<62} {f.value:>7.3f} ms {f.floor:>7.3f} ms "
              f"{'' if ratio is None else f'{ratio:6.2f}×':>7}  {f.target}"
              f"{'' if f.met is None else (' met' if f.met else ' MISSED')}")


if __name__ == "__main__":
    main()
