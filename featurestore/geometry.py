"""Spherical geometry on a sphere of configurable radius: haversine, bearings, circular stats.

Pure functions over floats in degrees; no I/O.
"""

from __future__ import annotations

import math
from collections.abc import Iterable

EARTH_RADIUS_M = 6_371_008.8  # IUGG mean radius R1 of the WGS84 ellipsoid
UNDEFINED_R = 1e-9  # below this mean resultant length the circular mean is undefined (NaN)


def haversine_m(
    lat1: float, lon1: float, lat2: float, lon2: float, radius_m: float = EARTH_RADIUS_M
) -> float:
    """Great-circle distance in metres by the haversine formula."""
    p1 = math.radians(lat1)
    p2 = math.radians(lat2)
    dp = p2 - p1
    dl = math.radians(lon2 - lon1)
    a = math.sin(dp / 2) ** 2 + math.cos(p1) * math.cos(p2) * math.sin(dl / 2) ** 2
    return 2.0 * radius_m * math.asin(min(1.0, math.sqrt(a)))


def initial_bearing_deg(lat1: float, lon1: float, lat2: float, lon2: float) -> float:
    """Initial great-circle bearing from point 1 to point 2, degrees from north in [0, 360)."""
    p1 = math.radians(lat1)
    p2 = math.radians(lat2)
    dl = math.radians(lon2 - lon1)
    y = math.sin(dl) * math.cos(p2)
    x = math.cos(p1) * math.sin(p2) - math.sin(p1) * math.cos(p2) * math.cos(dl)
    deg = math.degrees(math.atan2(y, x)) % 360.0
    return 0.0 if deg == 360.0 else deg


# math.radians(x) is x * (pi / 180) and math.degrees(x) is x * (180 / pi) in CPython
# (Modules/mathmodule.c), so these products give identical results without the calls.
_RAD = math.pi / 180.0
_DEG = 180.0 / math.pi
_sin = math.sin
_cos = math.cos
_asin = math.asin
_sqrt = math.sqrt
_atan2 = math.atan2


def step_m_and_bearing(
    lat1: float, lon1: float, lat2: float, lon2: float, radius_m: float = EARTH_RADIUS_M
) -> tuple[float, float]:
    """``haversine_m`` and ``initial_bearing_deg`` of one step, sharing the trigonometry.

    Gives results identical to calling the two functions separately (the engine calls it
    once per in-order fix, so it avoids attribute look-ups and calls).
    """
    p1 = lat1 * _RAD
    p2 = lat2 * _RAD
    dp = p2 - p1
    dl = (lon2 - lon1) * _RAD
    c1 = _cos(p1)
    c2 = _cos(p2)
    a = _sin(dp / 2) ** 2 + c1 * c2 * _sin(dl / 2) ** 2
    dist = 2.0 * radius_m * _asin(min(1.0, _sqrt(a)))
    y = _sin(dl) * c2
    x = c1 * _sin(p2) - _sin(p1) * c2 * _cos(dl)
    deg = (_atan2(y, x) * _DEG) % 360.0
    return dist, (0.0 if deg == 360.0 else deg)


def circular_mean_deg(angles_deg: Iterable[float]) -> tuple[float, float]:
    """Circular mean (degrees, [0, 360)) and mean resultant length R of angles.

    Returns (nan, nan) for no angles and (nan, R) when R < UNDEFINED_R, where the
    direction of the mean is undefined.
    """
    s = 0.0
    c = 0.0
    n = 0
    for a in angles_deg:
        r = math.radians(a)
        s += math.sin(r)
        c += math.cos(r)
        n += 1
    if n == 0:
        return math.nan, math.nan
    big_r = math.hypot(s, c) / n
    if big_r < UNDEFINED_R:
        return math.nan, big_r
    deg = math.degrees(math.atan2(s, c)) % 360.0
    return (0.0 if deg == 360.0 else deg), big_r
