"""A picture of a count per H3 cell (for example pickups): a self-contained HTML page with SVG.

No map tiles, scripts, external CSS or network: each cell is a polygon from
``h3.cell_to_boundary`` projected equirectangularly (longitude scaled by the cosine of the
middle latitude), coloured on a square-root sequential ramp from pale cream to deep red.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from html import escape
from itertools import pairwise
from pathlib import Path

import h3

# The colour ramp (our own): stops as (position 0..1, (r, g, b)); zero and low values are pale.
RAMP: tuple[tuple[float, tuple[int, int, int]], ...] = (
    (0.00, (255, 250, 215)),
    (0.25, (253, 208, 110)),
    (0.50, (244, 141, 52)),
    (0.75, (206, 52, 33)),
    (1.00, (112, 8, 22)),
)
NO_VALUE_COLOUR = "#bdbdbd"  # cells whose count is not a finite number

_MAP_W = 900.0  # largest map width in px
_MAP_H = 680.0  # largest map height in px
_PAD = 24.0
_HEADER = 44.0
_LEGEND_H = 78.0
_LEGEND_STEPS = 48


def ramp_colour(fraction: float) -> str:
    """The ramp colour at ``fraction`` (clipped to 0..1) as #rrggbb."""
    f = min(1.0, max(0.0, fraction)) if math.isfinite(fraction) else 0.0
    for (p0, c0), (p1, c1) in pairwise(RAMP):
        if f <= p1:
            w = (f - p0) / (p1 - p0)
            rgb = [round(a + (b - a) * w) for a, b in zip(c0, c1, strict=True)]
            return "#{:02x}{:02x}{:02x}".format(*rgb)
    return "#{:02x}{:02x}{:02x}".format(*RAMP[-1][1])


def _fmt(v: float) -> str:
    if not math.isfinite(v):
        return "n/a"
    if float(v).is_integer():
        return f"{int(v):d}"
    return f"{v:.4g}"


def _nice_ticks(vmax: float) -> list[float]:
    """Round tick values from 0 to about vmax."""
    if vmax <= 0:
        return [0.0]
    raw = vmax / 4.0
    mag = 10.0 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1.0, 2.0, 2.5, 5.0, 10.0) if m * mag >= raw)
    ticks = [i * step for i in range(int(vmax / step + 1e-9) + 1)]
    if ticks[-1] < vmax * 0.999 and math.sqrt(ticks[-1] / vmax) < 0.9:
        ticks.append(vmax)  # label the top of the bar unless a round tick sits next to it
    return ticks


def _boundary(cell: str) -> list[tuple[float, float]]:
    try:
        return [(float(a), float(b)) for a, b in h3.cell_to_boundary(cell)]
    except Exception as exc:  # noqa: BLE001 - h3 raises several types for a bad id
        raise ValueError(f"not an H3 cell id: {cell!r}") from exc


def render_svg(
    counts: Mapping[str, int | float],
    title: str,
    places: Mapping[str, tuple[float, float]] | None = None,
    *,
    units: str = "pickups per cell",
    empty_text: str = "no pickups",
) -> str:
    """The SVG document (a string) of one coloured polygon per cell, a legend and landmarks."""
    rings = {cell: _boundary(cell) for cell in counts}
    pts = [p for ring in rings.values() for p in ring]
    pts += [(float(lat), float(lon)) for lat, lon in (places or {}).values()]
    if pts:
        lats = [p[0] for p in pts]
        lons = [p[1] for p in pts]
        lat_min, lat_max, lon_min, lon_max = min(lats), max(lats), min(lons), max(lons)
    else:
        lat_min = lat_max = lon_min = lon_max = 0.0
    k = math.cos(math.radians((lat_min + lat_max) / 2.0))
    span_x = max((lon_max - lon_min) * k, 1e-9)
    span_y = max(lat_max - lat_min, 1e-9)
    scale = min(_MAP_W / span_x, _MAP_H / span_y)
    map_w = span_x * scale if pts else _MAP_W
    map_h = span_y * scale if pts else 160.0
    width = max(map_w, 520.0) + 2 * _PAD
    height = _HEADER + map_h + _LEGEND_H + 2 * _PAD

    def xy(lat: float, lon: float) -> tuple[float, float]:
        return (_PAD + (lon - lon_min) * k * scale, _HEADER + _PAD + (lat_max - lat) * scale)

    values = {c: float(v) for c, v in counts.items()}
    finite = [v for v in values.values() if math.isfinite(v)]
    vmax = max([max(finite, default=0.0), 0.0])
    top = vmax if vmax > 0 else 1.0

    def frac(v: float) -> float:
        return math.sqrt(max(v, 0.0) / top)

    out = [
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{width:.0f}" height="{height:.0f}" '
        f'viewBox="0 0 {width:.0f} {height:.0f}" font-family="sans-serif" font-size="12">',
        f'<rect x="0" y="0" width="{width:.0f}" height="{height:.0f}" fill="#f4f7fa"/>',
        f'<text x="{_PAD:.0f}" y="{_PAD + 10:.0f}" font-size="18" font-weight="bold">'
        f"{escape(title)}</text>",
    ]
    if not counts:
        out.append(f'<text x="{width / 2:.0f}" y="{_HEADER + _PAD + map_h / 2:.0f}" '
                   f'text-anchor="middle" font-size="16" fill="#555">{escape(empty_text)}</text>')
    out.append('<g stroke="#ffffff" stroke-width="0.6">')
    for cell in sorted(rings):
        v = values[cell]
        fill = ramp_colour(frac(v)) if math.isfinite(v) else NO_VALUE_COLOUR
        ring = " ".join(f"{x:.1f},{y:.1f}" for x, y in (xy(a, b) for a, b in rings[cell]))
        out.append(f'<polygon points="{ring}" fill="{fill}"><title>{escape(cell)}: '
                   f"{_fmt(v)} {escape(units)}</title></polygon>")
    out.append("</g>")
    if places:
        out.append('<g font-size="11">')
        for name, (lat, lon) in places.items():
            x, y = xy(float(lat), float(lon))
            out.append(f'<circle cx="{x:.1f}" cy="{y:.1f}" r="3.5" fill="#1d3557" '
                       f'stroke="#ffffff" stroke-width="1"><title>{escape(name)}</title></circle>')
            out.append(f'<text x="{x + 6:.1f}" y="{y - 5:.1f}" fill="#1d3557" stroke="#ffffff" '
                       f'stroke-width="2.5" paint-order="stroke">{escape(name)}</text>')
        out.append("</g>")
    # legend: a bar of small rectangles, with ticks at round values on the square-root scale
    lx, ly, lw = _PAD, _HEADER + _PAD + map_h + 22.0, 360.0
    out.append(f'<g><text x="{lx:.0f}" y="{ly - 8:.0f}">{escape(units)} '
               f"(colour on a square-root scale)</text>")
    step_w = lw / _LEGEND_STEPS
    for i in range(_LEGEND_STEPS):
        c = ramp_colour((i + 0.5) / _LEGEND_STEPS)
        out.append(f'<rect x="{lx + i * step_w:.1f}" y="{ly:.0f}" width="{step_w + 0.3:.1f}" '
                   f'height="14" fill="{c}"/>')
    for t in _nice_ticks(vmax):
        tx = lx + lw * math.sqrt(t / top)
        out.append(f'<line x1="{tx:.1f}" y1="{ly + 14:.0f}" x2="{tx:.1f}" y2="{ly + 19:.0f}" '
                   f'stroke="#333"/><text x="{tx:.1f}" y="{ly + 31:.0f}" '
                   f'text-anchor="middle">{_fmt(t)}</text>')
    total = sum(finite)
    out.append(f'<text x="{lx + lw + 20:.0f}" y="{ly + 12:.0f}">{len(counts)} cells, '
               f"total {_fmt(total)}, max {_fmt(vmax)}</text></g>")
    out.append("</svg>")
    return "\n".join(out)


def write_hexmap(
    counts: Mapping[str, int | float],
    path: str | Path,
    title: str,
    places: Mapping[str, tuple[float, float]] | None = None,
    *,
    units: str = "pickups per cell",
    empty_text: str = "no pickups",
) -> Path:
    """Write a self-contained HTML page with the SVG picture of ``counts``; return its path."""
    svg = render_svg(counts, title, places, units=units, empty_text=empty_text)
    page = (
        "<!DOCTYPE html>\n"
        '<html lang="en">\n<head>\n<meta charset="utf-8"/>\n'
        f"<title>{escape(title)}</title>\n"
        "<style>body{margin:16px;background:#ffffff;color:#222;font-family:sans-serif}"
        "polygon:hover{stroke:#000;stroke-width:1.5}</style>\n</head>\n<body>\n"
        f"{svg}\n</body>\n</html>\n"
    )
    out = Path(path)
    out.write_text(page, encoding="utf-8")
    return out
