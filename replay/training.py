"""Training sets from recorded fixes: label rows joined as of their time, or one row per trip.

One pass over the inputs in arrival order; memory holds the live state, the open trips and
(in label mode) the label table itself, never the fixes.
"""

from __future__ import annotations

import math
import time
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.json as pajson
import pyarrow.parquet as pq

from featurestore.catalog import Catalog
from featurestore.cells import is_cell
from featurestore.config import EngineConfig
from featurestore.engine import TripEvent
from featurestore.lookup import RouteQuery
from featurestore.schema import Rejection, to_epoch_ms
from featurestore.transitions import CompletedTrip
from replay.ordering import arrival_order, merge_inputs
from replay.output import DEAD_LETTER_SCHEMA, TS_TYPE, TableWriter, feature_fields
from replay.readers import (
    InputError,
    Item,
    count_rows,
    detect_format,
    earliest_arrival_ms,
    expand_inputs,
    iter_file,
)
from replay.session import ReplaySession

LABEL_KEYS = ("vehicle_id", "cell", "origin_cell", "dest_cell")


@dataclass
class ReplaySummary:
    """What a replay did, for the report and the command line."""

    rows: int = 0
    stats: dict[str, Any] = field(default_factory=dict)
    training_rows: int = 0
    skipped: Counter = field(default_factory=Counter)
    seconds: float = 0.0
    out: str | None = None
    dead_letters: str | None = None

    @property
    def fixes_per_s(self) -> float:
        return self.rows / self.seconds if self.seconds > 0 else math.nan

    def as_dict(self) -> dict[str, Any]:
        return {
            "rows": self.rows, "engine": self.stats, "training_rows": self.training_rows,
            "skipped": dict(self.skipped), "seconds": round(self.seconds, 3),
            "rows_per_s": round(self.fixes_per_s, 1), "out": self.out,
            "dead_letters": self.dead_letters,
        }


class DeadLetterFile:
    """Collects rejections of a replay into a Parquet file (raw bytes kept exactly)."""

    def __init__(self, path: str | Path, sources: Sequence[str]) -> None:
        self.writer = TableWriter(path, DEAD_LETTER_SCHEMA, "parquet")
        self.sources = list(sources)

    def __call__(self, item: Item, rej: Rejection) -> None:
        self.writer.write({
            "reason": rej.reason, "detail": rej.detail, "source": self.sources[item.source],
            "row": item.row, "vehicle_id": rej.vehicle_id, "arrival_ts": rej.arrival_ms,
            "raw": rej.raw,
        })

    def close(self, ok: bool = True) -> None:
        if ok:
            self.writer.close()
        else:
            self.writer.abort()


def read_table(path: str | Path) -> pa.Table:
    """A whole label table from Parquet, CSV or JSON Lines."""
    fmt = detect_format(path)
    if fmt == "parquet":
        return pq.read_table(path)
    if fmt == "csv":
        return pacsv.read_csv(path, convert_options=pacsv.ConvertOptions(
            column_types={k: pa.string() for k in LABEL_KEYS}))
    return pajson.read_json(path)


def _progress(total: int | None, enabled: bool) -> Any:
    from tqdm import tqdm

    return tqdm(total=total, unit="fix", unit_scale=True, disable=not enabled, leave=False,
                desc="replay", mininterval=0.5)


def _ordered_items(inputs: Sequence[str | Path], assume_delay_s: float | None, sort: bool
                   ) -> Any:
    """Each input in arrival order, then merged across inputs (ties: input order, row).
    Parquet inputs whose statistics bound their arrivals are opened only when due."""
    streams = [arrival_order(iter_file(p, i, assume_delay_s), force_sort=sort)
               for i, p in enumerate(inputs)]
    starts = ([earliest_arrival_ms(p) for p in inputs]
              if assume_delay_s is None and len(inputs) > 1 else None)
    return merge_inputs(streams, starts)


def _start(inputs: Sequence[str | Path], config: EngineConfig, dead_letters: str | Path | None
           ) -> tuple[ReplaySession, DeadLetterFile | None]:
    for p in inputs:
        detect_format(p)
        if not Path(p).exists():
            raise InputError(f"{p}: no such file")
    session = ReplaySession(config)
    dlf = DeadLetterFile(dead_letters, [str(p) for p in inputs]) if dead_letters else None
    session.dead_letters = dlf
    return session, dlf


def _run(session: ReplaySession, inputs: Sequence[str | Path], assume_delay_s: float | None,
         sort: bool, progress: bool, summary: ReplaySummary) -> None:
    totals = [count_rows(p) for p in inputs]
    total = sum(t for t in totals if t) if all(totals) else None
    bar = _progress(total, progress)
    t0 = time.perf_counter()

    def tick(n: int) -> None:
        summary.rows += n
        bar.update(n)

    try:
        session.run(_ordered_items(inputs, assume_delay_s, sort), tick)
    finally:
        bar.close()
    summary.seconds = time.perf_counter() - t0
    summary.stats = session.engine.stats.as_dict()


def _key_problem(kind: str, value: Any, res: int) -> str | None:
    if value is None:
        return None
    if kind == "vehicle_id":
        return None if isinstance(value, str) else "vehicle_id must be text"
    return None if isinstance(value, str) and is_cell(value, res) else (
        f"{kind} {value!r} is not an H3 cell of resolution {res}")


def replay_labels(inputs: Sequence[str | Path], labels: str | Path, out: str | Path, *,
                  config: EngineConfig | None = None, fmt: str = "parquet",
                  assume_delay_s: float | None = None, sort: bool = False,
                  dead_letters: str | Path | None = None, progress: bool = False
                  ) -> ReplaySummary:
    """Each label row gets, as of its ``ts``, the families its key columns name."""
    inputs = expand_inputs(inputs)  # a directory (a tape) stands for its Parquet files
    cfg = config or EngineConfig()
    catalog = Catalog(cfg)
    table = read_table(labels)
    names = table.column_names
    if "ts" not in names:
        raise InputError(f"{labels}: a label table needs a 'ts' column")
    families: list[str] = []
    if "vehicle_id" in names:
        families += ["vehicle", "trip"]
    if "cell" in names:
        families.append("cell")
    if "origin_cell" in names and "dest_cell" in names:
        families.append("route")
    if not families:
        raise InputError(f"{labels}: no key column; give vehicle_id, cell, or origin_cell and "
                         "dest_cell")
    clash = [n for n in catalog.names(*families) if n in names]
    if clash:
        raise InputError(f"{labels}: columns {', '.join(clash)} clash with feature names")
    n = table.num_rows
    cols = {k: table.column(k).to_pylist() for k in LABEL_KEYS if k in names}
    for k in ("cell", "origin_cell", "dest_cell"):  # H3 accepts upper case; state keys are lower
        if k in cols:
            cols[k] = [v.lower() if isinstance(v, str) else v for v in cols[k]]
    ts_ms: list[int] = []
    for i, v in enumerate(table.column("ts").to_pylist()):
        try:
            ts_ms.append(to_epoch_ms(v))
        except ValueError as exc:
            raise InputError(f"{labels}: row {i + 1}: ts {v!r}: {exc}") from exc
    for kind, res in (("cell", cfg.cell_resolution), ("origin_cell", cfg.route_resolution),
                      ("dest_cell", cfg.route_resolution), ("vehicle_id", 0)):
        for i, v in enumerate(cols.get(kind, ())):
            problem = _key_problem(kind, v, res)
            if problem:
                raise InputError(f"{labels}: row {i + 1}: {problem}")

    session, dlf = _start(inputs, cfg, dead_letters)
    feats = [catalog.by_name[nm] for nm in catalog.names(*families)]
    # Column-wise results, pre-filled with each feature's empty value (a key never seen).
    results: dict[str, list[object]] = {f.name: [f.empty] * n for f in feats}
    by_ts: dict[int, list[int]] = {}
    for i, t in enumerate(ts_ms):
        by_ts.setdefault(t, []).append(i)
    for t, rows in by_ts.items():
        vids = [cols["vehicle_id"][i] for i in rows] if "vehicle" in families else []
        cells = [cols["cell"][i] for i in rows] if "cell" in families else []
        routes = ([RouteQuery(cols["origin_cell"][i], cols["dest_cell"][i]) for i in rows]
                  if "route" in families else [])
        session.ask(t, [v for v in vids if v is not None], [c for c in cells if c is not None],
                    [r for r in routes if r.origin_cell is not None and r.dest_cell is not None],
                    _label_answer(rows, vids, cells, routes, results))
    summary = ReplaySummary(out=str(out), dead_letters=str(dead_letters) if dead_letters else None)
    ok = False
    try:
        _run(session, inputs, assume_delay_s, sort, progress, summary)
        ok = True
    finally:
        if dlf is not None:
            dlf.close(ok)
    schema = pa.schema(list(table.schema) + feature_fields(feats))
    out_table = table
    for f in feats:
        kind = schema.field(f.name).type
        out_table = out_table.append_column(pa.field(f.name, kind),
                                            pa.array(results.pop(f.name), kind))
    with TableWriter(out, schema, fmt) as w:
        w.write_table(out_table)
    summary.training_rows = n
    return summary


def _label_answer(rows: list[int], vids: list, cells: list, routes: list,
                  results: dict[str, list[object]]) -> Callable[[list, list, list], None]:
    """Write the answers of one query into the label rows' columns (unseen keys keep the
    empty values the columns were filled with)."""

    def put(row: int, vec: dict[str, object]) -> None:
        for name, value in vec.items():
            results[name][row] = value

    def answer(vvec: list, cvec: list, rvec: list) -> None:
        vi = iter(vvec)
        ci = iter(cvec)
        ri = iter(rvec)
        for j, row in enumerate(rows):
            if vids and vids[j] is not None:
                put(row, next(vi))
            if cells and cells[j] is not None:
                put(row, next(ci))
            if routes and routes[j].origin_cell is not None and routes[j].dest_cell is not None:
                put(row, next(ri))

    return answer


TRIP_HEAD = [
    pa.field("vehicle_id", pa.string()), pa.field("trip_id", pa.string()),
    pa.field("pickup_ts", TS_TYPE), pa.field("pickup_arrival_ts", TS_TYPE),
    pa.field("as_of_ts", TS_TYPE),
]
TRIP_LABELS = [
    pa.field("dropoff_ts", TS_TYPE), pa.field("duration_s", pa.float64()),
    pa.field("dest_cell", pa.string()), pa.field("dest_route_cell", pa.string()),
    pa.field("distance_m", pa.float64()),
]


def replay_trips(inputs: Sequence[str | Path], out: str | Path, *,
                 config: EngineConfig | None = None, fmt: str = "parquet",
                 after_fixes: int = 1, assume_delay_s: float | None = None, sort: bool = False,
                 dead_letters: str | Path | None = None, progress: bool = False,
                 on_batch: Callable[[Any], None] | None = None,
                 prepare: Callable[[ReplaySession], None] | None = None) -> ReplaySummary:
    """One row per completed trip: features as of the arrival of its ``after_fixes``-th fix
    (1 = the pickup fix), labels from its dropoff."""
    inputs = expand_inputs(inputs)  # a directory (a tape) stands for its Parquet files
    cfg = config or EngineConfig()
    if after_fixes < 1:
        raise ValueError("after_fixes must be >= 1")
    catalog = Catalog(cfg)
    feats = [catalog.by_name[n] for n in catalog.names("vehicle", "trip", "cell")]
    schema = pa.schema(TRIP_HEAD + feature_fields(feats) + TRIP_LABELS)
    session, dlf = _start(inputs, cfg, dead_letters)
    writer = TableWriter(out, schema, fmt)
    summary = ReplaySummary(out=str(out), dead_letters=str(dead_letters) if dead_letters else None)
    snapshots: dict[str, tuple[int, dict[str, object]]] = {}  # vehicle -> (pickup ms, row)
    finished: dict[str, CompletedTrip] = {}

    def emit(vid: str) -> None:
        pickup_ms, row = snapshots.pop(vid)
        c = finished.pop(vid)
        row["pickup_arrival_ts"] = c.pickup_arrival_ms
        writer.write({**row, "dropoff_ts": c.dropoff_event_ms, "duration_s": c.duration_ms / 1000,
                      "dest_cell": c.dest_cell, "dest_route_cell": c.dest_route_cell,
                      "distance_m": c.distance_m})

    def snapshot(ev: TripEvent) -> None:
        def answer(vvec: list, _c: list, _r: list) -> None:
            vec = vvec[0]
            cell = vec["vehicle_cell"]
            cvec = (session.lookup.vectors(ev.arrival_ms, cells=[cell])[1][0] if cell
                    else catalog.empty_vector("cell"))
            row = {"vehicle_id": ev.vehicle_id, "trip_id": ev.trip_id,
                   "pickup_ts": ev.pickup_event_ms, "pickup_arrival_ts": None,
                   "as_of_ts": ev.arrival_ms, **vec, **cvec}
            snapshots[ev.vehicle_id] = (ev.pickup_event_ms, row)
            done = finished.get(ev.vehicle_id)
            if done is not None and done.pickup_event_ms == ev.pickup_event_ms:
                emit(ev.vehicle_id)

        session.ask(ev.arrival_ms, [ev.vehicle_id], answer=answer)

    def on_event(ev: TripEvent) -> None:
        if ev.fix_number == after_fixes:
            snapshot(ev)

    def batch_done(result: Any) -> None:
        for c in result.completed:
            snap = snapshots.get(c.vehicle_id)
            if snap is not None and snap[0] == c.pickup_event_ms:
                finished[c.vehicle_id] = c
                emit(c.vehicle_id)
            elif c.fixes - 1 < after_fixes:
                summary.skipped["fewer_fixes_than_after_fixes"] += 1
            else:
                finished[c.vehicle_id] = c  # snapshot pending at the same arrival time
        if on_batch is not None:
            on_batch(result)

    session.on_trip_event = on_event
    session.wants_event = lambda ev: ev.fix_number == after_fixes
    session.on_batch = batch_done
    if prepare is not None:
        prepare(session)  # e.g. extra as-of queries of the caller's own
    ok = False
    try:
        _run(session, inputs, assume_delay_s, sort, progress, summary)
        ok = True
    finally:
        if ok:
            writer.close()
        else:
            writer.abort()
        if dlf is not None:
            dlf.close(ok)
    summary.training_rows = writer.count
    summary.skipped["incomplete_at_end"] += len(snapshots)
    return summary
