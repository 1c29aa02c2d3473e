"""H3 binning: the cell of a position, the route cell, and a cell's ring."""

from __future__ import annotations

from functools import lru_cache

import h3

try:  # the compiled functions behind h3.latlng_to_cell (which is int_to_str of the first)
    from h3._cy import int_to_str as _int_to_str
    from h3._cy import latlng_to_cell as _latlng_to_int
except ImportError:  # pragma: no cover - another layout of the h3 package
    from h3 import int_to_str as _int_to_str
    from h3.api.basic_int import latlng_to_cell as _latlng_to_int

_CELL_TEXT: dict[int, str] = {}  # cell number -> its hex string (one shared string per cell)
_CELL_TEXT_MAX = 1 << 18


def cell_of(lat: float, lon: float, resolution: int) -> str:
    """The H3 cell (hex string) containing the point at the given resolution.

    Equal to ``h3.latlng_to_cell``; the cell's text is cached by its number, which halves
    the cost per fix and lets every fix of a cell share one string."""
    n = _latlng_to_int(lat, lon, resolution)
    text = _CELL_TEXT.get(n)
    if text is None:
        if len(_CELL_TEXT) >= _CELL_TEXT_MAX:
            _CELL_TEXT.clear()
        text = _CELL_TEXT[n] = _int_to_str(n)
    return text


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
