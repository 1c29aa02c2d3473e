"""The tape: every record a live consumer received, accepted or rejected, as hourly Parquet files.

Layout, one directory per arrival hour (UTC, from the record timestamp)::

    DIR/2026-06-01T08/<name>-000001.parquet
    DIR/2026-06-01T08/<name>-000002.parquet
    DIR/2026-06-01T09/<name>-000001.parquet

``name`` is the writer's (one per consumer process, e.g. its host and index), so several
consumers write into one directory without clashing. Part numbers count from 1 per writer and
hour in the order the writer flushed them; a restarted writer continues after the highest
number already there and never overwrites a file (the final name is taken with a hard link,
which fails rather than replace). A part file appears atomically: it is written under a hidden
temporary name in the same directory, synced, then linked to its final name.

Columns (one row per record, ``TAPE_SCHEMA``):

=============== ======================= ====================================================
``vehicle_id``  string                  the fix's; for a rejected record the vehicle_id it
                                        carried when that was valid, else null
``event_ts``    timestamp[ms, UTC]      the fix's; null for rejected records
``arrival_ts``  timestamp[ms, UTC]      the record timestamp (null only when the record had
                                        no usable timestamp)
``lat, lon``    float64                 the fix's; null for rejected records
``status``      string                  the fix's; null for rejected records
``speed_mps``   float64                 the fix's (null when not sent, or rejected)
``trip_id``     string                  the fix's (null when not sent, or rejected)
``partition``   string                  the source partition (``topic:3``)
``offset``      int64                   the record's offset in that partition
``key``         binary                  the record key as received (null: no key)
``raw``         binary                  the record value as received, byte for byte
                                        (null: the record had no value)
``reason``      string                  null when the record decoded; else the decode
                                        rejection's reason (``malformed``, ``invalid:<field>``)
``detail``      string                  the rejection's readable detail; null when decoded
=============== ======================= ====================================================

Times are integer milliseconds, so they round-trip exactly through ``cellpulse replay``.
Only decoding is recorded: the engine's own verdicts (``too_late``, ``from_future``,
``duplicate``) are re-made identically when the tape is replayed.

Order. Each part file is sorted by (arrival_ts, partition, offset), rows without an arrival
first. Files of different hours never overlap in arrival time; files of one hour may (several
writers, several parts of one writer, a partition delivered late), so the set of files is in
arrival order only hour by hour. ``cellpulse replay DIR`` expands a directory to its Parquet
files sorted by path and merges them by arrival (ties: file path order, then row), which keeps
one partition's records in offset order as long as it stays with one writer.

Buffering and durability. Rows are buffered per hour in memory, at most ``part_rows`` over all
hours; a part file is written when that bound is reached, when an hour is closed (the writer
has seen an arrival ``close_after_s`` past its end), when the oldest buffered row has waited
``max_age_s`` of wall-clock time (checked on each ``write``, which may be called with empty
batches on idle polls), on ``flush()`` and on ``close()``. A process killed between flushes
loses its buffered rows from the tape (not from the state); one that crashes after a flush and
before its offsets are committed records those records again on restart (same partition and
offset; replay counts the second copy of a fix as a ``duplicate``). A consumer that wants
neither calls ``flush()`` before it commits.

Retention. Vehicle positions linked to drivers are personal data, and the tape also keeps
every raw message. Keep it only as long as needed: ``prune_tape(DIR, keep_hours)`` (or
``TapeWriter(..., keep_hours=N)``, which prunes whenever an hour is closed) deletes whole
hour directories whose hour ended more than ``keep_hours`` ago by the wall clock.
"""

from __future__ import annotations

import datetime as dt
import os
import re
import shutil
import time
import uuid
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from featurestore.schema import Fix, Rejection
from ingest.records import SourceRecord

HOUR_MS = 3_600_000
TS_TYPE = pa.timestamp("ms", tz="UTC")
TAPE_VERSION = b"1"
TAPE_SCHEMA = pa.schema(
    [
        pa.field("vehicle_id", pa.string()),
        pa.field("event_ts", TS_TYPE),
        pa.field("arrival_ts", TS_TYPE),
        pa.field("lat", pa.float64()),
        pa.field("lon", pa.float64()),
        pa.field("status", pa.string()),
        pa.field("speed_mps", pa.float64()),
        pa.field("trip_id", pa.string()),
        pa.field("partition", pa.string(), nullable=False),
        pa.field("offset", pa.int64(), nullable=False),
        pa.field("key", pa.binary()),
        pa.field("raw", pa.binary()),  # null only for a record without a value
        pa.field("reason", pa.string()),
        pa.field("detail", pa.string()),
    ],
    metadata={b"cellpulse.tape": TAPE_VERSION},
)
COLUMNS = tuple(TAPE_SCHEMA.names)
HOUR_FORMAT = "%Y-%m-%dT%H"
_HOUR_RE = re.compile(r"\d{4}-\d{2}-\d{2}T\d{2}")
_NAME_RE = re.compile(r"[A-Za-z0-9_.\-]{1,100}")


def hour_name(hour: int) -> str:
    """The directory name of an hour given as hours since the epoch (UTC)."""
    stamp = dt.datetime.fromtimestamp(hour * 3600, tz=dt.timezone.utc)
    return stamp.strftime(HOUR_FORMAT)


def hour_start_ms(name: str) -> int | None:
    """Epoch ms at the start of an hour directory's hour; None if ``name`` is not one."""
    if not _HOUR_RE.fullmatch(name):
        return None
    try:
        stamp = dt.datetime.strptime(name, HOUR_FORMAT).replace(tzinfo=dt.timezone.utc)
    except ValueError:
        return None
    return int(stamp.timestamp()) * 1000


class TapeError(OSError):
    """A part file could not be written (the batch itself was buffered)."""


class TapeWriter:
    """Records a consumer's batches (raw records and what they decoded to) as tape part files.

    ``write(records, decoded)`` once per consumer batch, ``decoded[i]`` being
    ``decode_record(records[i].key, records[i].value, records[i].timestamp_ms)``;
    ``close()`` at shutdown (also a context manager). Not thread-safe: one writer per consumer.
    """

    def __init__(self, directory: str | Path, name: str, *, part_rows: int = 100_000,
                 close_after_s: float = 120.0, max_age_s: float | None = 300.0,
                 keep_hours: float | None = None, compression: str = "zstd",
                 retry_s: float = 5.0, max_buffered_rows: int | None = None) -> None:
        if not _NAME_RE.fullmatch(name):
            raise ValueError(f"tape writer name {name!r}: use 1-100 of A-Z a-z 0-9 _ . -")
        if part_rows < 1:
            raise ValueError("part_rows must be >= 1")
        self.directory = Path(directory)
        self.name = name
        self.part_rows = part_rows
        self.close_after_ms = round(close_after_s * 1000)
        self.max_age_s = max_age_s
        self.keep_hours = keep_hours
        self.compression = compression
        self.retry_s = retry_s
        self.max_buffered_rows = max_buffered_rows or 4 * part_rows
        self.files: list[Path] = []  # part files written by this writer, in order
        self.rows_written = 0
        self.rows_dropped = 0  # given up after failed writes, to bound memory
        self._retry_at = 0.0  # after a failed write, no new attempt before this (monotonic)
        self._buffers: dict[int, dict[str, list[Any]]] = {}
        self._buffered = 0
        self._oldest: float | None = None  # time.monotonic() of the oldest buffered row
        self._max_arrival: int | None = None
        self._next_part: dict[int, int] = {}
        self._name_re = re.compile(re.escape(name) + r"-(\d+)\.parquet")
        self._closed = False
        self.directory.mkdir(parents=True, exist_ok=True)

    # --- recording ---------------------------------------------------------------------------

    def write(self, records: Sequence[SourceRecord], decoded: Sequence[Fix | Rejection]) -> None:
        """Buffer one batch; write part files that are due.

        A failed part write never loses the batch: every row is buffered, the rows stay for a
        new attempt after ``retry_s``, and TapeError is raised once the batch is in. Only when
        failures pile up beyond ``max_buffered_rows`` are the buffered rows dropped (counted in
        ``rows_dropped``), so that a full disk cannot exhaust the consumer's memory.
        """
        if self._closed:
            raise ValueError("tape writer is closed")
        if len(records) != len(decoded):
            raise ValueError(f"{len(records)} records but {len(decoded)} decoded values")
        error: Exception | None = None
        for rec, value in zip(records, decoded, strict=True):
            arrival = value.arrival_ms
            if arrival is not None:
                if self._max_arrival is None or arrival > self._max_arrival:
                    self._max_arrival = arrival
                hour = arrival // HOUR_MS
            else:  # no usable timestamp: file it with the latest arrival seen
                base = self._max_arrival if self._max_arrival is not None else time.time() * 1000
                hour = int(base // HOUR_MS)
            buf = self._buffers.get(hour)
            if buf is None:
                buf = self._buffers[hour] = {c: [] for c in COLUMNS}
            if isinstance(value, Fix):
                buf["vehicle_id"].append(value.vehicle_id)
                buf["event_ts"].append(value.event_ms)
                buf["lat"].append(value.lat)
                buf["lon"].append(value.lon)
                buf["status"].append(value.status)
                buf["speed_mps"].append(value.speed_mps)
                buf["trip_id"].append(value.trip_id)
                buf["reason"].append(None)
                buf["detail"].append(None)
            else:
                buf["vehicle_id"].append(value.vehicle_id)
                for c in ("event_ts", "lat", "lon", "status", "speed_mps", "trip_id"):
                    buf[c].append(None)
                buf["reason"].append(value.reason)
                buf["detail"].append(value.detail)
            buf["arrival_ts"].append(arrival)
            buf["partition"].append(rec.partition)
            buf["offset"].append(rec.offset)
            buf["key"].append(rec.key)
            buf["raw"].append(rec.value)
            if self._oldest is None:
                self._oldest = time.monotonic()
            self._buffered += 1
            if self._buffered >= self.part_rows:
                error = self._attempt(self.flush) or error
        error = self._attempt(self._flush_due) or error
        if error is not None:
            dropped = 0
            if self._buffered >= self.max_buffered_rows:
                dropped = self._buffered
                self.rows_dropped += dropped
                self._buffers.clear()
                self._buffered = 0
                self._oldest = None
            kept = f"{self._buffered} rows kept for a new attempt"
            raise TapeError(f"tape {self.directory} ({self.name}): could not write a part file: "
                            f"{error}; {kept}" + (f"; {dropped} rows dropped" if dropped else "")
                            ) from error

    def _attempt(self, step: Any) -> Exception | None:
        """Run a flush step unless a recent failure says wait; return its error, if any."""
        if time.monotonic() < self._retry_at:
            return None
        try:
            step()
        except Exception as exc:  # noqa: BLE001 - reported by write(), rows kept
            self._retry_at = time.monotonic() + self.retry_s
            return exc
        return None

    def _flush_due(self) -> None:
        if self._max_arrival is not None:
            closed = [h for h in self._buffers
                      if (h + 1) * HOUR_MS + self.close_after_ms <= self._max_arrival]
            for h in sorted(closed):
                self._flush_hour(h)
            if closed and self.keep_hours is not None:
                prune_tape(self.directory, self.keep_hours)
        if (self._oldest is not None and self.max_age_s is not None
                and time.monotonic() - self._oldest >= self.max_age_s):
            self.flush()

    def flush(self) -> None:
        """Write every buffered row now (one part file per hour that has rows); raises what a
        failed write raised (the rows stay buffered)."""
        for h in sorted(self._buffers):
            self._flush_hour(h)

    def close(self) -> None:
        """Flush and stop; prunes once more if ``keep_hours`` is set. Safe to call twice."""
        if self._closed:
            return
        self.flush()
        self._closed = True
        if self.keep_hours is not None:
            prune_tape(self.directory, self.keep_hours)

    def __enter__(self) -> TapeWriter:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @property
    def buffered_rows(self) -> int:
        return self._buffered

    # --- part files ----------------------------------------------------------------------------

    def _flush_hour(self, hour: int) -> None:
        buf = self._buffers.get(hour)
        if not buf or not buf["raw"]:
            self._buffers.pop(hour, None)
            return
        table = pa.table({c: pa.array(buf[c], TAPE_SCHEMA.field(c).type) for c in COLUMNS},
                         schema=TAPE_SCHEMA)
        order = pc.sort_indices(pa.table({  # no arrival (null) sorts first
            "a": pc.fill_null(table.column("arrival_ts").cast(pa.int64()), -1),
            "p": table.column("partition"), "o": table.column("offset")}),
            sort_keys=[("a", "ascending"), ("p", "ascending"), ("o", "ascending")])
        self._write_part(hour, table.take(order))
        del self._buffers[hour]  # only once written: a failed write keeps the rows
        self._buffered -= table.num_rows
        self.rows_written += table.num_rows
        if not self._buffers:
            self._oldest = None

    def _first_free_part(self, folder: Path) -> int:
        numbers = [int(m.group(1)) for p in folder.iterdir()
                   if (m := self._name_re.fullmatch(p.name))]
        return max(numbers, default=0) + 1

    def _write_part(self, hour: int, table: pa.Table) -> None:
        folder = self.directory / hour_name(hour)
        folder.mkdir(parents=True, exist_ok=True)
        part = self._next_part.get(hour) or self._first_free_part(folder)
        tmp = folder / f".{self.name}.{os.getpid()}.{uuid.uuid4().hex}.tmp"
        try:
            with open(tmp, "wb") as fh:
                pq.write_table(table, fh, compression=self.compression,
                               row_group_size=max(table.num_rows, 1))
                fh.flush()
                os.fsync(fh.fileno())
            while True:
                final = folder / f"{self.name}-{part:06d}.parquet"
                if _place(tmp, final):
                    break
                part += 1
        finally:
            tmp.unlink(missing_ok=True)
        _sync_dir(folder)
        self._next_part[hour] = part + 1
        self.files.append(final)


def _place(tmp: Path, final: Path) -> bool:
    """Give ``tmp`` the name ``final`` unless that exists; False if it does."""
    try:
        os.link(tmp, final)
        return True
    except FileExistsError:
        return False
    except OSError:  # a file system without hard links: check, then rename
        if final.exists():
            return False
        os.rename(tmp, final)
        return True


def _sync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def prune_tape(directory: str | Path, keep_hours: float, now_ms: int | None = None
               ) -> list[Path]:
    """Delete the tape's hour directories whose hour ended more than ``keep_hours`` before
    ``now_ms`` (default: the wall clock). Other entries are never touched. Returns what was
    deleted, oldest first.

    Vehicle positions linked to drivers are personal data: run this (or give the writer
    ``keep_hours``) so the tape is kept no longer than needed.
    """
    if keep_hours < 0:
        raise ValueError("keep_hours must be >= 0")
    root = Path(directory)
    if not root.is_dir():
        return []
    now = time.time() * 1000 if now_ms is None else now_ms
    cutoff = now - keep_hours * HOUR_MS
    gone: list[Path] = []
    for child in sorted(root.iterdir()):
        start = hour_start_ms(child.name)
        if start is not None and child.is_dir() and not child.is_symlink() \
                and start + HOUR_MS <= cutoff:
            shutil.rmtree(child)
            gone.append(child)
    return gone
