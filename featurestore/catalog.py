"""The catalog: every feature declared once, with its family, type, window and definition,
and the vector layout (ordered names per family) with a version.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import asdict, dataclass

from featurestore.config import EngineConfig

CATALOG_VERSION = 1
FAMILIES = ("cell", "vehicle", "trip", "route")
# Which families a lookup key names.
KEY_FAMILIES = {"cell": ("cell",), "vehicle_id": ("vehicle", "trip"), "route": ("route",)}


@dataclass(frozen=True)
class Feature:
    """One declared feature."""

    name: str
    family: str
    dtype: str  # "int" | "float" | "str"
    window_min: int | None
    definition: str

    @property
    def empty(self) -> object:
        """The value for a key never seen: 0 for counts, NaN for floats, None for text."""
        return 0 if self.dtype == "int" else (float("nan") if self.dtype == "float" else None)


def _cell_features(cfg: EngineConfig) -> list[Feature]:
    res = cfg.cell_resolution
    out: list[Feature] = []
    for kind, what in (
        ("pickups", "pickups (in-order occupied fixes after a vacant one)"),
        ("dropoffs", "dropoffs (in-order vacant/offline fixes after an occupied one)"),
        ("fixes", "accepted fixes, in order or not"),
    ):
        for w in cfg.windows_min:
            n = cfg.window_buckets(w)
            out.append(Feature(
                f"cell_{kind}_{w}m", "cell", "int", w,
                f"{what} in this res-{res} cell with event time in the {n} buckets of "
                f"{cfg.bucket_s} s ending with T's bucket, arrived by T",
            ))
    h = int(cfg.now_horizon_s)
    out += [
        Feature("cell_vacant_now", "cell", "int", None,
                f"vehicles whose latest in-order fix known at T is in this cell, vacant, "
                f"with event time >= T - {h} s"),
        Feature("cell_occupied_now", "cell", "int", None,
                f"vehicles whose latest in-order fix known at T is in this cell, occupied, "
                f"with event time >= T - {h} s"),
        Feature(f"cell_ring_pickups_{cfg.ring_window_min}m", "cell", "int", cfg.ring_window_min,
                f"sum of cell_pickups_{cfg.ring_window_min}m over grid_disk(cell, 1)"),
        Feature("cell_ring_vacant_now", "cell", "int", None,
                "sum of cell_vacant_now over grid_disk(cell, 1)"),
    ]
    return out


def _vehicle_features(cfg: EngineConfig) -> list[Feature]:
    n = cfg.heading_steps
    return [
        Feature("vehicle_cell", "vehicle", "str", None,
                f"res-{cfg.cell_resolution} cell of the latest in-order fix known at T"),
        Feature("vehicle_status", "vehicle", "str", None, "status of that fix"),
        Feature("vehicle_fix_age_s", "vehicle", "float", None, "T minus that fix's event time, s"),
        Feature("vehicle_speed_mps", "vehicle", "float", None,
                "haversine distance over time between the last two in-order fixes (0 with one)"),
        Feature("vehicle_heading_deg", "vehicle", "float", None,
                f"circular mean of the bearings of the last up to {n} moving steps "
                f"(>= {cfg.moving_step_m:g} m); NaN with none or when undefined (R < 1e-9)"),
        Feature("vehicle_heading_r", "vehicle", "float", None,
                "mean resultant length of those bearings"),
    ]


def _trip_features(cfg: EngineConfig) -> list[Feature]:
    k = cfg.trip_initial_fixes
    return [
        Feature("trip_active", "trip", "int", None, "1 when a trip is in progress at T, else 0"),
        Feature("trip_elapsed_s", "trip", "float", None, "T minus the pickup fix's event time, s"),
        Feature("trip_distance_m", "trip", "float", None,
                "sum of step distances since the pickup fix, m"),
        Feature("trip_displacement_m", "trip", "float", None,
                "haversine distance from the pickup fix to the latest fix, m"),
        Feature("trip_start_cell", "trip", "str", None, "cell of the pickup fix"),
        Feature("trip_initial_heading_deg", "trip", "float", None,
                f"circular mean of the moving-step bearings among the trip's first {k} fixes, "
                "the pickup fix included; NaN with none or when undefined (R < 1e-9)"),
        Feature("trip_fixes", "trip", "int", None,
                "in-order fixes of the trip so far, the pickup fix included"),
    ]


def _route_features(cfg: EngineConfig) -> list[Feature]:
    scope = (f"completed trips from origin to destination res-{cfg.route_resolution} cell "
             f"picked up in this hour of day ({cfg.city_tz}), dropoff arrived by T, "
             f"in the last {cfg.route_days} days of dropoff arrival")
    return [
        Feature("route_trips", "route", "int", cfg.route_days * 1440, f"number of {scope}"),
        Feature("route_mean_duration_s", "route", "float", cfg.route_days * 1440,
                f"mean duration (dropoff minus pickup event time) of {scope}, s"),
        Feature("route_std_duration_s", "route", "float", cfg.route_days * 1440,
                "population standard deviation of those durations, s"),
    ]


class Catalog:
    """The declared features for one engine configuration, and their vector layout."""

    def __init__(self, config: EngineConfig | None = None) -> None:
        self.config = config or EngineConfig()
        self.features: tuple[Feature, ...] = tuple(
            _cell_features(self.config) + _vehicle_features(self.config)
            + _trip_features(self.config) + _route_features(self.config)
        )
        self.by_name = {f.name: f for f in self.features}
        payload = json.dumps(
            {"features": [asdict(f) for f in self.features], "config": self.config.describe()},
            sort_keys=True,
        )
        self.fingerprint = hashlib.sha256(payload.encode()).hexdigest()[:12]
        self.version = f"{CATALOG_VERSION}.{self.fingerprint}"

    def family(self, family: str) -> tuple[Feature, ...]:
        """The features of one family, in vector order."""
        if family not in FAMILIES:
            raise KeyError(f"unknown family {family!r}; families are {', '.join(FAMILIES)}")
        return tuple(f for f in self.features if f.family == family)

    def names(self, *families: str) -> list[str]:
        """Vector layout: names of the given families (all when none), in order."""
        fams = families or FAMILIES
        return [f.name for fam in fams for f in self.family(fam)]

    def empty_vector(self, *families: str) -> dict[str, object]:
        return {f.name: f.empty for fam in families for f in self.family(fam)}

    def to_dict(self) -> dict[str, object]:
        return {
            "version": self.version,
            "catalog_version": CATALOG_VERSION,
            "config": self.config.describe(),
            "families": {fam: self.names(fam) for fam in FAMILIES},
            "features": [asdict(f) for f in self.features],
        }

    def to_text(self) -> str:
        """A readable table for ``cellpulse catalog``."""
        lines = [f"catalog version {self.version}", ""]
        width = max(len(f.name) for f in self.features)
        for fam in FAMILIES:
            lines.append(f"[{fam}]")
            for i, f in enumerate(self.family(fam)):
                win = f"{f.window_min}m" if f.window_min else "-"
                lines.append(f"  {i:>2} {f.name:<{width}}  {f.dtype:<5} {win:>7}  {f.definition}")
            lines.append("")
        return "\n".join(lines)
