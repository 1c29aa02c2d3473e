"""The in-memory state store: dictionaries, used by replay, the demo and unit tests."""

from __future__ import annotations

from collections.abc import Collection, Mapping

from featurestore.state import VehicleState
from featurestore.store import Delta, ReadRequest, ReadResult, Retention

_PRUNE_EVERY = 256


class MemoryStore:
    """A StateStore in process memory. Memory is bounded by the retention horizons."""

    def __init__(self) -> None:
        self._vehicles: dict[str, VehicleState] = {}
        self._cells: dict[str, dict[int, list[int]]] = {}
        self._routes: dict[tuple[str, str, int], dict[int, list[int]]] = {}
        self._presence: dict[tuple[str, str], dict[str, int]] = {}
        self._offsets: dict[str, int] = {}
        self._watermark: int | None = None
        self._applies = 0

    # --- writes ------------------------------------------------------------------------
    def load_vehicles(self, vehicle_ids: Collection[str]) -> dict[str, VehicleState]:
        got = self._vehicles
        return {v: got[v] for v in vehicle_ids if v in got}

    def apply(self, delta: Delta) -> None:
        self._vehicles.update(delta.vehicles)
        for (cell, bucket), inc in delta.cells.items():
            row = self._cells.setdefault(cell, {}).setdefault(bucket, [0, 0, 0])
            row[0] += inc[0]
            row[1] += inc[1]
            row[2] += inc[2]
        for (o, d, h, day), inc in delta.routes.items():
            row = self._routes.setdefault((o, d, h), {}).setdefault(day, [0, 0, 0])
            row[0] += inc[0]
            row[1] += inc[1]
            row[2] += inc[2]
        for vid, move in delta.presence.items():
            if move.old_cell is not None:
                old = self._presence.get((move.old_cell, move.old_status or ""))
                if old is not None:
                    old.pop(vid, None)
            self._presence.setdefault((move.cell, move.status), {})[vid] = move.event_ms
        self._offsets.update(delta.offsets)
        if delta.watermark_ms is not None:
            self._watermark = max(self._watermark or delta.watermark_ms, delta.watermark_ms)
        self._applies += 1
        if delta.retention is not None and self._applies % _PRUNE_EVERY == 0:
            self.prune(delta.retention)

    def prune(self, keep: Retention) -> None:
        """Forget entries older than the retention horizons."""
        for cell in list(self._cells):
            buckets = self._cells[cell]
            for b in [b for b in buckets if b < keep.bucket_min]:
                del buckets[b]
            if not buckets:
                del self._cells[cell]
        for key in list(self._routes):
            days = self._routes[key]
            for d in [d for d in days if d < keep.route_day_min]:
                del days[d]
            if not days:
                del self._routes[key]
        for key in list(self._presence):
            members = self._presence[key]
            for v in [v for v, e in members.items() if e < keep.presence_min_event_ms]:
                del members[v]
            if not members:
                del self._presence[key]
        for v in [v for v, s in self._vehicles.items() if s.seen_ms < keep.vehicle_min_seen_ms]:
            del self._vehicles[v]

    # --- reads -------------------------------------------------------------------------
    def read(self, request: ReadRequest) -> ReadResult:
        out = ReadResult(watermark_ms=self._watermark)
        out.vehicles = self.load_vehicles(request.vehicles)
        lo, hi = request.bucket_lo, request.bucket_hi
        for cell in request.cells:
            buckets = self._cells.get(cell)
            if buckets:
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
        return dict(self._offsets)

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
