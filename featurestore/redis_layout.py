"""How engine state lies in Redis: key names, a batch as a list of write operations, and a read
as a list of commands with the parser of their replies.

Pure functions, no Redis import: ``featurestore.redis_store`` sends what these build (writes
through one Lua script, so a batch and its offsets land in one atomic step; reads through one
read script call, so a read is a consistent snapshot in one round trip).

Keys (``P`` is the store's namespace; ``{...}`` is a hash tag, so one vehicle's keys, one cell's
keys and one route's keys each share a Redis Cluster slot):

=============================  ======  ==========================================================
``P:v:{vid}``                  string  the vehicle's state (JSON)
``P:vl:{vid}``                 zset    history: the state before each accepted fix, by arrival
                                       (grouped per batch, below)
``P:c:{cell}:BLOCK``           hash    counters ``f<bucket>``, ``p<bucket>``, ``d<bucket>`` of
                                       one block of buckets (block = longest window)
``P:cl:{cell}``                zset    history: each fix's counter increments, by arrival
                                       (grouped per batch, below)
``P:pv:{cell}``, ``P:po:{cell}`` zset  presence intervals of vacant / occupied vehicles
``P:r:{o.d}:HOUR``             hash    route sums ``n<day>``, ``s<day>``, ``q<day>``
``P:rl:{o.d}:HOUR``            zset    history: each completed trip, by arrival
``P:pos``, ``P:arr``           hash    per source partition: next offset, latest arrival applied
``P:hw``                       hash    per source partition: end offset seen by its consumer
``P:counts``                   hash    messages applied by outcome (``rejected:<reason>``...)
``P:meta``                     hash    ``wm``: the watermark (latest arrival applied);
                                       ``history_ms``: the history the writers keep
=============================  ======  ==========================================================

The vehicle and cell logs hold one member per key and batch: the batch id, then for each
fix of the batch, in the order applied, GROUP (0x1D) and ``arrival|state-before`` (vehicle)
or ``arrival|bucket|f|p|d`` (cell), scored by the group's latest arrival. A read as of T
takes the groups scored after T and, inside them, the entries that arrived after T (for a
vehicle: the first one, in the first group). One member per key and batch instead of one
per fix keeps both the apply script and the memory cheap when a batch holds many fixes of
a vehicle or a cell. A vehicle's fixes are applied in arrival order (one partition, record
timestamps that do not decrease: the assumption ``known_at`` makes too).

Presence is kept as intervals so that it can be read as of an earlier moment: member
``vid|event_ms|arrival_ms`` (the vehicle's latest in-order fix and when it became known) with
score ``min(arrival it was superseded, event_ms + now horizon + 1)``. A vehicle counts at T
when its member's score is > T and its arrival is <= T.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from functools import cached_property

import orjson

from featurestore.config import EngineConfig
from featurestore.state import TripState, VehicleState
from featurestore.store import (
    Delta,
    ReadRequest,
    ReadResult,
    RouteKey,
    SourcePosition,
)
from featurestore.transitions import DAY_MS

PRESENCE_STATUSES = {"vacant": "pv", "occupied": "po"}  # offline vehicles are never counted

GROUP = "\x1d"  # between the entries of a log group: never in JSON text, ids or numbers
ZSET_CHUNK = 1000  # members per coalesced ZADD/ZREM (Lua's unpack has a limit near 8000 values)
Op = tuple[str, ...]  # an operation of the apply script: opcode and string arguments
Command = tuple[str | int | float, ...]


@dataclass(frozen=True)
class Layout:
    """Key names and key lifetimes for one namespace and engine configuration (lifetimes are
    computed once per layout: they are read for every key of every batch)."""

    config: EngineConfig
    namespace: str = "cellpulse"
    history_ms: int = 0
    ttl_margin_s: int = 600

    # --- keys --------------------------------------------------------------------------
    @cached_property
    def block_buckets(self) -> int:
        return self.config.longest_window_buckets

    def vehicle(self, vid: str) -> str:
        return f"{self.namespace}:v:{{{vid}}}"

    def vehicle_log(self, vid: str) -> str:
        return f"{self.namespace}:vl:{{{vid}}}"

    def cell_block(self, cell: str, block: int) -> str:
        return f"{self.namespace}:c:{{{cell}}}:{block}"

    def cell_log(self, cell: str) -> str:
        return f"{self.namespace}:cl:{{{cell}}}"

    def presence(self, cell: str, status: str) -> str:
        return f"{self.namespace}:{PRESENCE_STATUSES[status]}:{{{cell}}}"

    def route(self, key: RouteKey) -> str:
        o, d, h = key
        return f"{self.namespace}:r:{{{o}.{d}}}:{h}"

    def route_log(self, key: RouteKey) -> str:
        o, d, h = key
        return f"{self.namespace}:rl:{{{o}.{d}}}:{h}"

    @property
    def positions(self) -> str:
        return f"{self.namespace}:pos"

    @property
    def arrivals(self) -> str:
        return f"{self.namespace}:arr"

    @property
    def highwaters(self) -> str:
        return f"{self.namespace}:hw"

    @property
    def counts(self) -> str:
        return f"{self.namespace}:counts"

    @property
    def meta(self) -> str:
        return f"{self.namespace}:meta"

    # --- lifetimes (seconds; refreshed on every write of the key) ------------------------
    def _ttl(self, span_ms: float) -> int:
        return math.ceil((span_ms + self.history_ms) / 1000) + self.ttl_margin_s

    @cached_property
    def vehicle_ttl_s(self) -> int:
        return self._ttl(self.config.vehicle_ttl_ms)

    @cached_property
    def log_ttl_s(self) -> int:
        return self._ttl(self.config.max_delay_ms)

    @cached_property
    def cell_ttl_s(self) -> int:
        # a block is written until its end plus the maximum delay, and read until its end plus
        # the longest window (plus the history kept)
        cfg = self.config
        block_ms = self.block_buckets * cfg.bucket_ms
        return self._ttl(block_ms + cfg.longest_window_buckets * cfg.bucket_ms + cfg.max_delay_ms)

    @cached_property
    def presence_ttl_s(self) -> int:
        return self._ttl(self.config.now_horizon_ms + self.config.max_delay_ms)

    @cached_property
    def route_ttl_s(self) -> int:
        return self._ttl((self.config.route_days + 1) * DAY_MS)


def presence_member(vid: str, event_ms: int, arrival_ms: int) -> str:
    return f"{vid}|{event_ms}|{arrival_ms}"


def encode_state(state: VehicleState, *, with_recent: bool = True) -> str:
    """A vehicle state as a compact JSON array (positional, no field names; ``recent`` as
    offsets back from ``event_ms``). History logs leave ``recent`` out: it only serves the
    engine's duplicate check, never a lookup. About a third of the size of the field-named
    form, and cheaper to build."""
    if not with_recent:  # the same array with an empty ``recent``, built in C
        return orjson.dumps(state[:10] + ((), state[11]), default=tuple).decode()
    t = state.trip
    ev = state.event_ms
    return orjson.dumps([
        state.vehicle_id, ev, state.arrival_ms, state.seen_ms, state.lat, state.lon,
        state.cell, state.status, state.speed_mps, state.bearings,
        [ev - r for r in state.recent],
        None if t is None else tuple(t),
    ]).decode()


def decode_state(raw: bytes | str) -> VehicleState:
    """The inverse of ``encode_state`` (also reads the older field-named JSON object)."""
    d = orjson.loads(raw)
    if isinstance(d, dict):
        return VehicleState.from_dict(d)
    vid, ev, arr, seen, lat, lon, cell, status, speed, bearings, back, trip = d
    return VehicleState(
        vid, ev, arr, seen, lat, lon, cell, status, speed, tuple(bearings),
        tuple(ev - b for b in back),
        None if trip is None else TripState(*trip[:9], tuple(trip[9])),
    )


def _state_json(state: VehicleState | None, *, with_recent: bool = True) -> str:
    return "-" if state is None else encode_state(state, with_recent=with_recent)


def _parse_state(raw: bytes | str | None) -> VehicleState | None:
    if raw is None or raw in (b"-", "-"):
        return None
    return decode_state(raw)


# ------------------------------------------------------------------------------------------
# Writes
# ------------------------------------------------------------------------------------------
def delta_ops(delta: Delta, layout: Layout, batch_id: str) -> tuple[list[str], list[Op]]:
    """The apply script's arguments for one batch: span checks, then write operations.

    Opcodes: ``I`` key field n (HINCRBY), ``S`` key value ttl (SET EX), ``Z`` key n
    score1 member1 ... (one ZADD of n members), ``X`` likewise with ZADD XX, ``R`` key n
    member1 ... (one ZREM), ``T`` key max
    (ZREMRANGEBYSCORE -inf max), ``P`` key min (delete hash fields whose number is < min),
    ``E`` key ttl (EXPIRE), ``H`` key field value (HSET), ``M`` key field value (HSET when
    greater than the stored number).

    Sorted-set writes are coalesced per key: one ZADD (then one ZADD XX, one ZREM) per key
    and batch, whatever the number of fixes, so the script's cost grows with the keys a
    batch touches more than with its fixes. Within a key, members enter before they are
    closed (a member entered and superseded in the same batch), and each member is
    entered once and closed once.
    """
    checks: list[str] = []
    for part, span in sorted(delta.spans.items()):
        checks += [part, str(span.first_offset)]
    ops: list[Op] = []
    ttl: dict[str, int] = {}
    cfg = layout.config
    horizon = cfg.now_horizon_ms
    hist = layout.history_ms > 0
    zadd: dict[str, list[str]] = {}  # key -> score, member, ... (ZADD)
    zclose: dict[str, list[str]] = {}  # key -> score, member, ... (ZADD XX)
    zrem: dict[str, list[str]] = {}  # key -> member, ... (ZREM)

    for vid, state in delta.vehicles.items():
        ops.append(("S", layout.vehicle(vid), _state_json(state), str(layout.vehicle_ttl_s)))

    bb = layout.block_buckets
    for (cell, bucket), (f, p, d) in delta.cells.items():
        key = layout.cell_block(cell, bucket // bb)
        for name, n in (("f", f), ("p", p), ("d", d)):
            if n:
                ops.append(("I", key, f"{name}{bucket}", str(n)))
        ttl[key] = layout.cell_ttl_s

    route_days_min = delta.retention.route_day_min if delta.retention is not None else None
    for (o, dd, h, day), (n, s1, s2) in delta.routes.items():
        key = layout.route((o, dd, h))
        ops += [("I", key, f"n{day}", str(n)), ("I", key, f"s{day}", str(s1)),
                ("I", key, f"q{day}", str(s2))]
        if route_days_min is not None:
            ops.append(("P", key, str(route_days_min)))
        ttl[key] = layout.route_ttl_s

    presence_ttl = layout.presence_ttl_s

    # Presence: per fix where the history log has the fixes (intervals closed at the arrival
    # that superseded them), else the batch's net move per vehicle.
    def leave(vid: str, cell: str | None, status: str | None, ev: int | None,
              arr: int | None, at: int) -> None:
        if cell is None or status not in PRESENCE_STATUSES or ev is None or arr is None:
            return
        key = layout.presence(cell, status)  # type: ignore[arg-type]
        member = presence_member(vid, ev, arr)
        if hist:
            zclose.setdefault(key, []).extend((str(min(at, ev + horizon + 1)), member))
        else:
            zrem.setdefault(key, []).append(member)
        ttl[key] = presence_ttl

    def enter(vid: str, cell: str, status: str, ev: int, arr: int) -> None:
        if status not in PRESENCE_STATUSES:
            return
        key = layout.presence(cell, status)
        zadd.setdefault(key, []).extend((str(ev + horizon + 1), presence_member(vid, ev, arr)))
        ttl[key] = presence_ttl

    chains = _vehicle_chains(delta) if hist else {}
    # per fix: close the interval it supersedes, open its own; an interval opened and closed
    # within the batch is written once, with its closing score
    opened: dict[str, dict[str, str]] = {}  # presence key -> member -> score
    for vid, chain in chains.items():
        for arrival, before, after in chain:
            if before is not None:
                bev = before.event_ms
                if (before.cell, before.status, bev) == (after.cell, after.status,
                                                         after.event_ms):
                    continue
                if before.status in PRESENCE_STATUSES:
                    key = layout.presence(before.cell, before.status)
                    member = f"{vid}|{bev}|{before.arrival_ms}"
                    score = str(min(arrival, bev + horizon + 1))
                    mine = opened.get(key)
                    if mine is not None and member in mine:
                        mine[member] = score
                    else:
                        zclose.setdefault(key, []).extend((score, member))
                        ttl[key] = presence_ttl
            if after.status in PRESENCE_STATUSES:
                key = layout.presence(after.cell, after.status)
                aev = after.event_ms
                opened.setdefault(key, {})[f"{vid}|{aev}|{after.arrival_ms}"] = str(
                    aev + horizon + 1)
                ttl[key] = presence_ttl
    for key, members in opened.items():
        zadd.setdefault(key, []).extend(x for m, sc in members.items() for x in (sc, m))
    for vid, mv in delta.presence.items():
        if vid not in chains:  # no per-fix log for it: the batch's net move
            leave(vid, mv.old_cell, mv.old_status, mv.old_event_ms, mv.old_arrival_ms,
                  mv.arrival_ms)
            enter(vid, mv.cell, mv.status, mv.event_ms, mv.arrival_ms)

    if hist:
        log_ttl = layout.log_ttl_s
        # one member per key and batch (a group): the batch id, then per fix GS + its entry;
        # scored by the group's latest arrival (see the module docstring)
        vlog = ((layout.vehicle_log(vid), arr,
                 f"{arr}|{_state_json(before, with_recent=False)}")
                for arr, vid, before in delta.vehicle_log)
        clog = ((layout.cell_log(cell), arr, f"{arr}|{bucket}|{f}|{p}|{d}")
                for arr, cell, bucket, f, p, d in delta.cell_log)
        for entries in (vlog, clog):
            for key, (last, group) in _log_groups(entries, batch_id).items():
                zadd.setdefault(key, []).extend((str(last), GROUP.join(group)))
                ttl[key] = log_ttl
        for i, (arr, o, dd, h, day, dur) in enumerate(delta.route_log):
            key = layout.route_log((o, dd, h))
            zadd.setdefault(key, []).extend((str(arr), f"{arr}|{batch_id}.{i}|{day}|{dur}"))
            ttl[key] = log_ttl

    for code, groups, width in (("Z", zadd, 2), ("X", zclose, 2), ("R", zrem, 1)):
        for key, args in groups.items():
            for lo in range(0, len(args), ZSET_CHUNK * width):
                part = args[lo:lo + ZSET_CHUNK * width]
                ops.append((code, key, str(len(part) // width), *part))

    if delta.watermark_ms is not None:
        # Forget what no answerable read needs: history before (watermark - history), and
        # presence intervals that ended by then.
        forget = delta.watermark_ms - layout.history_ms
        for key in ttl:
            kind = key[len(layout.namespace) + 1:].split(":", 1)[0]
            if kind in ("vl", "cl", "rl"):
                ops.append(("T", key, f"({forget}"))
            elif kind in ("pv", "po"):
                ops.append(("T", key, str(forget)))
        ops.append(("M", layout.meta, "wm", str(delta.watermark_ms)))
        ops.append(("H", layout.meta, "history_ms", str(layout.history_ms)))
    for key, seconds in ttl.items():
        ops.append(("E", key, str(seconds)))
    for name, n in sorted(delta.counts.items()):
        ops.append(("I", layout.counts, name, str(n)))
    for part, span in sorted(delta.spans.items()):
        ops.append(("H", layout.positions, part, str(span.next_offset)))
        if span.last_arrival_ms is not None:
            ops.append(("M", layout.arrivals, part, str(span.last_arrival_ms)))
    return checks, ops


def _log_groups(entries: Iterable[tuple[str, int, str]], batch_id: str
                ) -> dict[str, tuple[int, list[str]]]:
    """Log entries ``(key, arrival, text)`` gathered per key, in order, behind the batch id;
    with each key's latest arrival (the group's score)."""
    groups: dict[str, tuple[int, list[str]]] = {}
    for key, arr, text in entries:
        got = groups.get(key)
        if got is None:
            groups[key] = (arr, [batch_id, text])
        else:
            got[1].append(text)
            if arr > got[0]:
                groups[key] = (arr, got[1])
    return groups


def _vehicle_chains(delta: Delta) -> dict[str, list[tuple[int, VehicleState | None,
                                                           VehicleState]]]:
    """Per vehicle, each accepted fix as (arrival, state before, state after)."""
    seq: dict[str, list[tuple[int, VehicleState | None]]] = {}
    for arr, vid, before in delta.vehicle_log:
        seq.setdefault(vid, []).append((arr, before))
    out: dict[str, list[tuple[int, VehicleState | None, VehicleState]]] = {}
    for vid, steps in seq.items():
        final = delta.vehicles[vid]
        afters = [b for _, b in steps[1:]] + [final]
        out[vid] = [(arr, before, after if after is not None else final)
                    for (arr, before), after in zip(steps, afters, strict=True)]
    return out


SEPARATOR = "\x1f"  # the unit separator: never in JSON text, ids or numbers
RECORD_SEPARATOR = "\x1e"  # between the commands of a packed read, likewise never in values


def flatten(checks: list[str], ops: Iterable[Op]) -> list[str]:
    """ARGV for the apply script: number of span checks, the checks, then the operations
    packed into one string, fields separated by SEPARATOR."""
    return [str(len(checks) // 2), *checks, SEPARATOR.join(x for op in ops for x in op)]


# ------------------------------------------------------------------------------------------
# Reads
# ------------------------------------------------------------------------------------------
@dataclass
class ReadPlan:
    """The read script's request for one read, and the parser of its reply.

    ``request`` is one string of records (RECORD_SEPARATOR between records, SEPARATOR between
    fields); the script answers one string with one record per request record, in order.
    Records (``featurestore.redis_store.READ_LUA`` runs them):

    - ``V key log``: a vehicle's state as of T (the state before the first logged change
      after T, else the current state; ``log`` empty without history) -> the state's JSON,
      ``-`` or empty for none;
    - ``C lo hi log block...``: a cell's counters for buckets lo..hi from its blocks, minus
      the log's increments after T -> ``bucket f p d`` for every non-zero bucket;
    - ``P vacant occupied min_event``: vehicles present in a cell at T by status (interval
      open at T, known by T, event at or after min_event) -> ``vacant occupied``;
    - ``R key log day_lo day_hi``: a route's sums ``n s q`` of each day that has trips, then,
      after GROUP_SEPARATOR, the ``day dur`` of its trips logged after T;
    - ``* command args...``: any command; an array reply is joined by SEPARATOR, a missing
      value as the empty string (which no stored value is).
    """

    request: str
    parse: Callable[[list[bytes]], ReadResult]


GROUP_SEPARATOR = "\x1d"  # between the two parts of a route record's reply


def read_plan(request: ReadRequest, layout: Layout, as_of_ms: int,
              with_logs: bool | None = None) -> ReadPlan:
    """The read answering ``request`` as of ``as_of_ms`` (history replies are subtracted; the
    caller checks that ``as_of_ms`` is within the history the writers keep, which the first
    reply after the watermark gives). ``with_logs`` defaults to the layout keeping history.
    With ``request.with_progress`` the positions, arrivals, end offsets and counts come too.

    The script does the per-key work next to the data (it filters the counter blocks to the
    buckets asked for, subtracts the logs, counts presence), so the reply holds only the
    numbers the features need."""
    hist = layout.history_ms > 0 if with_logs is None else with_logs
    fs = SEPARATOR
    recs = [f"*{fs}HMGET{fs}{layout.meta}{fs}wm{fs}history_ms"]

    vids = list(dict.fromkeys(request.vehicles))
    for vid in vids:
        recs.append(f"V{fs}{layout.vehicle(vid)}{fs}{layout.vehicle_log(vid) if hist else ''}")

    bb = layout.block_buckets
    hi = request.bucket_hi
    cells = [(cell, lo) for cell, lo in request.cells.items() if lo <= hi]
    for cell, lo in cells:
        # whole blocks: the script reads only the counters that exist (most buckets of a cell
        # are empty) and keeps those of lo..hi
        blocks = fs.join(layout.cell_block(cell, b) for b in range(lo // bb, hi // bb + 1))
        recs.append(f"C{fs}{lo}{fs}{hi}{fs}{layout.cell_log(cell) if hist else ''}{fs}{blocks}")

    pcells = list(dict.fromkeys(request.presence_cells))
    m = request.presence_min_event_ms
    for cell in pcells:
        recs.append(f"P{fs}{layout.presence(cell, 'vacant')}{fs}"
                    f"{layout.presence(cell, 'occupied')}{fs}{m}")

    dlo, dhi = request.day_lo, request.day_hi
    routes = list(dict.fromkeys(request.routes)) if dlo <= dhi else []
    for key in routes:
        recs.append(f"R{fs}{layout.route(key)}{fs}{layout.route_log(key) if hist else ''}"
                    f"{fs}{dlo}{fs}{dhi}")

    progress = request.with_progress
    if progress:
        recs += [f"*{fs}HGETALL{fs}{k}" for k in (layout.positions, layout.arrivals,
                                                   layout.highwaters, layout.counts)]

    def parse(replies: list[bytes]) -> ReadResult:
        wm, kept = replies[0].split(b"\x1f")
        out = ReadResult(watermark_ms=int(wm) if wm else None)
        out.history_ms = int(kept) if kept else None
        i = 1
        for vid, raw in zip(vids, replies[i:i + len(vids)], strict=True):
            state = _parse_state(raw or None)
            if state is not None:
                out.vehicles[vid] = state
        i += len(vids)
        for (cell, _), raw in zip(cells, replies[i:i + len(cells)], strict=True):
            if raw:
                v = list(map(int, raw.split(b"\x1f")))
                out.cells[cell] = dict(zip(v[0::4], zip(v[1::4], v[2::4], v[3::4], strict=True),
                                           strict=True))
        i += len(cells)
        for cell, raw in zip(pcells, replies[i:i + len(pcells)], strict=True):
            vac, occ = raw.split(b"\x1f")
            out.presence[cell] = (int(vac), int(occ))
        i += len(pcells)
        for key, raw in zip(routes, replies[i:i + len(routes)], strict=True):
            sums, _, log = raw.partition(b"\x1d")
            vals = list(map(int, sums.split(b"\x1f"))) if sums else []
            n = sum(vals[0::3])
            s1 = sum(vals[1::3])
            s2 = sum(vals[2::3])
            if log:
                items = log.split(b"\x1f")
                for day, dur in zip(items[0::2], items[1::2], strict=True):
                    if dlo <= int(day) <= dhi:
                        d = int(dur)
                        n -= 1
                        s1 -= d
                        s2 -= d * d
            if n:
                out.routes[key] = (n, s1, s2)
        i += len(routes)
        if progress:
            nxt, arr, hw, counts = (_pairs(r) for r in replies[i:i + 4])
            out.positions = parse_positions(nxt, arr)
            out.highwaters = {k: int(v) for k, v in hw.items()}
            out.counts = {k: int(v) for k, v in counts.items()}
        return out

    return ReadPlan(RECORD_SEPARATOR.join(recs), parse)


def _pairs(raw: bytes) -> dict[str, bytes]:
    """A packed HGETALL reply as {field: value}."""
    if not raw:
        return {}
    items = raw.split(b"\x1f")
    return dict(zip((k.decode() for k in items[0::2]), items[1::2], strict=True))


def parse_positions(next_offsets: Mapping, arrivals: Mapping) -> dict[str, SourcePosition]:
    def s(x: bytes | str) -> str:
        return x.decode() if isinstance(x, bytes) else x

    arr = {s(k): int(v) for k, v in arrivals.items()}
    return {s(k): SourcePosition(int(v), arr.get(s(k))) for k, v in next_offsets.items()}
