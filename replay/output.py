"""Writers for training sets and dead letters (Parquet by default, CSV on request)."""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from featurestore.catalog import Feature

ARROW_OF = {"int": pa.int64(), "float": pa.float64(), "str": pa.string()}
TS_TYPE = pa.timestamp("ms", tz="UTC")


def feature_fields(features: Sequence[Feature]) -> list[pa.Field]:
    return [pa.field(f.name, ARROW_OF[f.dtype], nullable=True) for f in features]


def output_format(path: str | Path, fmt: str | None) -> str:
    if fmt:
        if fmt not in ("parquet", "csv"):
            raise ValueError(f"unknown output format {fmt!r}; use parquet or csv")
        return fmt
    return "csv" if str(path).lower().endswith(".csv") else "parquet"


class TableWriter:
    """Streams rows (dicts) to Parquet or CSV in chunks, with a fixed schema.

    Writes to a temporary sibling file that replaces ``path`` only on ``close()``; ``abort()``
    removes it, so a failed run never leaves a partial training set behind.
    """

    # Rows wait as dicts only in small groups, then as Arrow columns until a chunk is full:
    # a wide training-set row takes ~20x less memory as columns than as a dict.
    ROWS_AS_DICTS = 512

    def __init__(self, path: str | Path, schema: pa.Schema, fmt: str = "parquet",
                 chunk_rows: int = 8192) -> None:
        self.final = Path(path)
        self.final.parent.mkdir(parents=True, exist_ok=True)
        self.path = self.final.with_name(f".{self.final.name}.{os.getpid()}.partial")
        self.schema = schema
        self.fmt = fmt
        self.chunk_rows = chunk_rows
        self._rows: list[Mapping[str, Any]] = []
        self._batches: list[pa.RecordBatch] = []
        self._pending = 0  # rows in _batches
        self.count = 0
        self._writer: pq.ParquetWriter | pacsv.CSVWriter
        if fmt == "parquet":
            self._writer = pq.ParquetWriter(self.path, schema, compression="zstd")
        else:
            self._writer = pacsv.CSVWriter(self.path, schema)

    def write(self, row: Mapping[str, Any]) -> None:
        self._rows.append(row)
        if len(self._rows) >= self.ROWS_AS_DICTS:
            self._columns()
            if self._pending >= self.chunk_rows:
                self.flush()

    def _columns(self) -> None:
        if self._rows:
            self._batches.append(pa.RecordBatch.from_pylist(self._rows, schema=self.schema))
            self._pending += len(self._rows)
            self._rows = []

    def write_table(self, table: pa.Table) -> None:
        self.flush()
        self._writer.write_table(table.cast(self.schema))
        self.count += table.num_rows

    def flush(self) -> None:
        self._columns()
        if self._batches:
            self._writer.write_table(pa.Table.from_batches(self._batches, schema=self.schema))
            self.count += self._pending
            self._batches = []
            self._pending = 0

    def close(self) -> None:
        self.flush()
        self._writer.close()
        os.replace(self.path, self.final)

    def abort(self) -> None:
        try:
            self._writer.close()
        finally:
            self.path.unlink(missing_ok=True)

    def __enter__(self) -> TableWriter:
        return self

    def __exit__(self, exc_type: object, *exc: object) -> None:
        if exc_type is None:
            self.close()
        else:
            self.abort()


DEAD_LETTER_SCHEMA = pa.schema([
    pa.field("reason", pa.string()),
    pa.field("detail", pa.string()),
    pa.field("source", pa.string()),
    pa.field("row", pa.int64()),
    pa.field("vehicle_id", pa.string()),
    pa.field("arrival_ts", TS_TYPE),
    pa.field("raw", pa.binary()),
])
