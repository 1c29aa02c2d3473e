"""The replay loop: ordered rows -> engine -> as-of answers at requested moments.

Queries at time T are answered after every row with arrival <= T has been applied and
before any later row, so each answer holds exactly what was known at T.
"""

from __future__ import annotations

import gc
import heapq
import itertools
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from itertools import islice

from featurestore.config import EngineConfig
from featurestore.engine import BatchResult, Engine, TripEvent
from featurestore.lookup import Lookup, RouteQuery
from featurestore.memory_store import MemoryStore
from featurestore.schema import Rejection
from featurestore.store import StateStore
from replay.readers import Item


@dataclass(order=True)
class Query:
    """A request for vectors as of ``as_of_ms``; ``answer`` receives (vehicles, cells, routes)."""

    as_of_ms: int
    seq: int
    vehicles: list[str] = field(compare=False, default_factory=list)
    cells: list[str] = field(compare=False, default_factory=list)
    routes: list[RouteQuery] = field(compare=False, default_factory=list)
    answer: Callable[[list, list, list], None] | None = field(compare=False, default=None)


DeadLetterSink = Callable[[Item, Rejection], None]

FULL_COLLECTION_EVERY = 1000  # younger collections per full one while replaying (CPython: 10)


@contextmanager
def fewer_full_collections() -> Iterator[None]:
    """Run full (oldest-generation) garbage collections 100x less often, then restore.

    Replay keeps a few hundred thousand rows alive in its ordering buffer and batches, and
    every full collection walks all of them: at CPython's default that is ~35 full
    collections per million fixes, a tenth of replay's time. Replay's objects form no
    reference cycles (reference counting frees them), so fewer full passes free the same
    memory; the youngest generations are collected as usual.
    """
    old = gc.get_threshold()
    gc.set_threshold(old[0], old[1], max(old[2], FULL_COLLECTION_EVERY))
    try:
        yield
    finally:
        gc.set_threshold(*old)


class ReplaySession:
    """Drives the shared engine over recorded rows and answers point-in-time queries."""

    def __init__(self, config: EngineConfig | None = None, store: StateStore | None = None,
                 batch_rows: int = 2048) -> None:
        self.config = config or EngineConfig()
        self.store = store if store is not None else MemoryStore()
        self.engine = Engine(self.store, self.config)
        self.lookup = Lookup(self.store, self.config)
        self.batch_rows = batch_rows
        self._queries: list[Query] = []
        self._seq = itertools.count()
        self.on_batch: Callable[[BatchResult], None] | None = None
        self.on_trip_event: Callable[[TripEvent], Query | None] | None = None
        self.wants_event: Callable[[TripEvent], bool] | None = None
        self.dead_letters: DeadLetterSink | None = None
        self.rows = 0

    def ask(self, as_of_ms: int, vehicles: Iterable[str] = (), cells: Iterable[str] = (),
            routes: Iterable[RouteQuery] = (),
            answer: Callable[[list, list, list], None] | None = None) -> None:
        """Schedule a query; it is answered once the stream passes ``as_of_ms``."""
        heapq.heappush(self._queries, Query(as_of_ms, next(self._seq), list(vehicles),
                                            list(cells), list(routes), answer))

    def _answer_until(self, arrival_ms: int | None) -> None:
        q = self._queries
        while q and (arrival_ms is None or q[0].as_of_ms < arrival_ms):
            query = heapq.heappop(q)
            v, c, r = self.lookup.vectors(query.as_of_ms, query.vehicles, query.cells,
                                          query.routes)
            if query.answer is not None:
                query.answer(v, c, r)

    def _apply(self, batch: list[Item]) -> None:
        values = [it.value for it in batch]
        raws = {i: it.raw for i, it in enumerate(batch) if it.raw is not None}
        start = 0
        while start < len(batch):
            result = self.engine.process(values, raws=raws, until=self.wants_event, start=start)
            for idx, rej in result.rejected:
                if self.dead_letters is not None:
                    self.dead_letters(batch[idx], rej)
            if self.on_trip_event is not None:
                for ev in result.trip_events:
                    self.on_trip_event(ev)
            if self.on_batch is not None:
                self.on_batch(result)
            start += result.consumed
            nxt = next((it.arrival_ms for it in islice(batch, start, None)
                        if it.arrival_ms is not None), None)
            if nxt is not None:
                # Stopped at a trip milestone: answer queries due before the next arrival.
                self._answer_until(nxt)

    def run(self, items: Iterable[Item], progress: Callable[[int], None] | None = None) -> None:
        """Feed ordered rows through the engine, answering queries as time passes them."""
        with fewer_full_collections():
            self._run(items, progress)

    def _run(self, items: Iterable[Item], progress: Callable[[int], None] | None) -> None:
        batch: list[Item] = []
        for item in items:
            a = item.arrival_ms
            if a is not None and self._queries and self._queries[0].as_of_ms < a:
                self._apply(batch)
                if progress is not None and batch:
                    progress(len(batch))
                batch = []
                self._answer_until(a)
            batch.append(item)
            if len(batch) >= self.batch_rows:
                self._apply(batch)
                if progress is not None:
                    progress(len(batch))
                batch = []
        self._apply(batch)
        if progress is not None and batch:
            progress(len(batch))
        self._answer_until(None)
