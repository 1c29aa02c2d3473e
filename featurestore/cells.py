"""H3 binning: the cell of a position, the route cell, and a cell's ring."""

from __future__ import annotations

from functools import lru_cache

import h3


def cell_of(lat: float, lon: float, resolution: int) -> str:
    """The H3 cell (hex string) containing the point at the given resolution."""
    return h3.latlng_to_cell(lat, lon, resolution)


@lru_cache(maxsize=65_536)
def ring_of(cell: str) -> tuple[str, ...]:
    """The cell and its neighbours, ``grid_disk(cell, 1)``, sorted for a stable order."""
    return tuple(sorted(h3.grid_disk(cell, 1)))


def is_cell(text: str, resolution: int | None = None) -> bool:
    """True when ``text`` is a valid H3 cell (at ``resolution`` when given)."""
    try:
        ok = h3.is_valid_cell(text)
    except (TypeError, ValueError):
        return False
    return bool(ok) and (resolution is None or h3.get_resolution(text) == resolution)
