"""Read recorded fixes from Parquet, CSV and JSON Lines files, decoding each row once.

Each reader yields ``Item`` records in file order: the decoded fix or rejection, its raw
form, and its position. Column set: vehicle_id, event_ts, lat, lon, status, speed_mps
(optional), trip_id (optional), arrival_ts (required unless an assumed delay is given).
"""

from __future__ import annotations

import csv
import io
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import orjson
import pyarrow as pa
import pyarrow.parquet as pq

from featurestore.schema import (
    MALFORMED,
    MAX_MESSAGE_BYTES,
    Fix,
    Rejection,
    decode_row,
    to_epoch_ms,
)

FORMATS = ("parquet", "csv", "jsonl")
NUMERIC = ("event_ts", "arrival_ts", "lat", "lon", "speed_mps")


class InputError(ValueError):
    """An input file cannot be read as recorded fixes."""


@dataclass(frozen=True, slots=True)
class Item:
    """One row of an input: where it came from and what it decoded to."""

    source: int  # index of the input file
    row: int  # 0-based row (line) number in that file
    value: Fix | Rejection
    raw: bytes | None = None  # the line as read (JSON Lines), kept for dead letters

    @property
    def arrival_ms(self) -> int | None:
        return self.value.arrival_ms


def detect_format(path: str | Path) -> str:
    name = str(path).lower()
    for suffix, fmt in ((".parquet", "parquet"), (".pq", "parquet"), (".csv", "csv"),
                        (".jsonl", "jsonl"), (".ndjson", "jsonl"), (".json", "jsonl")):
        if name.endswith(suffix) or name.endswith(suffix + ".gz"):
            return fmt
    raise InputError(f"{path}: cannot tell the format from the name; use .parquet, .csv or .jsonl")


def _with_assumed_arrival(row: dict[str, Any], delay_ms: int | None) -> dict[str, Any]:
    if delay_ms is not None and row.get("arrival_ts") in (None, ""):
        try:
            row["arrival_ts"] = (to_epoch_ms(row.get("event_ts")) + delay_ms) / 1000
        except ValueError:
            pass  # the event_ts itself is invalid; validation says so
    return row


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
    row = 0
    for batch in pf.iter_batches(batch_size=batch_rows):
        for rec in batch.to_pylist():
            fixed = rec if delay_ms is None else _with_assumed_arrival(dict(rec), delay_ms)
            yield Item(source, row, decode_row(fixed, rec))
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
              batch_rows: int = 65_536) -> Iterator[Item]:
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


def count_rows(path: str | Path) -> int | None:
    """Row count when cheap to know (Parquet metadata), for progress bars."""
    p = Path(path)
    try:
        if detect_format(p) == "parquet":
            return pq.ParquetFile(p).metadata.num_rows
    except (InputError, OSError):
        return None
    return None
