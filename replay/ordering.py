"""Arrival order for replay: a bounded-memory external sort of decoded rows.

Rows are ordered by (arrival time, input index, row number): arrival order, ties in file
order. Sorted runs of at most ``run_rows`` rows are spilled to a temporary directory and
merged, so memory does not grow with input length. Rows without a usable arrival time are
passed through first (they are rejections and change no state).
"""

from __future__ import annotations

import heapq
import pickle
import tempfile
from collections.abc import Iterable, Iterator
from pathlib import Path

from replay.readers import Item

_BLOCK = 4096


def _key(item: Item) -> tuple[int, int, int]:
    return (item.arrival_ms or 0, item.source, item.row)


def _spill(run: list[Item], directory: Path, n: int) -> Path:
    path = directory / f"run-{n:05d}.pkl"
    with open(path, "wb") as fh:
        for i in range(0, len(run), _BLOCK):
            pickle.dump(run[i:i + _BLOCK], fh, protocol=pickle.HIGHEST_PROTOCOL)
    return path


def _read_run(path: Path) -> Iterator[Item]:
    with open(path, "rb") as fh:
        while True:
            try:
                block = pickle.load(fh)
            except EOFError:
                return
            yield from block


class OrderError(ValueError):
    """Inputs were streamed as sorted, then a row arrived earlier than rows already replayed."""


def arrival_order(items: Iterable[Item], run_rows: int = 50_000, force_sort: bool = False,
                  temp_dir: str | Path | None = None) -> Iterator[Item]:
    """Yield ``items`` in (arrival, source, row) order with memory bounded by ``run_rows``.

    While the input is in order, full runs stream straight through. Once disorder appears,
    runs are sorted and spilled; a row earlier than one already yielded raises OrderError
    (``force_sort`` spills from the start and never raises).
    """
    run: list[Item] = []
    runs: list[Path] = []
    streaming = not force_sort
    # Keys are compared by arrival first; the whole (arrival, source, row) key is built only
    # on a tie (most rows differ in arrival), which orders exactly as comparing the keys.
    yielded_max: Item | None = None  # the last row of the runs streamed so far
    ym_arrival = 0
    last: Item | None = None
    last_arrival = 0
    with tempfile.TemporaryDirectory(prefix="cellpulse-sort-", dir=temp_dir) as tmp:
        for item in items:
            a = item.value.arrival_ms
            if a is None:
                yield item
                continue
            if yielded_max is not None and (
                    a < ym_arrival or (a == ym_arrival and _key(item) < _key(yielded_max))):
                raise OrderError(
                    f"input #{item.source + 1} row {item.row + 1} arrived "
                    f"({item.arrival_ms} ms) before rows already replayed; the inputs are not "
                    "in arrival order: pass --sort to sort them first"
                )
            if last is not None and (
                    a < last_arrival or (a == last_arrival and _key(item) < _key(last))):
                streaming = False
            last = item
            last_arrival = a
            run.append(item)
            if len(run) >= run_rows:
                if streaming:
                    yield from run
                    yielded_max = item
                    ym_arrival = a
                else:
                    run.sort(key=_key)
                    runs.append(_spill(run, Path(tmp), len(runs)))
                run = []
        run.sort(key=_key)
        if not runs:
            yield from run
            return
        streams = [_read_run(p) for p in runs]
        streams.append(iter(run))
        yield from heapq.merge(*streams, key=_key)


def merge_inputs(streams: list[Iterator[Item]], starts: list[int | None] | None = None
                 ) -> Iterator[Item]:
    """Merge per-input ordered streams into one (arrival, source, row) order.

    Rows without an arrival time (rejections, which change no state) carry the smallest key
    and come out as soon as they head their stream. ``starts`` may give, per stream, a lower
    bound of its arrival times (None: unknown); such a stream is opened only once the merge
    reaches that time, so a tape of many files holds few of them open at once.
    """
    if len(streams) == 1:
        yield from streams[0]
        return
    if starts is None or all(s is None for s in starts):
        yield from heapq.merge(*streams, key=_key)
        return
    yield from _lazy_merge(streams, starts)


def _lazy_merge(streams: list[Iterator[Item]], starts: list[int | None]) -> Iterator[Item]:
    heap: list[tuple[tuple[int, int, int], int, Item]] = []
    pending = sorted((s, i) for i, s in enumerate(starts) if s is not None)
    pending.reverse()  # popped from the end, earliest first

    def advance(i: int) -> None:
        item = next(streams[i], None)
        if item is not None:
            heapq.heappush(heap, (_key(item), i, item))

    for i, s in enumerate(starts):
        if s is None:
            advance(i)
    while heap or pending:
        # A pending stream's rows all arrive at or after its start: open it before anything
        # arriving at that time comes out.
        while pending and (not heap or pending[-1][0] <= heap[0][0][0]):
            advance(pending.pop()[1])
        if not heap:
            continue
        if len(heap) == 1:  # one stream open: run it until the next pending one is due
            _, i, item = heap.pop()
            yield item
            due = pending[-1][0] if pending else None
            for item in streams[i]:
                k = _key(item)
                if due is not None and k[0] >= due:
                    heapq.heappush(heap, (k, i, item))
                    break
                yield item
            continue
        _, i, item = heapq.heappop(heap)
        yield item
        advance(i)
