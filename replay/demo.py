"""``cellpulse demo``: a seeded day in the demo city, replayed on the embedded store, reported."""

from __future__ import annotations

import math
import sys
import time
from collections import Counter
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from featurestore.catalog import Catalog
from featurestore.cells import cell_of
from featurestore.config import EngineConfig
from featurestore.geometry import haversine_m
from featurestore.lookup import RouteQuery
from replay.session import ReplaySession
from replay.training import replay_trips

SAMPLE_HOURS = (8.5, 18.0)


def _ms(day: str, hour: float) -> int:
    base = datetime.fromisoformat(day).replace(tzinfo=timezone.utc)
    return int(base.timestamp() * 1000 + hour * 3_600_000)


def _nearest_place(cell: str, places: dict[str, tuple[float, float]]) -> str:
    import h3

    lat, lon = h3.cell_to_latlng(cell)
    name, (plat, plon) = min(places.items(),
                             key=lambda kv: haversine_m(lat, lon, kv[1][0], kv[1][1]))
    return f"{name} ({haversine_m(lat, lon, plat, plon) / 1000:.1f} km)"


def _fmt(v: Any) -> str:
    if isinstance(v, float):
        return "nan" if math.isnan(v) else f"{v:.2f}"
    return "-" if v is None else str(v)


def run_demo(out_dir: str | Path = "demo-out", seed: int = 7, vehicles: int = 200,
             hours: float = 24.0, config: EngineConfig | None = None,
             stream: Any = None) -> int:
    """Generate, replay, report; returns the process exit status."""
    from ingest.citysim import CITY_NAME, PLACES, CityConfig, write_jsonl
    from replay.hexmap import write_hexmap

    out = stream or sys.stdout
    cfg = config or EngineConfig()
    catalog = Catalog(cfg)
    d = Path(out_dir)
    d.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    city = CityConfig(seed=seed, vehicles=vehicles, hours=hours)
    day_path = d / "day.jsonl"
    lines = write_jsonl(day_path, city)
    t_gen = time.perf_counter() - t0

    pickups: Counter[str] = Counter()
    samples: list[tuple[str, str, int, dict[str, object]]] = []
    station = cell_of(*PLACES[_pick(PLACES, "station")], cfg.cell_resolution)
    places_for_samples = [_pick(PLACES, k) for k in ("station", "old", "beach", "airport")]

    def prepare(session: ReplaySession) -> None:
        names = list(PLACES)
        labels: dict[tuple[str, str], str] = {}
        for a in names:
            for b in names:
                key = (cell_of(*PLACES[a], cfg.route_resolution),
                       cell_of(*PLACES[b], cfg.route_resolution))
                if a != b and key[0] != key[1]:
                    labels.setdefault(key, f"{a} -> {b}")
        pairs = [RouteQuery(o, d) for o, d in labels]
        fleet = [f"veh-{i:04d}" for i in range(40)]
        cells = [cell_of(*PLACES[p], cfg.cell_resolution) for p in places_for_samples]
        for h in SAMPLE_HOURS:
            if h > hours:
                continue
            at = _ms(city.day, h)

            def answer(vv: list, cv: list, rv: list, at: int = at) -> None:
                for p, c, vec in zip(places_for_samples, cells, cv, strict=True):
                    samples.append(("cell", f"{p} {c}", at, vec))
                busy = [(v, vec) for v, vec in zip(fleet, vv, strict=True)
                        if vec["trip_active"]]
                if busy:
                    samples.append(("vehicle", busy[0][0], at, busy[0][1]))
                ranked = sorted(zip(pairs, rv, strict=True),
                                key=lambda qv: -int(qv[1]["route_trips"]))
                for q, vec in ranked[:2]:
                    if vec["route_trips"]:
                        samples.append(("route", labels[(q.origin_cell, q.dest_cell)], at, vec))

            session.ask(at, fleet, cells, pairs, answer)

    def count(result: Any) -> None:
        pickups.update(result.pickup_cells)

    t1 = time.perf_counter()
    summary = replay_trips([day_path], d / "trips.parquet", config=cfg, after_fixes=1,
                           dead_letters=d / "dead-letters.parquet", on_batch=count,
                           prepare=prepare, progress=stream is None and sys.stderr.isatty())
    t_replay = time.perf_counter() - t1
    map_path = write_hexmap(dict(pickups), d / "pickups.html",
                            f"{CITY_NAME}: pickups per res-{cfg.cell_resolution} cell, "
                            f"{city.day}", PLACES)
    total = time.perf_counter() - t0

    s = summary.stats
    w = out.write
    w(f"cellpulse demo: {CITY_NAME}, seed {seed}, {vehicles} vehicles, {hours:g} h of "
      f"{city.day}\n")
    w(f"  generated {lines:,} messages in {t_gen:.1f} s -> {day_path}\n")
    w(f"  replayed on the embedded store in {t_replay:.1f} s "
      f"({summary.rows / t_replay:,.0f} messages/s)\n\n")
    w(f"messages: {s['received']:,} received, {s['accepted']:,} accepted "
      f"({s['in_order']:,} in order, {s['out_of_order']:,} out of order), "
      f"{s['rejected_total']:,} rejected\n")
    for reason, n in s["rejected"].items():
        w(f"  rejected {reason:<20} {n:>7,}\n")
    w(f"  dead letters (raw bytes kept) -> {summary.dead_letters}\n\n")
    w("busiest cells by pickups over the day:\n")
    for cell, n in pickups.most_common(5):
        w(f"  {cell}  {n:>5} pickups  near {_nearest_place(cell, PLACES)}\n")
    w(f"\nsample vectors (catalog {catalog.version}):\n")
    for family, key, at, vec in samples:
        when = datetime.fromtimestamp(at / 1000, tz=timezone.utc).strftime("%H:%M")
        shown = {k: v for k, v in vec.items() if not k.endswith("_5m")}
        w(f"  [{family} {key} as of {when}] "
          + ", ".join(f"{k}={_fmt(v)}" for k, v in shown.items()) + "\n")
    w(f"\ntraining set: {summary.training_rows:,} completed trips -> {summary.out}\n")
    w(f"  (features as of each pickup's arrival; labels duration_s, dest_cell, distance_m; "
      f"skipped {dict(summary.skipped)})\n")
    w(f"map of pickups per hexagon -> {map_path}\n")
    w(f"station cell {station}; done in {total:.1f} s\n")
    return 0


def _pick(places: dict[str, tuple[float, float]], word: str) -> str:
    for name in places:
        if word in name.lower():
            return name
    return next(iter(places))
