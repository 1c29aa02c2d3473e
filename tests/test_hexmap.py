"""The hexagon picture: one polygon per cell, tooltips, colours, no network, parseable markup."""

from __future__ import annotations

import re
import xml.etree.ElementTree as ET

import h3
import pytest

from replay.hexmap import RAMP, ramp_colour, render_svg, write_hexmap

SVG = "{http://www.w3.org/2000/svg}"
PLACES = {"station": (-33.2, -20.6), "airport": (-33.2279, -20.6906)}


def _cells() -> dict[str, int]:
    centre = h3.latlng_to_cell(-33.2, -20.6, 8)
    ring = sorted(h3.grid_disk(centre, 2))  # 1 + 6 + 12 = 19 cells (H3 docs: k-ring sizes)
    return {c: i * 3 for i, c in enumerate(ring)}


def test_one_polygon_per_cell_with_tooltips() -> None:
    counts = _cells()
    assert len(counts) == 19
    root = ET.fromstring(render_svg(counts, "Pickups 07-09", PLACES))
    polys = root.findall(f".//{SVG}polygon")
    assert len(polys) == 19
    tips = [p.find(f"{SVG}title").text for p in polys]
    for cell, n in counts.items():
        assert f"{cell}: {n} pickups per cell" in tips
    for p in polys:
        assert len(p.get("points").split()) == 6  # hexagons at res 8 near here
    texts = [t.text for t in root.iter(f"{SVG}text")]
    assert "Pickups 07-09" in texts and "station" in texts and "airport" in texts
    assert len(root.findall(f".//{SVG}circle")) == 2


def test_colours_follow_the_ramp() -> None:
    counts = _cells()
    root = ET.fromstring(render_svg(counts, "t"))
    fill = {p.find(f"{SVG}title").text.split(":")[0]: p.get("fill")
            for p in root.iter(f"{SVG}polygon")}
    lo = min(counts, key=counts.get)
    hi = max(counts, key=counts.get)
    assert fill[lo] == "#fffad7" == "#{:02x}{:02x}{:02x}".format(*RAMP[0][1])  # zero is palest
    assert fill[hi] == "#700816" == "#{:02x}{:02x}{:02x}".format(*RAMP[-1][1])
    # square-root scale: a quarter of the maximum sits halfway along the ramp
    assert ramp_colour(0.5) == "#f48d34"
    quarter = render_svg({lo: 1, hi: 4}, "t")
    assert 'fill="#f48d34"' in quarter


def test_projection_keeps_shape() -> None:
    cell = h3.latlng_to_cell(-33.2, -20.6, 7)
    root = ET.fromstring(render_svg({cell: 1}, "t"))
    pts = [tuple(map(float, p.split(","))) for p in
           root.find(f".//{SVG}polygon").get("points").split()]
    xs = [p[0] for p in pts]
    ys = [p[1] for p in pts]
    # a regular-ish hexagon stays about as wide as high (ratio 2/sqrt(3) ~ 1.15 either way)
    ratio = (max(xs) - min(xs)) / (max(ys) - min(ys))
    assert 0.8 < ratio < 1.25


def test_html_is_self_contained_and_parses(tmp_path) -> None:
    out = write_hexmap(_cells(), tmp_path / "map.html", "Port <Veyra> & pickups", PLACES)
    page = out.read_text(encoding="utf-8")
    assert re.findall(r"https?://[^\s\"'<>]+", page) == ["http://www.w3.org/2000/svg"]
    assert "<script" not in page and "<link" not in page and "url(" not in page
    root = ET.fromstring(page.split("\n", 1)[1])  # the page after the doctype line
    assert root.tag == "html"
    assert root.find("head/title").text == "Port <Veyra> & pickups"
    svg = page[page.index("<svg"): page.index("</svg>") + 6]
    assert len(ET.fromstring(svg).findall(f".//{SVG}polygon")) == 19


def test_empty_mapping(tmp_path) -> None:
    out = write_hexmap({}, tmp_path / "empty.html", "Nothing yet")
    page = out.read_text(encoding="utf-8")
    root = ET.fromstring(page[page.index("<svg"): page.index("</svg>") + 6])
    assert root.findall(f".//{SVG}polygon") == []
    assert "no pickups" in [t.text for t in root.iter(f"{SVG}text")]


def test_bad_cell_is_a_clear_error() -> None:
    with pytest.raises(ValueError, match="not an H3 cell id: 'nope'"):
        render_svg({"nope": 1}, "t")
