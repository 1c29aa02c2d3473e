"""Redis memory per active vehicle and per cell-bucket, broken down by key family.

    python -m bench.memory                          # 1 k and 10 k vehicles, history 900 s and 0
    python -m bench.memory --vehicles 1000 --history 0 --minutes 30
    python -m bench.memory --flat-only              # the real-time "memory flat in time" check

A steady fleet (``SteadyFleet``): N vehicles, every one reporting every 15 s (the demo city's
fix interval) while it drives around Port Veyra at 8-12 m/s, alternating vacant and occupied
(trips with trip ids, so route sums fill too), each fix arriving 0.2-3 s after it was taken.
Every vehicle reports all the time, so the *active vehicles* are the whole fleet: those that
reported within the last minute (and within the vehicle expiry). The fixes go through
``featurestore.engine.Engine`` on ``featurestore.redis_store.RedisStore`` into a real
redis-server at full speed, in batches of up to 2,000 fixes (the consumer's poll size).

What is measured after a fill of ``--minutes`` of event time:

* ``INFO memory`` ``used_memory`` after the fill minus after ``FLUSHALL`` (the whole cost,
  allocator overhead included), per active vehicle;
* ``MEMORY USAGE key SAMPLES 0`` of every key (or a random sample of 2,000 keys per family,
  scaled by the family's key count), summed per key family (the prefixes of
  ``featurestore.redis_layout``): vehicle state ``v``, vehicle history log ``vl``, cell blocks
  ``c``, cell history log ``cl``, presence ``pv``/``po``, route sums ``r``, route history log
  ``rl``, and the markers (offsets, watermark, counts, meta).
* per cell-bucket: the cell blocks' bytes over the number of (cell, bucket) pairs they hold.

Which keys are bounded by what: the history logs (``vl``, ``cl``, ``rl``) and, with history,
the presence intervals are trimmed on every write to the last ``--history`` seconds of
*arrival time* (the watermark), so they reach their steady size after that much event time,
fast-forwarded or not. Vehicle states are one per vehicle. Cell blocks (one hash per cell
and 60-bucket block) and route sums (one hash per origin, destination and pickup hour, a
field per day) are only bounded by their TTL, which runs on the *wall clock*: a fill at full
speed never lets one expire, so after a long fast-forwarded span they overstate what a
real-time steady load keeps. The fill therefore covers ``--minutes`` (default 75: the history
plus the longest window, so every family that is bounded by event time is at its steady size)
and the figures say how many cell blocks per cell they hold.

"Memory flat in time" (``flat_check``) is measured in real time, with a shortened
configuration so that every TTL elapses within minutes: 1 s buckets, 1-minute windows, 5 s
maximum delay, 10 s "now" horizon, 30 s vehicle expiry, 10 s history and a 5 s TTL margin,
vehicles reporting every second on the wall clock; ``used_memory`` is sampled every few
seconds over more than twice the longest key lifetime, and the last third is compared with the
middle third. Not a test.
"""

from __future__ import annotations

import argparse
import math
import random
import sys
import time
from collections import defaultdict
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from bench.common import BenchEnv, BenchOptions, Figure
from featurestore.config import EngineConfig
from featurestore.engine import Engine
from featurestore.redis_store import RedisStore
from featurestore.schema import Fix

KIB = 1024
TARGET_BYTES_PER_VEHICLE = 1 * KIB
SAMPLE_KEYS = 2000  # per family; families with more keys are sampled and scaled
BATCH = 2000

# Port Veyra's land in metres east / north of the central station (ingest.citysim's frame).
_LAT0, _LON0 = -33.20, -20.60
_M_PER_DEG_LAT = 6_371_008.8 * math.pi / 180.0
_M_PER_DEG_LON = _M_PER_DEG_LAT * math.cos(math.radians(_LAT0))
_X_MIN, _X_MAX, _Y_MIN, _Y_MAX = -9500.0, 3500.0, -6000.0, 6000.0

FAMILIES = {
    "v": "vehicle state",
    "vl": "vehicle history log",
    "c": "cell blocks",
    "cl": "cell history log",
    "pv": "presence (vacant)",
    "po": "presence (occupied)",
    "r": "route sums",
    "rl": "route history log",
    "markers": "markers (offsets, watermark, counts, meta)",
}
PER_VEHICLE_FAMILIES = ("v", "vl", "pv", "po")  # one vehicle's own keys and presence members


# ------------------------------------------------------------------------------------------
# A steady fleet
# ------------------------------------------------------------------------------------------
@dataclass
class SteadyFleet:
    """N vehicles that each report every ``interval_s``, forever, in nondecreasing arrival.

    Vehicles drive straight-ish legs at 8-12 m/s inside Port Veyra's land box, turning
    gently and bouncing off its edges; each alternates vacant (mean 6 min) and occupied (mean
    12 min, with a trip id). Fixes arrive 0.2-3 s after their event time. Seeded: the same
    arguments give the same stream.
    """

    vehicles: int
    start_ms: int
    interval_s: float = 15.0
    seed: int = 7
    id_width: int = 5
    _rng: np.random.Generator = field(init=False, repr=False)

    def __post_init__(self) -> None:
        rng = self._rng = np.random.default_rng(self.seed)
        n = self.vehicles
        self.ids = [f"veh-{i + 1:0{self.id_width}d}" for i in range(n)]
        self.x = rng.uniform(_X_MIN, _X_MAX, n)
        self.y = rng.uniform(_Y_MIN, _Y_MAX, n)
        self.heading = rng.uniform(0, 2 * math.pi, n)
        self.speed = rng.uniform(8.0, 12.0, n)
        self.occupied = rng.random(n) < 0.5
        self.until_ms = self.start_ms + (rng.exponential(6 * 60_000, n)).astype(np.int64)
        self.trip_no = np.zeros(n, dtype=np.int64)
        # each vehicle's first fix: a random phase within one interval
        self.next_ms = self.start_ms + (rng.random(n) * self.interval_s * 1000).astype(np.int64)

    def _step(self, idx: np.ndarray, now_ms: np.ndarray) -> None:
        rng = self._rng
        dt = self.interval_s
        self.heading[idx] += rng.normal(0, 0.25, len(idx))
        self.x[idx] += np.cos(self.heading[idx]) * self.speed[idx] * dt
        self.y[idx] += np.sin(self.heading[idx]) * self.speed[idx] * dt
        for lo, hi, arr, flip in ((_X_MIN, _X_MAX, self.x, math.pi), (_Y_MIN, _Y_MAX, self.y, 0)):
            out = (arr[idx] < lo) | (arr[idx] > hi)
            if out.any():
                j = idx[out]
                arr[j] = np.clip(arr[j], lo, hi)
                self.heading[j] = flip - self.heading[j]
        switch = idx[now_ms >= self.until_ms[idx]]
        if len(switch):
            self.occupied[switch] = ~self.occupied[switch]
            mean = np.where(self.occupied[switch], 12 * 60_000, 6 * 60_000)
            self.until_ms[switch] = now_ms[np.searchsorted(idx, switch)] + rng.exponential(
                mean).astype(np.int64)
            self.trip_no[switch] += self.occupied[switch]

    def fixes(self, end_ms: int, tick_ms: int = 1000) -> Iterator[list[Fix]]:
        """Lists of fixes, one per ``tick_ms`` of arrival time, until event time ``end_ms``."""
        rng = self._rng
        step = int(self.interval_s * 1000)
        t = self.start_ms
        pending: list[tuple[int, Fix]] = []
        while t < end_ms:
            t_next = t + tick_ms
            idx = np.flatnonzero(self.next_ms < t_next)
            if len(idx):
                ev = self.next_ms[idx].copy()
                self._step(idx, ev)
                delay = np.clip(rng.lognormal(-0.3, 0.6, len(idx)), 0.2, 3.0)
                arr = ev + (delay * 1000).astype(np.int64)
                lat = _LAT0 + self.y[idx] / _M_PER_DEG_LAT
                lon = _LON0 + self.x[idx] / _M_PER_DEG_LON
                occ = self.occupied[idx]
                for k, i in enumerate(idx.tolist()):
                    vid = self.ids[i]
                    busy = bool(occ[k])
                    pending.append((int(arr[k]), Fix(
                        vid, int(ev[k]), round(float(lat[k]), 7), round(float(lon[k]), 7),
                        "occupied" if busy else "vacant", int(arr[k]),
                        round(float(self.speed[i]), 2),
                        f"T-{vid}-{int(self.trip_no[i])}" if busy else None)))
                self.next_ms[idx] += step
            pending.sort(key=lambda p: p[0])
            cut = 0
            while cut < len(pending) and pending[cut][0] < t_next:
                cut += 1
            yield [f for _, f in pending[:cut]]
            del pending[:cut]
            t = t_next


# ------------------------------------------------------------------------------------------
# Measuring Redis
# ------------------------------------------------------------------------------------------
def family_of(key: bytes, namespace: str = "cellpulse") -> str:
    rest = key.decode()[len(namespace) + 1:]
    head = rest.split(":", 1)[0]
    return head if head in FAMILIES and head != "markers" else "markers"


def used_memory(client: Any) -> int:
    return int(client.info("memory")["used_memory"])


@dataclass
class FamilyUsage:
    keys: int = 0
    bytes: float = 0.0  # MEMORY USAGE summed (scaled up when sampled)
    entries: float = 0.0  # hash fields / zset members (scaled likewise)
    sampled: int = 0


def breakdown(client: Any, namespace: str = "cellpulse", seed: int = 7
              ) -> tuple[dict[str, FamilyUsage], int]:
    """MEMORY USAGE per key family, and the number of (cell, bucket) pairs in the cell
    blocks."""
    keys: dict[str, list[bytes]] = defaultdict(list)
    for key in client.scan_iter(match=f"{namespace}:*", count=5000):
        keys[family_of(key, namespace)].append(key)
    rnd = random.Random(seed)
    out: dict[str, FamilyUsage] = {}
    cell_buckets = 0
    for fam, ks in keys.items():
        sample = ks if len(ks) <= SAMPLE_KEYS else rnd.sample(ks, SAMPLE_KEYS)
        pipe = client.pipeline(transaction=False)
        for k in sample:
            pipe.memory_usage(k, samples=0)
            pipe.type(k)
        replies = pipe.execute()
        sizes = replies[0::2]
        kinds = replies[1::2]
        pipe = client.pipeline(transaction=False)
        for k, kind in zip(sample, kinds, strict=True):
            kind = kind.decode() if isinstance(kind, bytes) else kind
            if kind == "hash":
                pipe.hlen(k)
            elif kind == "zset":
                pipe.zcard(k)
            else:
                pipe.exists(k)
        counts = pipe.execute()
        scale = len(ks) / len(sample)
        out[fam] = FamilyUsage(len(ks), sum(s or 0 for s in sizes) * scale,
                               sum(counts) * scale, len(sample))
        if fam == "c":
            pipe = client.pipeline(transaction=False)
            for k in ks:
                pipe.hkeys(k)
            for fields in pipe.execute():
                cell_buckets += len({f[1:] for f in fields})
    return out, cell_buckets


@dataclass
class MemoryCase:
    vehicles: int
    history_s: int
    minutes: float
    fixes: int = 0
    seconds: float = 0.0
    used_before: int = 0
    used_after: int = 0
    families: dict[str, FamilyUsage] = field(default_factory=dict)
    cell_buckets: int = 0

    @property
    def used_delta(self) -> int:
        return self.used_after - self.used_before

    @property
    def per_vehicle(self) -> float:
        return self.used_delta / self.vehicles

    def family_bytes(self, fams: tuple[str, ...] | None = None) -> float:
        return sum(u.bytes for f, u in self.families.items() if fams is None or f in fams)

    @property
    def per_cell_bucket(self) -> float | None:
        c = self.families.get("c")
        return c.bytes / self.cell_buckets if c and self.cell_buckets else None


def fill(url: str, vehicles: int, history_s: int, minutes: float, seed: int = 7,
         config: EngineConfig | None = None, progress: bool = True) -> MemoryCase:
    """Flush the server, then run ``minutes`` of a steady fleet through the engine into it."""
    store = RedisStore.from_url(url, config, history_ms=history_s * 1000)
    client = store.client
    client.flushall()
    client.memory_purge() if hasattr(client, "memory_purge") else None
    case = MemoryCase(vehicles, history_s, minutes)
    case.used_before = used_memory(client)
    engine = Engine(store, store.config)
    start = 1_780_272_000_000  # 2026-06-01 00:00 UTC, the demo city's day
    fleet = SteadyFleet(vehicles, start, seed=seed)
    end = start + int(minutes * 60_000)
    batch: list[Fix] = []
    t0 = time.perf_counter()
    last_report = t0
    for tick in fleet.fixes(end):
        batch += tick
        if len(batch) >= BATCH:
            engine.process(batch)
            case.fixes += len(batch)
            batch = []
            now = time.perf_counter()
            if progress and now - last_report > 5:
                last_report = now
                done = (tick[-1].event_ms - start) / (end - start) if tick else 0
                print(f"  memory: {vehicles} vehicles, history {history_s} s: "
                      f"{done:5.1%} of {minutes:g} min, {case.fixes:,} fixes, "
                      f"{case.fixes / (now - t0):,.0f} fixes/s", file=sys.stderr, flush=True)
    if batch:
        engine.process(batch)
        case.fixes += len(batch)
    case.seconds = time.perf_counter() - t0
    case.used_after = used_memory(client)
    case.families, case.cell_buckets = breakdown(client, store.layout.namespace, seed)
    return case


# ------------------------------------------------------------------------------------------
# Report
# ------------------------------------------------------------------------------------------
def table(case: MemoryCase) -> str:
    n = case.vehicles
    lines = [
        f"{n:,} vehicles, history {case.history_s} s, {case.minutes:g} min of event time "
        f"({case.fixes:,} fixes in {case.seconds:.1f} s):",
        f"  used_memory delta {case.used_delta / 1e6:8.2f} MB = {case.per_vehicle:8.0f} B per "
        f"active vehicle (target <= {TARGET_BYTES_PER_VEHICLE} B)",
        f"  {'family':44s} {'keys':>8s} {'entries':>10s} {'MB':>8s} {'B/vehicle':>10s}",
    ]
    for fam, label in FAMILIES.items():
        u = case.families.get(fam)
        if u is None:
            continue
        lines.append(f"  {label + ' (' + fam + ')':44s} {u.keys:8,d} {u.entries:10,.0f} "
                     f"{u.bytes / 1e6:8.2f} {u.bytes / n:10.0f}")
    total = case.family_bytes()
    lines.append(f"  {'sum of MEMORY USAGE':44s} {'':8s} {'':10s} {total / 1e6:8.2f} "
                 f"{total / n:10.0f}")
    if case.per_cell_bucket is not None:
        cells = case.families["c"]
        lines.append(f"  cell blocks: {case.cell_buckets:,} cell-buckets, "
                     f"{case.per_cell_bucket:.1f} B per cell-bucket, {cells.keys:,} blocks")
    return "\n".join(lines)


def figures(case: MemoryCase) -> list[Figure]:
    tag = f"{case.vehicles // 1000 if case.vehicles >= 1000 else case.vehicles}" + (
        " k" if case.vehicles >= 1000 else "")
    what = f"Redis bytes per active vehicle, {tag} vehicles, history {case.history_s} s"
    extra: dict[str, Any] = {
        "vehicles": case.vehicles, "history_s": case.history_s, "minutes": case.minutes,
        "fixes": case.fixes, "fill_seconds": round(case.seconds, 2),
        "used_memory_delta": case.used_delta, "cell_buckets": case.cell_buckets,
        "families": {f: {"keys": u.keys, "entries": round(u.entries), "bytes": round(u.bytes),
                         "bytes_per_vehicle": round(u.bytes / case.vehicles, 1),
                         "sampled_keys": u.sampled}
                     for f, u in case.families.items()},
    }
    out = [Figure("memory", what + " (used_memory delta)", round(case.per_vehicle, 1), "bytes",
                  better="lower", target=f"≤ {TARGET_BYTES_PER_VEHICLE} B",
                  met=case.per_vehicle <= TARGET_BYTES_PER_VEHICLE, extra=extra)]
    for fam in FAMILIES:
        u = case.families.get(fam)
        if u is not None:
            out.append(Figure("memory", f"  of which {FAMILIES[fam]} ({fam}), {tag} vehicles, "
                              f"history {case.history_s} s", round(u.bytes / case.vehicles, 1),
                              "bytes/vehicle", better="lower"))
    if case.per_cell_bucket is not None:
        out.append(Figure("memory", f"Redis bytes per cell-bucket, {tag} vehicles, "
                          f"history {case.history_s} s", round(case.per_cell_bucket, 1),
                          "bytes", better="lower"))
    return out


def run(opts: BenchOptions, env: BenchEnv) -> list[Figure]:
    if env.redis_url is None:
        raise RuntimeError("the memory benchmark needs a redis-server (BenchEnv.redis_url)")
    sizes = (100, 1000) if opts.quick else (1000, 10_000)
    minutes = 20.0 if opts.quick else 75.0
    out: list[Figure] = []
    for n in sizes:
        for hist in (900, 0):
            case = fill(env.redis_url, n, hist, minutes, seed=opts.seed)
            print(table(case), file=sys.stderr, flush=True)
            out += figures(case)
    return out


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--vehicles", type=int, action="append",
                    help="fleet size (repeatable; default 1000 and 10000)")
    ap.add_argument("--history", type=int, action="append",
                    help="history seconds (repeatable; default 900 and 0)")
    ap.add_argument("--minutes", type=float, default=75.0, help="event time filled")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--redis-url", default=None,
                    help="an existing redis-server to FLUSH and fill (default: start one)")
    args = ap.parse_args(argv)
    from bench.servers import RedisServer

    def go(url: str) -> None:
        for n in args.vehicles or (1000, 10_000):
            for hist in args.history if args.history is not None else (900, 0):
                print(table(fill(url, n, hist, args.minutes, seed=args.seed)), flush=True)

    if args.redis_url:
        go(args.redis_url)
    else:
        with RedisServer() as server:
            go(server.url)


if __name__ == "__main__":
    main()
