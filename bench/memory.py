"""Redis memory per active vehicle and per cell-bucket, broken down by key family.

    python -m bench.memory                          # 1 k and 10 k vehicles, history 900 s and 0
    python -m bench.memory --vehicles 1000 --history 0 --minutes 30 --flat-seconds 0
    python -m bench.memory --flat-only              # the real-time "memory flat in time" check

A steady fleet (``SteadyFleet``): N vehicles, every one reporting every 15 s (the demo city's
fix interval) while it drives around Port Veyra at 8-12 m/s, alternating vacant and occupied
(trips with trip ids, so route sums fill too), each fix arriving 0.2-3 s after it was taken.
Every vehicle reports all the time, so the *active vehicles* are the whole fleet: those that
reported within the last 15 s (well within the 6 h vehicle expiry). The fixes go through
``featurestore.engine.Engine`` on ``featurestore.redis_store.RedisStore`` into a real
redis-server at full speed, in batches of 500 fixes (``--batch``; the consumer's default
``--max-poll-records``). The batch size matters with history: the history logs hold one
member per vehicle and per cell and batch.

What is measured after a fill of ``--minutes`` of event time (default 75: the 15-minute
history plus the longest window, 60 minutes):

* ``INFO memory`` ``used_memory`` after the fill minus after ``FLUSHALL`` (the whole cost:
  keys, values, the keyspace's tables, allocator rounding), per active vehicle; the writer's
  connection is closed first so that its query buffer (a whole batch) does not count;
* ``MEMORY USAGE key SAMPLES 0`` of every key (or a random sample of 2,000 keys per family,
  scaled by the family's key count), summed per key family (the prefixes of
  ``featurestore.redis_layout``): vehicle state ``v``, vehicle history log ``vl``, cell blocks
  ``c``, cell history log ``cl``, presence ``pv``/``po``, route sums ``r``, route history log
  ``rl``, and the markers (offsets, watermark, counts, meta);
* per cell-bucket: the cell blocks' bytes over the number of (cell, bucket) pairs they hold.

Which keys are bounded by what. The history logs (``vl``, ``cl``, ``rl``) and, with history,
the presence intervals are trimmed on every write to the last ``--history`` seconds of
*arrival time* (the watermark), so a fast-forwarded fill shows their steady size once it has
covered that span. Vehicle states are one per vehicle. Cell blocks (one hash per cell and
60-bucket block) and route sums (one hash per origin, destination and pickup hour, three
fields per day) are bounded only by TTLs, which run on the *wall clock* (route sums also lose
days older than the route days), so a fill at full speed never sees one expire. For those two
the report adds a *projection* of the steady state, labelled as such: cell blocks = the
cell-buckets written per minute x (block length + cell TTL) x the bytes per cell-bucket
measured; route sums (an upper bound) = the route keys of one pickup hour x 24 hours x the
MEMORY USAGE of a key of this fill grown to every day kept (29).

"Memory flat in time" (``flat_check``) is measured in real time, with a shortened
configuration so that every TTL elapses within minutes: 1 s buckets, 1-minute windows, 5 s
maximum delay, 10 s "now" horizon, 30 s vehicle expiry, 1 route day, 10 s history and a 5 s
TTL margin (longest key life: a cell block, 200 s), 1,000 vehicles reporting every second on
the wall clock. ``used_memory`` is sampled every 5 s for 480 s, and the mean of the last
quarter is compared with the mean of the third quarter (flat: within 5 %). Not a test.
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
BATCH = 500  # the consumer's default max_poll_records

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
    12 min, with a trip id), both spans exponentially distributed: about 3.3 trips per
    vehicle and hour, a busy taxi. Fixes arrive 0.2-3 s after their event time. Seeded: the
    same arguments give the same stream.
    """

    vehicles: int
    start_ms: int
    interval_s: float = 15.0
    seed: int = 7
    id_width: int = 5
    vacant_mean_s: float = 6 * 60.0
    occupied_mean_s: float = 12 * 60.0
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
        self.until_ms = self.start_ms + (rng.exponential(self.vacant_mean_s * 1000, n)
                                         ).astype(np.int64)
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
            mean = np.where(self.occupied[switch], self.occupied_mean_s * 1000,
                            self.vacant_mean_s * 1000)
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
    dataset_before: int = 0
    dataset_after: int = 0
    families: dict[str, FamilyUsage] = field(default_factory=dict)
    cell_buckets: int = 0
    cell_life_min: float = 0.0  # a cell block's key lives this long after its block starts
    route_days_kept: int = 0
    route_keys_per_hour: float = 0.0  # (origin, destination) keys of one pickup hour
    route_key_full: int = 0  # MEMORY USAGE of a route key holding every day kept

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

    # --- steady state of the families only a wall-clock TTL bounds ------------------------
    @property
    def steady_cells(self) -> float:
        """Cell blocks under a real-time steady load: the cell-buckets written per minute
        times how long a block's buckets stay (its TTL after its last write, plus the block
        itself), times the bytes per cell-bucket measured here."""
        if not self.cell_buckets:
            return 0.0
        per_min = self.cell_buckets / self.minutes
        return per_min * self.cell_life_min * (self.per_cell_bucket or 0.0)

    @property
    def steady_routes(self) -> float:
        """Route sums once the route days are full (an upper bound): the route keys of one
        pickup hour seen here, for each of the 24 hours, each holding the sums of every day
        kept (a key of this fill grown to all its days, measured with MEMORY USAGE)."""
        return self.route_keys_per_hour * 24 * self.route_key_full

    @property
    def steady_total(self) -> float:
        rest = self.family_bytes(tuple(f for f in FAMILIES if f not in ("c", "r")))
        return rest + self.steady_cells + self.steady_routes


def fill(url: str, vehicles: int, history_s: int, minutes: float, seed: int = 7,
         config: EngineConfig | None = None, progress: bool = True,
         batch_size: int = BATCH) -> MemoryCase:
    """Flush the server, then run ``minutes`` of a steady fleet through the engine into it."""
    import redis

    probe = redis.Redis.from_url(url)
    probe.flushall()
    store = RedisStore.from_url(url, config, history_ms=history_s * 1000)
    layout = store.layout
    cfg = store.config
    case = MemoryCase(vehicles, history_s, minutes)
    case.cell_life_min = (layout.cell_ttl_s + layout.block_buckets * cfg.bucket_s) / 60
    case.route_days_kept = cfg.route_days + 1
    case.used_before, case.dataset_before = _memory(probe)
    engine = Engine(store, cfg)
    start = 1_780_272_000_000  # 2026-06-01 00:00 UTC, the demo city's day
    fleet = SteadyFleet(vehicles, start, seed=seed)
    end = start + int(minutes * 60_000)
    batch: list[Fix] = []
    t0 = time.perf_counter()
    last_report = t0
    for tick in fleet.fixes(end):
        batch += tick
        while len(batch) >= batch_size:
            engine.process(batch[:batch_size])
            case.fixes += batch_size
            del batch[:batch_size]
            now = time.perf_counter()
            if progress and now - last_report > 5:
                last_report = now
                done = (tick[-1].event_ms - start) / (end - start) if tick else 0
                print(f"  memory: {vehicles:,} vehicles, history {history_s} s: "
                      f"{done:5.1%} of {minutes:g} min, {case.fixes:,} fixes, "
                      f"{case.fixes / (now - t0):,.0f} fixes/s", file=sys.stderr, flush=True)
    if batch:
        engine.process(batch)
        case.fixes += len(batch)
    case.seconds = time.perf_counter() - t0
    store.client.close()  # the writer's query buffer (a whole batch) is not state
    store.client.connection_pool.disconnect()
    case.used_after, case.dataset_after = _memory(probe)
    case.families, case.cell_buckets = breakdown(probe, layout.namespace, seed)
    case.route_keys_per_hour, case.route_key_full = _route_keys(probe, layout.namespace,
                                                                 minutes, case.route_days_kept)
    probe.close()
    return case


def _route_keys(client: Any, namespace: str, minutes: float, days: int) -> tuple[float, int]:
    """Route keys per pickup hour (those of hour 0 when the fill covers it, else scaled), and
    the MEMORY USAGE of the largest route key copied with its sums repeated for ``days``
    days (the same field names and values, day numbers before its own)."""
    keys = list(client.scan_iter(match=f"{namespace}:r:*", count=5000))
    if not keys:
        return 0.0, 0
    if minutes >= 60:
        per_hour = float(sum(1 for k in keys if k.endswith(b":0")))
    else:
        per_hour = len(keys) * 60 / minutes
    pipe = client.pipeline(transaction=False)
    for k in keys[:200]:
        pipe.hgetall(k)
    biggest = max(pipe.execute(), key=lambda h: sum(len(v) for v in h.values()))
    grown: dict[bytes, bytes] = {}
    for name, value in biggest.items():
        day = int(name[1:])
        for back in range(days):
            grown[name[:1] + str(day - back).encode()] = value
    probe_key = f"{namespace}:bench-route-probe"
    client.hset(probe_key, mapping=grown)
    size = int(client.memory_usage(probe_key, samples=0) or 0)
    client.delete(probe_key)
    return per_hour, size


def _memory(client: Any) -> tuple[int, int]:
    info = client.info("memory")
    return int(info["used_memory"]), int(info["used_memory_dataset"])


# ------------------------------------------------------------------------------------------
# Memory flat in time: a real-time steady load with lifetimes of seconds
# ------------------------------------------------------------------------------------------
SHORT_CONFIG = dict(bucket_s=1, windows_min=(1,), ring_window_min=1, max_delay_s=5.0,
                    clock_skew_s=5.0, now_horizon_s=10.0, vehicle_ttl_s=30.0, route_days=1)
SHORT_HISTORY_S = 10
SHORT_MARGIN_S = 5


@dataclass
class FlatCase:
    vehicles: int
    seconds: float
    longest_life_s: float
    samples: list[tuple[float, int]] = field(default_factory=list)  # (s since start, bytes)
    fixes: int = 0
    behind_s: float = 0.0  # how far the feed fell behind the wall clock at worst

    def level(self, lo: float, hi: float) -> float:
        vals = [b for t, b in self.samples if lo * self.seconds <= t <= hi * self.seconds]
        return sum(vals) / len(vals) if vals else float("nan")

    @property
    def growth(self) -> float:
        """Relative change of the mean used_memory from the third quarter of the run to the
        last (both after the longest key life when the run lasts twice that)."""
        before, last = self.level(0.5, 0.75), self.level(0.75, 1.0)
        return (last - before) / before if before else float("nan")

    @property
    def judged(self) -> bool:
        return self.seconds >= 2 * self.longest_life_s


def flat_check(url: str, vehicles: int = 1000, seconds: float = 480.0, seed: int = 7,
               progress: bool = True) -> FlatCase:
    """A steady fleet reporting every second on the wall clock, with every lifetime shrunk
    to seconds (``SHORT_CONFIG``), for ``seconds``; used_memory sampled every 5 s."""
    import redis

    probe = redis.Redis.from_url(url)
    probe.flushall()
    cfg = EngineConfig(**SHORT_CONFIG)
    store = RedisStore.from_url(url, cfg, history_ms=SHORT_HISTORY_S * 1000,
                                ttl_margin_s=SHORT_MARGIN_S)
    layout = store.layout
    life = max(layout.cell_ttl_s + layout.block_buckets * cfg.bucket_s, layout.vehicle_ttl_s,
               layout.presence_ttl_s, layout.log_ttl_s)
    case = FlatCase(vehicles, seconds, life)
    engine = Engine(store, cfg)
    start_ms = int(time.time() * 1000)
    fleet = SteadyFleet(vehicles, start_ms, interval_s=1.0, seed=seed,
                        vacant_mean_s=20.0, occupied_mean_s=40.0)
    t0 = time.monotonic()
    next_sample = 0.0
    for tick in fleet.fixes(start_ms + int(seconds * 1000)):
        if tick:
            engine.process(tick)
            case.fixes += len(tick)
            # keep pace with the wall clock: the tick's fixes arrived by its last arrival
            ahead = (tick[-1].arrival_ms - start_ms) / 1000 - (time.monotonic() - t0)
            if ahead > 0:
                time.sleep(ahead)
            else:
                case.behind_s = max(case.behind_s, -ahead)
        elapsed = time.monotonic() - t0
        if elapsed >= next_sample:
            case.samples.append((round(elapsed, 1), used_memory(probe)))
            next_sample += 5.0
            if progress and len(case.samples) % 6 == 1:
                print(f"  memory flat: {elapsed:5.0f}/{seconds:g} s, used_memory "
                      f"{case.samples[-1][1] / 1e6:.2f} MB, {case.fixes:,} fixes",
                      file=sys.stderr, flush=True)
    store.client.close()
    probe.close()
    return case


# ------------------------------------------------------------------------------------------
# Report
# ------------------------------------------------------------------------------------------
def _tag(n: int) -> str:
    return f"{n // 1000} k" if n >= 1000 and n % 1000 == 0 else f"{n:,}"


def table(case: MemoryCase) -> str:
    n = case.vehicles
    lines = [
        f"{n:,} vehicles, history {case.history_s} s, {case.minutes:g} min of event time "
        f"({case.fixes:,} fixes in {case.seconds:.1f} s):",
        f"  used_memory delta {case.used_delta / 1e6:8.2f} MB = {case.per_vehicle:8.0f} B per "
        f"active vehicle (used_memory_dataset delta "
        f"{(case.dataset_after - case.dataset_before) / n:.0f} B; target <= "
        f"{TARGET_BYTES_PER_VEHICLE} B)",
        f"  {'family':32s} {'keys':>8s} {'entries':>10s} {'MB':>8s} {'B/vehicle':>10s}",
    ]
    for fam, label in FAMILIES.items():
        u = case.families.get(fam)
        if u is None:
            continue
        lines.append(f"  {fam + ' ' + label:32.32s} {u.keys:8,d} {u.entries:10,.0f} "
                     f"{u.bytes / 1e6:8.2f} {u.bytes / n:10.0f}")
    total = case.family_bytes()
    lines.append(f"  {'sum of MEMORY USAGE':32s} {'':8s} {'':10s} {total / 1e6:8.2f} "
                 f"{total / n:10.0f}")
    if case.per_cell_bucket is not None:
        cells = case.families["c"]
        lines.append(f"  cell blocks: {case.cell_buckets:,} cell-buckets in {cells.keys:,} "
                     f"blocks, {case.per_cell_bucket:.1f} B per cell-bucket")
    lines.append(
        f"  steady state (projected): cell blocks {case.steady_cells / n:.0f} B/vehicle (blocks "
        f"live {case.cell_life_min:.0f} min), route sums <= {case.steady_routes / n:.0f} "
        f"B/vehicle ({case.route_days_kept} days), all families "
        f"{case.steady_total / n:.0f} B/vehicle")
    return "\n".join(lines)


def flat_table(case: FlatCase) -> str:
    pts = ", ".join(f"{t:.0f} s {b / 1e6:.2f} MB" for t, b in case.samples[:: max(
        1, len(case.samples) // 8)])
    return (f"memory flat in time: {case.vehicles:,} vehicles reporting every second for "
            f"{case.seconds:g} s ({case.fixes:,} fixes; longest key life {case.longest_life_s:g} "
            f"s; fell behind the clock by {case.behind_s:.1f} s at worst)\n"
            f"  used_memory: {pts}\n"
            f"  mean of the last quarter vs the third quarter: {case.growth:+.1%}"
            f"{'' if case.judged else ' (too short to judge: under twice the longest life)'}")


def figures(case: MemoryCase) -> list[Figure]:
    n = case.vehicles
    tag = f"{_tag(n)} vehicles, history {case.history_s} s"
    extra: dict[str, Any] = {
        "vehicles": n, "history_s": case.history_s, "minutes": case.minutes,
        "fixes": case.fixes, "fill_seconds": round(case.seconds, 2),
        "used_memory_delta": case.used_delta,
        "used_memory_dataset_delta": case.dataset_after - case.dataset_before,
        "cell_buckets": case.cell_buckets, "cell_life_min": round(case.cell_life_min, 1),
        "steady_cells_bytes": round(case.steady_cells),
        "steady_routes_bytes": round(case.steady_routes),
        "route_keys_per_hour": case.route_keys_per_hour,
        "route_key_all_days_bytes": case.route_key_full,
        "families": {f: {"keys": u.keys, "entries": round(u.entries), "bytes": round(u.bytes),
                         "bytes_per_vehicle": round(u.bytes / n, 1),
                         "sampled_keys": u.sampled}
                     for f, u in case.families.items()},
    }
    target = f"≤ {TARGET_BYTES_PER_VEHICLE} B"
    out = [
        Figure("memory", f"Redis bytes per active vehicle, {tag}, after {case.minutes:g} min "
               "(used_memory delta)", round(case.per_vehicle, 1), "bytes", better="lower",
               target=target, met=case.per_vehicle <= TARGET_BYTES_PER_VEHICLE, extra=extra),
        Figure("memory", f"Redis bytes per active vehicle, {tag}, steady state (cell blocks "
               "and route sums projected to their lifetimes)", round(case.steady_total / n, 1),
               "bytes", better="lower", target=target,
               met=case.steady_total / n <= TARGET_BYTES_PER_VEHICLE),
    ]
    if case.per_cell_bucket is not None:
        out.append(Figure("memory", f"Redis bytes per cell-bucket, {tag}",
                          round(case.per_cell_bucket, 1), "bytes", better="lower"))
    return out


def flat_figure(case: FlatCase) -> Figure:
    return Figure(
        "memory", f"used_memory growth, last quarter vs third quarter of {case.seconds:g} s "
        f"of real-time steady load ({_tag(case.vehicles)} vehicles, lifetimes in seconds)",
        round(case.growth * 100, 2), "%", better="lower", target="≤ 5 % (flat)",
        met=(abs(case.growth) <= 0.05) if case.judged else None,
        extra={"samples": case.samples, "longest_life_s": case.longest_life_s,
               "fixes": case.fixes, "behind_s": round(case.behind_s, 2),
               "config": {**SHORT_CONFIG, "history_s": SHORT_HISTORY_S,
                          "ttl_margin_s": SHORT_MARGIN_S}})


def run(opts: BenchOptions, env: BenchEnv) -> list[Figure]:
    """1 k and 10 k vehicles (100 and 1,000 with ``quick``), history 900 s and 0, then the
    real-time flat check (30 s with ``quick``, too short to be judged)."""
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
    flat = flat_check(env.redis_url, 200 if opts.quick else 1000,
                      30.0 if opts.quick else 480.0, seed=opts.seed)
    print(flat_table(flat), file=sys.stderr, flush=True)
    out.append(flat_figure(flat))
    return out


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--vehicles", type=int, action="append",
                    help="fleet size (repeatable; default 1000 and 10000)")
    ap.add_argument("--history", type=int, action="append",
                    help="history seconds (repeatable; default 900 and 0)")
    ap.add_argument("--minutes", type=float, default=75.0, help="event time filled")
    ap.add_argument("--flat-seconds", type=float, default=480.0,
                    help="length of the real-time flat check (0: skip it)")
    ap.add_argument("--flat-only", action="store_true", help="only the real-time flat check")
    ap.add_argument("--flat-vehicles", type=int, default=1000)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--batch", type=int, default=BATCH, help="fixes per engine batch")
    ap.add_argument("--redis-url", default=None,
                    help="an existing redis-server to FLUSH and fill (default: start one)")
    args = ap.parse_args(argv)
    from bench.servers import RedisServer

    def go(url: str) -> None:
        if not args.flat_only:
            for n in args.vehicles or (1000, 10_000):
                for hist in args.history if args.history is not None else (900, 0):
                    print(table(fill(url, n, hist, args.minutes, seed=args.seed,
                                     batch_size=args.batch)), flush=True)
        if args.flat_seconds > 0:
            print(flat_table(flat_check(url, args.flat_vehicles, args.flat_seconds,
                                        seed=args.seed)), flush=True)

    if args.redis_url:
        go(args.redis_url)
    else:
        with RedisServer() as server:
            go(server.url)


if __name__ == "__main__":
    main()
