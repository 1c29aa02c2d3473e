"""What every source yields: one record as it arrived, before decoding."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True, slots=True)
class SourceRecord:
    """One message as received: where it came from, its arrival time, key and raw bytes.

    ``partition`` names the source partition (``topic:3`` for Kafka, ``file:<path>`` for a
    file); ``offset`` is its position there; ``timestamp_ms`` is the arrival time (the Kafka
    record timestamp live).
    """

    partition: str
    offset: int
    timestamp_ms: int | None
    key: bytes | None
    value: bytes
