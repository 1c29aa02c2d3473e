"""The Python client of the live path: vectors for vehicles, cells and routes as of now or an
earlier moment, with the catalog version, ``known_at`` and per-family staleness.

One batched store read for any number of keys (one atomic round trip on Redis); asking
for ``as_of="latest"`` (the moment the consumers have processed up to) adds one round trip.
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Literal

from featurestore.catalog import Catalog
from featurestore.cells import is_cell
from featurestore.config import EngineConfig
from featurestore.lookup import Lookup, RouteQuery
from featurestore.progress import known_at
from featurestore.schema import _ID_RE
from featurestore.store import ReadRequest, StateStore

AsOf = int | Literal["latest"] | None
MAX_KEYS = 1000


class BadRequest(ValueError):
    """A lookup that cannot be answered as asked (bad key, too many keys, bad time)."""


@dataclass
class VectorResponse:
    """Vectors for the requested keys, in request order, and what they are based on.

    ``known_at_ms``: every message that arrived by then has been applied. ``staleness_s``:
    per family, seconds from the newest data behind its values to ``as_of_ms`` (cell and
    route: ``as_of - known_at``; vehicle and trip: ``as_of`` minus the latest arrival among
    the requested vehicles); None when not defined, 0 when the data is complete for as_of.
    """

    catalog_version: str
    as_of_ms: int
    known_at_ms: int | None
    staleness_s: dict[str, float | None]
    vehicles: list[dict[str, object]] = field(default_factory=list)
    cells: list[dict[str, object]] = field(default_factory=list)
    routes: list[dict[str, object]] = field(default_factory=list)


class FeatureClient:
    """Point-in-time vectors from a live store (Redis) or any StateStore."""

    def __init__(self, store: StateStore, config: EngineConfig | None = None,
                 clock: callable = time.time) -> None:  # type: ignore[valid-type]
        self.store = store
        self.config = config or EngineConfig()
        self.catalog = Catalog(self.config)
        self.lookup = Lookup(store, self.config)
        self._clock = clock

    def known_at_ms(self) -> int | None:
        """The arrival time up to which the consumers have applied every message."""
        raw = self.store.read(ReadRequest(with_progress=True, as_of_ms=2**62))
        return known_at(raw.watermark_ms, raw.positions or {}, raw.highwaters or {})

    def vectors(self, vehicles: Sequence[str] = (), cells: Sequence[str] = (),
                routes: Sequence[RouteQuery | tuple] = (), as_of: AsOf = None
                ) -> VectorResponse:
        """Vectors as of ``as_of`` (epoch ms; None = now by the wall clock; "latest" =
        ``known_at``). Raises BadRequest for invalid keys and AsOfError for a moment the
        store can no longer answer."""
        rq = [r if isinstance(r, RouteQuery) else RouteQuery(*r) for r in routes]
        rq = [RouteQuery(r.origin_cell.lower(), r.dest_cell.lower(), r.hour)
              if isinstance(r.origin_cell, str) and isinstance(r.dest_cell, str) else r
              for r in rq]
        self._check(vehicles, cells, rq)
        if as_of == "latest":
            t = self.known_at_ms()
            if t is None:
                raise BadRequest("nothing has been applied yet: there is no latest moment")
        elif as_of is None:
            t = int(self._clock() * 1000)
        elif isinstance(as_of, int) and not isinstance(as_of, bool):
            t = as_of
        else:
            raise BadRequest(f"as_of must be epoch milliseconds, 'latest' or None, not {as_of!r}")
        v, c, r, raw = self.lookup.read_vectors(t, vehicles, [x.lower() for x in cells], rq,
                                                with_progress=True)
        known = known_at(raw.watermark_ms, raw.positions or {}, raw.highwaters or {})
        return VectorResponse(
            catalog_version=self.catalog.version,
            as_of_ms=t,
            known_at_ms=known,
            staleness_s=self._staleness(t, known, raw.vehicles.values()),
            vehicles=[{"vehicle_id": k, **x} for k, x in zip(vehicles, v, strict=True)],
            cells=[{"cell": k.lower(), **x} for k, x in zip(cells, c, strict=True)],
            routes=[{"origin_cell": q.origin_cell, "dest_cell": q.dest_cell,
                     "hour": x.pop("_hour"), **x} for q, x in zip(rq, r, strict=True)],
        )

    def vehicle(self, vehicle_id: str, as_of: AsOf = None) -> dict[str, object]:
        return self.vectors(vehicles=[vehicle_id], as_of=as_of).vehicles[0]

    def cell(self, cell: str, as_of: AsOf = None) -> dict[str, object]:
        return self.vectors(cells=[cell], as_of=as_of).cells[0]

    def route(self, origin_cell: str, dest_cell: str, hour: int | None = None,
              as_of: AsOf = None) -> dict[str, object]:
        return self.vectors(routes=[RouteQuery(origin_cell, dest_cell, hour)], as_of=as_of
                            ).routes[0]

    # --- helpers -------------------------------------------------------------------------
    def _check(self, vehicles: Sequence[str], cells: Sequence[str],
               routes: Sequence[RouteQuery]) -> None:
        n = len(vehicles) + len(cells) + len(routes)
        if n > MAX_KEYS:
            raise BadRequest(f"{n} keys in one request; at most {MAX_KEYS}")
        cfg = self.config
        for v in vehicles:
            if not isinstance(v, str) or not _ID_RE.match(v):
                raise BadRequest(f"vehicle_id {v!r} is not 1-64 of A-Z a-z 0-9 _ . : -")
        for c in cells:
            if not isinstance(c, str) or not is_cell(c.lower(), cfg.cell_resolution):
                raise BadRequest(f"cell {c!r} is not an H3 cell of resolution "
                                 f"{cfg.cell_resolution}")
        for q in routes:
            for name, c in (("origin_cell", q.origin_cell), ("dest_cell", q.dest_cell)):
                if not isinstance(c, str) or not is_cell(c.lower(), cfg.route_resolution):
                    raise BadRequest(f"{name} {c!r} is not an H3 cell of resolution "
                                     f"{cfg.route_resolution}")
            if q.hour is not None and (isinstance(q.hour, bool) or q.hour not in range(24)):
                raise BadRequest(f"hour {q.hour!r} is not 0..23")

    @staticmethod
    def _staleness(t: int, known: int | None, states: object) -> dict[str, float | None]:
        pipeline = None if known is None else max(0, t - known) / 1000.0
        seen = [s.seen_ms for s in states]  # type: ignore[attr-defined]
        veh = max(0, t - max(seen)) / 1000.0 if seen else None
        return {"cell": pipeline, "vehicle": veh, "trip": veh, "route": pipeline}
