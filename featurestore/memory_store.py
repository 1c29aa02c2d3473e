"""The in-memory state store: dictionaries, used by replay, the demo and unit tests."""

from __future__ import annotations

from collections import Counter, deque
from collections.abc import Callable, Collection, Mapping
from typing import Any

from featurestore.state import VehicleState
from featurestore.store import (
    AsOfError,
    CellLogEntry,
    Delta,
    ReadRequest,
    ReadResult,
    Retention,
    RouteLogEntry,
    SourcePosition,
    VehicleLogEntry,
    check_spans,
    merge_position,
)

_PRUNE_EVERY = 256


def _drop_old(groups: dict, too_old: Callable[[Any, Any], bool]) -> None:
    """In a dict of dicts, delete inner entries for which ``too_old(key, value)``, then empty
    groups."""
    for g in list(groups):
        inner = groups[g]
        for k in [k for k, v in inner.items() if too_old(k, v)]:
            del inner[k]
        if not inner:
            del groups[g]


class MemoryStore:
    """A StateStore in process memory. Memory is bounded by the retention horizons.

    With ``history_ms > 0`` it also keeps the arrival-tagged change logs of that long
    before its watermark and answers reads as of any moment in that span exactly.
    """

    def __init__(self, history_ms: int = 0) -> None:
        self.history_ms = int(history_ms)
        self._cell_log: deque[CellLogEntry] = deque()
        self._route_log: deque[RouteLogEntry] = deque()
        self._vehicle_log: deque[VehicleLogEntry] = deque()
        self._vehicles: dict[str, VehicleState] = {}
        self._cells: dict[str, dict[int, list[int]]] = {}
        self._routes: dict[tuple[str, str, int], dict[int, list[int]]] = {}
        self._presence: dict[tuple[str, str], dict[str, int]] = {}
        self._positions: dict[str, SourcePosition] = {}
        self._highwaters: dict[str, int] = {}
        self._counts: Counter[str] = Counter()
        self._watermark: int | None = None
        self._applies = 0

    # --- writes ------------------------------------------------------------------------
    def load_vehicles(self, vehicle_ids: Collection[str]) -> dict[str, VehicleState]:
        got = self._vehicles
        return {v: got[v] for v in vehicle_ids if v in got}

    def apply(self, delta: Delta) -> None:
        check_spans(self._positions, delta.spans)
        self._vehicles.update(delta.vehicles)
        cells = self._cells
        for (cell, bucket), inc in delta.cells.items():
            buckets = cells.get(cell)
            if buckets is None:
                buckets = cells[cell] = {}
            row = buckets.get(bucket)
            if row is None:
                buckets[bucket] = list(inc)  # a new list: the delta's stays the delta's
            else:
                row[0] += inc[0]
                row[1] += inc[1]
                row[2] += inc[2]
        for (o, d, h, day), inc in delta.routes.items():
            row = self._routes.setdefault((o, d, h), {}).setdefault(day, [0, 0, 0])
            row[0] += inc[0]
            row[1] += inc[1]
            row[2] += inc[2]
        presence = self._presence
        for vid, move in delta.presence.items():
            if move.old_cell is not None:
                old = presence.get((move.old_cell, move.old_status or ""))
                if old is not None:
                    old.pop(vid, None)
            key = (move.cell, move.status)
            at = presence.get(key)
            if at is None:
                at = presence[key] = {}
            at[vid] = move.event_ms
        for part, span in delta.spans.items():
            self._positions[part] = merge_position(self._positions.get(part), span)
        self._counts.update(delta.counts)
        if delta.watermark_ms is not None:
            self._watermark = max(self._watermark or delta.watermark_ms, delta.watermark_ms)
        if self.history_ms:
            self._cell_log.extend(delta.cell_log)
            self._route_log.extend(delta.route_log)
            self._vehicle_log.extend(delta.vehicle_log)
            if self._watermark is not None:
                self._trim_logs(self._watermark - self.history_ms)
        self._applies += 1
        if delta.retention is not None and self._applies % _PRUNE_EVERY == 0:
            self.prune(delta.retention)

    def prune(self, keep: Retention) -> None:
        """Forget entries older than the retention horizons."""
        _drop_old(self._cells, lambda b, _v: b < keep.bucket_min)
        _drop_old(self._routes, lambda day, _v: day < keep.route_day_min)
        _drop_old(self._presence, lambda _v, ev: ev < keep.presence_min_event_ms)
        for v in [v for v, s in self._vehicles.items() if s.seen_ms < keep.vehicle_min_seen_ms]:
            del self._vehicles[v]

    def _trim_logs(self, keep_from_ms: int) -> None:
        # Entries arrive in nondecreasing arrival order per source; trim from the left.
        for log in (self._cell_log, self._route_log, self._vehicle_log):
            while log and log[0][0] < keep_from_ms:
                log.popleft()

    # --- reads -------------------------------------------------------------------------
    def read(self, request: ReadRequest) -> ReadResult:
        t = request.as_of_ms
        wm = self._watermark
        if t is None or wm is None or t >= wm:
            out = self._read_now(request)
        elif not self.history_ms or t < wm - self.history_ms:
            raise AsOfError(
                f"as of {t} ms is before what this store can answer: its watermark is {wm} ms "
                f"and it keeps {self.history_ms} ms of history"
            )
        else:
            out = self._read_past(request, t)
        if request.with_progress:
            out.positions = dict(self._positions)
            out.highwaters = dict(self._highwaters)
            out.counts = dict(self._counts)
        return out

    def _read_past(self, request: ReadRequest, t: int) -> ReadResult:
        """Current values minus every change that arrived after ``t``."""
        out = self._read_now(request)
        cells = request.cells
        hi = request.bucket_hi
        for arr, cell, bucket, f, p, d in self._cell_log:
            if arr > t and cell in cells and cells[cell] <= bucket <= hi:
                row = out.cells[cell]
                a, b, c = row[bucket]
                row[bucket] = (a - f, b - p, c - d)
        routes = set(request.routes)
        for arr, o, dd, h, day, dur in self._route_log:
            key = (o, dd, h)
            if arr > t and key in routes and request.day_lo <= day <= request.day_hi:
                n, s1, s2 = out.routes[key]
                if n == 1:
                    del out.routes[key]
                else:
                    out.routes[key] = (n - 1, s1 - dur, s2 - dur * dur)
        before: dict[str, VehicleState | None] = {}
        for arr, vid, prev in self._vehicle_log:
            if arr > t and vid not in before:
                before[vid] = prev
        for vid in request.vehicles:
            if vid in before:
                prev = before[vid]
                if prev is None:
                    out.vehicles.pop(vid, None)
                else:
                    out.vehicles[vid] = prev
        if request.presence_cells:
            pcells = set(request.presence_cells)
            m = request.presence_min_event_ms
            counts = {c: list(v) for c, v in out.presence.items()}
            for vid, prev in before.items():
                now = self._vehicles.get(vid)
                for st, sign in ((now, -1), (prev, 1)):
                    if st is not None and st.cell in pcells and st.event_ms >= m:
                        col = 0 if st.status == "vacant" else 1 if st.status == "occupied" else -1
                        if col >= 0:
                            counts[st.cell][col] += sign
            out.presence = {c: (v[0], v[1]) for c, v in counts.items()}
        out.watermark_ms = t
        return out

    def _read_now(self, request: ReadRequest) -> ReadResult:
        out = ReadResult(watermark_ms=self._watermark)
        out.vehicles = self.load_vehicles(request.vehicles)
        hi = request.bucket_hi
        for cell, lo in request.cells.items():
            buckets = self._cells.get(cell)
            if buckets:
                if hi - lo < len(buckets):
                    got = {b: buckets.get(b) for b in range(lo, hi + 1)}
                    out.cells[cell] = {b: tuple(v) for b, v in got.items() if v is not None}
                else:
                    out.cells[cell] = {b: tuple(v) for b, v in buckets.items() if lo <= b <= hi}
        m = request.presence_min_event_ms
        for cell in request.presence_cells:
            vac = self._presence.get((cell, "vacant"), {})
            occ = self._presence.get((cell, "occupied"), {})
            out.presence[cell] = (
                sum(1 for e in vac.values() if e >= m),
                sum(1 for e in occ.values() if e >= m),
            )
        dlo, dhi = request.day_lo, request.day_hi
        for key in request.routes:
            days = self._routes.get(key)
            if days:
                n = s1 = s2 = 0
                for day, (a, b, c) in days.items():
                    if dlo <= day <= dhi:
                        n += a
                        s1 += b
                        s2 += c
                if n:
                    out.routes[key] = (n, s1, s2)
        return out

    def watermark_ms(self) -> int | None:
        return self._watermark

    def offsets(self) -> Mapping[str, int]:
        return {p: pos.next_offset for p, pos in self._positions.items()}

    def positions(self) -> Mapping[str, SourcePosition]:
        return dict(self._positions)

    def set_highwaters(self, ends: Mapping[str, int]) -> None:
        for part, end in ends.items():  # never lowered, as in every store
            self._highwaters[part] = max(end, self._highwaters.get(part, end))

    def highwaters(self) -> dict[str, int]:
        return dict(self._highwaters)

    def counters(self) -> dict[str, int]:
        return dict(self._counts)

    # --- introspection (reports, tests) ------------------------------------------------
    def sizes(self) -> dict[str, int]:
        return {
            "vehicles": len(self._vehicles),
            "cell_buckets": sum(len(b) for b in self._cells.values()),
            "route_days": sum(len(d) for d in self._routes.values()),
            "presence": sum(len(m) for m in self._presence.values()),
        }

    def dump(self) -> dict[str, object]:
        """A canonical, comparable picture of everything held (tests and parity checks)."""
        return {
            "vehicles": {v: s.to_dict() for v, s in sorted(self._vehicles.items())},
            "cells": {c: {b: list(v) for b, v in sorted(bs.items())}
                      for c, bs in sorted(self._cells.items()) if bs},
            "routes": {"|".join(map(str, k)): {d: list(v) for d, v in sorted(ds.items())}
                       for k, ds in sorted(self._routes.items()) if ds},
            "presence": {f"{c}|{s}": dict(sorted(m.items()))
                         for (c, s), m in sorted(self._presence.items()) if m},
        }
