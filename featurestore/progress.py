"""How far the live path has read: ``known_at``, the arrival time up to which every message
has been applied, over all source partitions."""

from __future__ import annotations

from collections.abc import Mapping

from featurestore.store import SourcePosition


def known_at(watermark_ms: int | None, positions: Mapping[str, SourcePosition],
             highwaters: Mapping[str, int]) -> int | None:
    """The latest moment T for which every message with arrival <= T has been applied.

    A partition is behind when its consumer last saw an end offset beyond the next offset
    applied; it holds ``known_at`` to just before its latest applied arrival (messages of
    that same millisecond may still be waiting), or to None when nothing of it is applied
    yet. A partition that is fully consumed holds nothing back; with no partition behind,
    ``known_at`` is the watermark (the latest arrival applied). This assumes arrival times
    never decrease within a partition (Kafka's LogAppendTime, or a replay in arrival order).
    """
    if watermark_ms is None:
        return None
    limits: list[int] = []
    for part, end in highwaters.items():
        pos = positions.get(part)
        applied = pos.next_offset if pos is not None else 0
        if end > applied:
            if pos is None or pos.last_arrival_ms is None:
                return None
            limits.append(pos.last_arrival_ms - 1)
    return min([watermark_ms, *limits])
