"""Read recorded fixes from Parquet, CSV and JSON Lines files, decoding each row once.

Each reader yields ``Item`` records in file order: the decoded fix or rejection, its raw
form, and its position. Column set: vehicle_id, event_ts, lat, lon, status, speed_mps
(optional), trip_id (optional), arrival_ts (required unless an assumed delay is given).

A Parquet file with a ``reason`` column is read as a tape (``ingest.tape``): a row whose
``reason`` is set is the rejection it was when it arrived (reason, ``detail``, and the
``raw`` column as its raw bytes) and is not validated again; the other rows are validated as
usual, with ``raw`` kept as their raw bytes for dead letters. A directory given as input
stands for the Parquet files under it, sorted by path (``expand_inputs``).
"""

from __future__ import annotations

import csv
import datetime as dt
import io
from collections.abc import Iterator, Mapping, Sequence
from itertools import repeat
from pathlib import Path
from typing import Any, NamedTuple

import orjson
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from featurestore.schema import (
    FIELDS,
    MALFORMED,
    MAX_MESSAGE_BYTES,
    Fix,
    Rejection,
    decode_row,
    row_raw,
    to_epoch_ms,
)
from replay.columns import decode_batch
from replay.columns import with_assumed_arrival as _with_assumed_arrival

FORMATS = ("parquet", "csv", "jsonl")
NUMERIC = ("event_ts", "arrival_ts", "lat", "lon", "speed_mps")


class InputError(ValueError):
    """An input file cannot be read as recorded fixes."""


class Item(NamedTuple):
    """One row of an input: where it came from and what it decoded to (a named tuple: one
    is made per row, and a tuple is the cheapest record to make)."""

    source: int  # index of the input file
    row: int  # 0-based row (line) number in that file
    value: Fix | Rejection
    raw: bytes | None = None  # the line as read (JSON Lines), kept for dead letters

    @property
    def arrival_ms(self) -> int | None:
        return self.value.arrival_ms


_make_item = Item._make  # Item from (source, row, value, raw)


def detect_format(path: str | Path) -> str:
    name = str(path).lower()
    for suffix, fmt in ((".parquet", "parquet"), (".pq", "parquet"), (".csv", "csv"),
                        (".jsonl", "jsonl"), (".ndjson", "jsonl"), (".json", "jsonl")):
        if name.endswith(suffix) or name.endswith(suffix + ".gz"):
            return fmt
    raise InputError(f"{path}: cannot tell the format from the name; use .parquet, .csv or .jsonl")


def _text_cells(row: Mapping[str, str | None]) -> dict[str, Any]:
    """CSV cells are text: numbers are parsed, empty cells are missing, the rest stays text."""
    out: dict[str, Any] = {}
    for k, v in row.items():
        if k is None:
            continue
        if v is None or v == "":
            continue
        if k in NUMERIC:
            try:
                out[k] = float(v)
                continue
            except ValueError:
                pass
        out[k] = v
    return out


def _check_columns(path: Path, names: list[str], delay_ms: int | None) -> None:
    need = ["vehicle_id", "event_ts", "lat", "lon", "status"]
    if delay_ms is None:
        need.append("arrival_ts")
    missing = [c for c in need if c not in names]
    if missing:
        hint = " (or pass --assume-delay SECONDS)" if missing == ["arrival_ts"] else ""
        raise InputError(f"{path}: missing column(s) {', '.join(missing)}{hint}")


def _open_text(path: Path) -> io.TextIOBase | io.BufferedIOBase:
    if str(path).endswith(".gz"):
        import gzip

        return gzip.open(path, "rb")
    return open(path, "rb")


def iter_parquet(path: Path, source: int, delay_ms: int | None, batch_rows: int
                 ) -> Iterator[Item]:
    pf = pq.ParquetFile(path)
    _check_columns(path, pf.schema_arrow.names, delay_ms)
    for name in ("event_ts", "arrival_ts"):
        if name in pf.schema_arrow.names:
            kind = pf.schema_arrow.field(name).type
            if pa.types.is_timestamp(kind) and kind.tz is None:
                raise InputError(f"{path}: column {name} is a timestamp without a time zone; "
                                 "store it as UTC (e.g. timestamp[ms, tz=UTC]) or epoch seconds")
    if "reason" in pf.schema_arrow.names:
        yield from _iter_tape(pf, source, delay_ms, min(batch_rows, _TAPE_BATCH_ROWS))
        return
    row = 0
    for batch in pf.iter_batches(batch_size=batch_rows):
        values = decode_batch(batch, delay_ms)  # the schema's answer for each row, columnar
        n = len(values)
        yield from map(_make_item, zip(repeat(source, n), range(row, row + n), values,
                                       repeat(None, n), strict=True))
        row += n


_TAPE_BATCH_ROWS = 8192  # a tape is many files merged at once: keep each one's batch small
_TAPE_COLUMNS = ("raw", "reason", "detail")  # read besides the fix's (not partition, offset, key)


def _seconds(batch: pa.RecordBatch) -> pa.RecordBatch:
    """timestamp[ms] columns as epoch seconds: exact for milliseconds, and far cheaper to
    validate than datetime objects."""
    cols = list(batch.columns)
    for i, f in enumerate(batch.schema):
        if pa.types.is_timestamp(f.type) and f.type.unit == "ms":
            cols[i] = pc.divide(cols[i].cast(pa.int64()), 1000.0)
    return pa.RecordBatch.from_arrays(cols, names=batch.schema.names)


def _tape_ms(value: Any) -> int | None:
    try:
        return to_epoch_ms(value) if value is not None else None
    except ValueError:
        return None


def _iter_tape(pf: pq.ParquetFile, source: int, delay_ms: int | None, batch_rows: int
               ) -> Iterator[Item]:
    """A tape's rows: recorded rejections as they were, the rest validated as usual."""
    wanted = [c for c in pf.schema_arrow.names if c in FIELDS or c in _TAPE_COLUMNS]
    row = 0
    for batch in pf.iter_batches(batch_size=batch_rows, columns=wanted):
        names = batch.schema.names
        columns = [c.to_pylist() for c in _seconds(batch).columns]  # faster than row dicts
        for values in zip(*columns, strict=True):
            rec = dict(zip(names, values, strict=True))
            raw = rec.get("raw")
            reason = rec.get("reason")
            if reason is not None:
                vid = rec.get("vehicle_id")
                value: Fix | Rejection = Rejection(
                    str(reason), rec.get("detail") or "",
                    raw if isinstance(raw, bytes) else row_raw(rec),
                    vid if isinstance(vid, str) else None, _tape_ms(rec.get("arrival_ts")))
                yield Item(source, row, value)
            else:
                fixed = rec if delay_ms is None else _with_assumed_arrival(dict(rec), delay_ms)
                value = decode_row(fixed, rec)
                if isinstance(raw, bytes):
                    if isinstance(value, Rejection):
                        value = Rejection(value.reason, value.detail, raw, value.vehicle_id,
                                          value.arrival_ms)
                    yield Item(source, row, value, raw if isinstance(value, Fix) else None)
                else:
                    yield Item(source, row, value)
            row += 1


def iter_csv(path: Path, source: int, delay_ms: int | None) -> Iterator[Item]:
    with _open_text(path) as fh:
        text = io.TextIOWrapper(fh, encoding="utf-8", errors="replace", newline="")
        reader = csv.DictReader(text)
        _check_columns(path, list(reader.fieldnames or []), delay_ms)
        for row, rec in enumerate(reader):
            yield Item(source, row,
                       decode_row(_with_assumed_arrival(_text_cells(rec), delay_ms), rec))


def iter_jsonl(path: Path, source: int, delay_ms: int | None) -> Iterator[Item]:
    with _open_text(path) as fh:
        for row, line in enumerate(fh):
            raw = line.rstrip(b"\r\n")
            if not raw.strip():
                continue
            value = _decode_line(raw, delay_ms)
            yield Item(source, row, value, raw if isinstance(value, Fix) else None)


def _decode_line(raw: bytes, delay_ms: int | None) -> Fix | Rejection:
    if len(raw) > MAX_MESSAGE_BYTES:
        return Rejection(MALFORMED, f"line of {len(raw)} bytes exceeds {MAX_MESSAGE_BYTES}", raw)
    try:
        d = orjson.loads(raw)
    except orjson.JSONDecodeError as exc:
        return Rejection(MALFORMED, f"not valid JSON: {exc}", raw)
    if not isinstance(d, dict):
        return Rejection(MALFORMED, f"a JSON {type(d).__name__} is not a message object", raw)
    got = decode_row(_with_assumed_arrival(d, delay_ms))
    if isinstance(got, Rejection):
        return Rejection(got.reason, got.detail, raw, got.vehicle_id, got.arrival_ms)
    return got


def iter_file(path: str | Path, source: int = 0, assume_delay_s: float | None = None,
              batch_rows: int = 16_384) -> Iterator[Item]:
    """All rows of one recorded file, decoded, in file order."""
    p = Path(path)
    if not p.exists():
        raise InputError(f"{p}: no such file")
    delay_ms = None if assume_delay_s is None else round(assume_delay_s * 1000)
    fmt = detect_format(p)
    if fmt == "parquet":
        return iter_parquet(p, source, delay_ms, batch_rows)
    if fmt == "csv":
        return iter_csv(p, source, delay_ms)
    return iter_jsonl(p, source, delay_ms)


def expand_inputs(inputs: Sequence[str | Path]) -> list[Path]:
    """The input paths, each directory (a tape) replaced by the Parquet files under it,
    sorted by path; hidden files (a writer's temporary files) are skipped."""
    out: list[Path] = []
    for given in inputs:
        p = Path(given)
        if not p.is_dir():
            out.append(p)
            continue
        found = sorted(
            (f for f in p.rglob("*") if f.is_file() and detect_format_or_none(f) == "parquet"
             and not any(part.startswith(".") for part in f.relative_to(p).parts)),
            key=lambda f: f.relative_to(p).as_posix())
        if not found:
            raise InputError(f"{p}: a directory without Parquet files")
        out.extend(found)
    return out


def detect_format_or_none(path: str | Path) -> str | None:
    try:
        return detect_format(path)
    except InputError:
        return None


def earliest_arrival_ms(path: str | Path) -> int | None:
    """A lower bound of the arrival times in a Parquet file, from its column statistics
    (None when unknown, or not Parquet). Lets replay open merged files only when due."""
    p = Path(path)
    if detect_format_or_none(p) != "parquet":
        return None
    try:
        meta = pq.ParquetFile(p).metadata
        names = meta.schema.to_arrow_schema().names
        if "arrival_ts" not in names or meta.num_row_groups == 0:
            return None
        col = names.index("arrival_ts")
        kind = meta.schema.to_arrow_schema().field(col).type
        if not (pa.types.is_timestamp(kind) or pa.types.is_floating(kind)
                or pa.types.is_integer(kind)):
            return None  # text times do not sort by time
        low: int | None = None
        for g in range(meta.num_row_groups):
            st = meta.row_group(g).column(col).statistics
            if st is None or not st.has_min_max:
                if st is not None and st.null_count == meta.row_group(g).num_rows:
                    continue  # all null: no arrival to bound
                return None
            ms = _bound_ms(st.min, pa.types.is_timestamp(kind))
            if ms is None:
                return None
            low = ms if low is None else min(low, ms)
        return low
    except (OSError, ValueError, pa.ArrowException):
        return None


def _bound_ms(value: Any, timestamp: bool) -> int | None:
    """Milliseconds of a statistics minimum, rounded as ``to_epoch_ms`` would (no range check:
    only a lower bound is needed)."""
    if timestamp:
        if not isinstance(value, dt.datetime) or value.tzinfo is None:
            return None
        delta = value - dt.datetime(1970, 1, 1, tzinfo=dt.timezone.utc)
        return (delta.days * 86_400 + delta.seconds) * 1000 + round(delta.microseconds / 1000)
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        x = float(value)
        return round(x * 1000.0) if x == x and abs(x) != float("inf") else None
    return None


def count_rows(path: str | Path) -> int | None:
    """Row count when cheap to know (Parquet metadata), for progress bars."""
    p = Path(path)
    try:
        if detect_format(p) == "parquet":
            return pq.ParquetFile(p).metadata.num_rows
    except (InputError, OSError):
        return None
    return None
