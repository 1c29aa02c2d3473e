"""As-of lookups: build one batched store read for many keys, then compute vectors.

A lookup "as of T" answers with what was known at T. A store answers for T at or after its
watermark, and for earlier T within the history it keeps (``history_ms``); earlier than that
it raises AsOfError.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from featurestore.catalog import Catalog
from featurestore.cells import ring_of
from featurestore.config import EngineConfig
from featurestore.features import (
    bucket_range,
    cell_vector,
    day_range,
    presence_min_event_ms,
    route_vector,
    vehicle_vector,
)
from featurestore.store import AsOfError, ReadRequest, ReadResult, StateStore
from featurestore.transitions import local_hour


@dataclass(frozen=True, slots=True)
class RouteQuery:
    origin_cell: str
    dest_cell: str
    hour: int | None = None  # pickup hour of day; None = the hour of T in the city's zone


__all__ = ["AsOfError", "Lookup", "RouteQuery"]


class Lookup:
    """Point-in-time reads of vectors from any StateStore."""

    def __init__(self, store: StateStore, config: EngineConfig | None = None) -> None:
        self.store = store
        self.config = config or EngineConfig()
        self.catalog = Catalog(self.config)

    def vectors(
        self,
        as_of_ms: int,
        vehicles: Sequence[str] = (),
        cells: Sequence[str] = (),
        routes: Sequence[RouteQuery] = (),
    ) -> tuple[list[dict[str, object]], list[dict[str, object]], list[dict[str, object]]]:
        """Vectors for vehicles (vehicle+trip), cells and routes as of T, from one store read."""
        v, c, r, _ = self.read_vectors(as_of_ms, vehicles, cells, routes)
        for x in r:
            del x["_hour"]
        return v, c, r

    def read_vectors(
        self,
        as_of_ms: int,
        vehicles: Sequence[str] = (),
        cells: Sequence[str] = (),
        routes: Sequence[RouteQuery] = (),
        with_progress: bool = False,
    ) -> tuple[list[dict[str, object]], list[dict[str, object]], list[dict[str, object]],
               ReadResult]:
        """As ``vectors``, plus the raw read; route vectors carry the hour used as ``_hour``."""
        cfg = self.config
        ring_cells = sorted({c for cell in cells for c in ring_of(cell)})
        lo, hi = bucket_range(as_of_ms, cfg)
        ring_lo = hi - cfg.window_buckets(cfg.ring_window_min) + 1
        wanted = dict.fromkeys(ring_cells, ring_lo)  # neighbours: the ring window only
        wanted.update(dict.fromkeys(cells, lo))  # the cells themselves: the longest window
        dlo, dhi = day_range(as_of_ms, cfg)
        keys = [
            (r.origin_cell, r.dest_cell,
             r.hour if r.hour is not None else local_hour(as_of_ms, cfg.city_tz))
            for r in routes
        ]
        raw = self.store.read(ReadRequest(
            vehicles=list(dict.fromkeys(vehicles)), cells=wanted, bucket_hi=hi,
            presence_cells=ring_cells, presence_min_event_ms=presence_min_event_ms(as_of_ms, cfg),
            routes=list(dict.fromkeys(keys)), day_lo=dlo, day_hi=dhi, as_of_ms=as_of_ms,
            with_progress=with_progress,
        ))
        ring_memo: dict[str, int] = {}  # a neighbour's ring pickups, summed once per read
        return (
            [vehicle_vector(raw.vehicles.get(v), as_of_ms, cfg) for v in vehicles],
            [cell_vector(c, as_of_ms, raw, cfg, ring_memo) for c in cells],
            [{**route_vector(k, raw), "_hour": k[2]} for k in keys],
            raw,
        )

    def vehicle(self, vehicle_id: str, as_of_ms: int) -> dict[str, object]:
        return self.vectors(as_of_ms, vehicles=[vehicle_id])[0][0]

    def cell(self, cell: str, as_of_ms: int) -> dict[str, object]:
        return self.vectors(as_of_ms, cells=[cell])[1][0]

    def route(self, origin_cell: str, dest_cell: str, as_of_ms: int,
              hour: int | None = None) -> dict[str, object]:
        return self.vectors(as_of_ms, routes=[RouteQuery(origin_cell, dest_cell, hour)])[2][0]
