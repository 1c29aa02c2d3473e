"""Engine configuration: every tunable of the feature definitions, in one frozen record.

Values come from defaults, then ``CELLPULSE_*`` environment variables, then flags.
"""

from __future__ import annotations

import dataclasses
import functools
import os
from collections.abc import Callable, Mapping
from dataclasses import dataclass, fields
from typing import Any

ENV_PREFIX = "CELLPULSE_"


@dataclass(frozen=True)
class EngineConfig:
    """The parameters that define the features. Changing one changes the catalog fingerprint."""

    cell_resolution: int = 8
    route_resolution: int = 7
    bucket_s: int = 60
    windows_min: tuple[int, ...] = (5, 15, 60)
    ring_window_min: int = 15
    max_delay_s: float = 300.0
    clock_skew_s: float = 30.0
    earth_radius_m: float = 6_371_008.8
    moving_step_m: float = 10.0
    heading_steps: int = 5
    trip_initial_fixes: int = 5
    now_horizon_s: float = 120.0
    route_days: int = 28
    vehicle_ttl_s: float = 6 * 3600.0
    city_tz: str = "UTC"

    def __post_init__(self) -> None:
        problems = []
        if not 0 <= self.cell_resolution <= 15:
            problems.append("cell_resolution must be 0..15")
        if not 0 <= self.route_resolution <= 15:
            problems.append("route_resolution must be 0..15")
        if self.bucket_s <= 0 or 86400 % self.bucket_s:
            problems.append("bucket_s must be a positive divisor of 86400")
        if not self.windows_min or any(w <= 0 for w in self.windows_min):
            problems.append("windows_min must be positive minutes")
        for w in (*self.windows_min, self.ring_window_min):
            if (w * 60) % self.bucket_s:
                problems.append(f"window {w} min is not a whole number of buckets")
        if self.ring_window_min not in self.windows_min:
            problems.append("ring_window_min must be one of windows_min")
        if self.max_delay_s < 0 or self.clock_skew_s < 0:
            problems.append("max_delay_s and clock_skew_s must be >= 0")
        if self.earth_radius_m <= 0 or self.moving_step_m < 0:
            problems.append("earth_radius_m must be > 0 and moving_step_m >= 0")
        if self.heading_steps < 1 or self.trip_initial_fixes < 2:
            problems.append("heading_steps >= 1 and trip_initial_fixes >= 2")
        if self.route_days < 1 or self.vehicle_ttl_s <= 0:
            problems.append("route_days >= 1 and vehicle_ttl_s > 0")
        try:
            from zoneinfo import ZoneInfo

            ZoneInfo(self.city_tz)
        except Exception:  # noqa: BLE001 - any failure means an unusable zone name
            problems.append(f"city_tz {self.city_tz!r} is not a known IANA time zone")
        if problems:
            raise ValueError("invalid engine configuration: " + "; ".join(problems))

    # --- derived values, in integer milliseconds -------------------------------------------
    @functools.cached_property
    def bucket_ms(self) -> int:
        return self.bucket_s * 1000

    @functools.cached_property
    def max_delay_ms(self) -> int:
        return round(self.max_delay_s * 1000)

    @functools.cached_property
    def clock_skew_ms(self) -> int:
        return round(self.clock_skew_s * 1000)

    @functools.cached_property
    def now_horizon_ms(self) -> int:
        return round(self.now_horizon_s * 1000)

    @functools.cached_property
    def vehicle_ttl_ms(self) -> int:
        return round(self.vehicle_ttl_s * 1000)

    @functools.cached_property
    def longest_window_buckets(self) -> int:
        return max(self.windows_min) * 60 // self.bucket_s

    def window_buckets(self, minutes: int) -> int:
        return minutes * 60 // self.bucket_s

    def describe(self) -> dict[str, Any]:
        """The parameters as plain JSON values (for the catalog and reports)."""
        out = {}
        for f in fields(self):
            v = getattr(self, f.name)
            out[f.name] = list(v) if isinstance(v, tuple) else v
        return out

    def replace(self, **changes: Any) -> EngineConfig:
        return dataclasses.replace(self, **changes)


def _parse(kind: type, text: str) -> Any:
    if kind is tuple:
        return tuple(int(p) for p in text.replace(" ", "").split(",") if p)
    if kind is int:
        return int(text)
    if kind is float:
        return float(text)
    return text


# Field name -> parser kind, from the declared annotations (strings under __future__).
_KINDS: dict[str, type] = {
    f.name: {"int": int, "float": float, "str": str}.get(str(f.type), tuple)
    for f in fields(EngineConfig)
}


def env_value(name: str, parse: Callable[[str], Any], environ: Mapping[str, str]) -> Any:
    """``CELLPULSE_<NAME>`` parsed, or None when unset or empty; a readable error naming the
    variable when it does not parse. Every command's settings come through here."""
    var = ENV_PREFIX + name.upper()
    raw = environ.get(var)
    if raw is None or raw == "":
        return None
    try:
        return parse(raw)
    except ValueError as exc:
        raise ValueError(f"environment variable {var}={raw!r}: {exc}") from None


def config_from_env(
    environ: Mapping[str, str] | None = None, **overrides: Any
) -> EngineConfig:
    """Build a config from ``CELLPULSE_<FIELD>`` variables, then explicit overrides (flags)."""
    env = os.environ if environ is None else environ
    values: dict[str, Any] = {}
    for name, kind in _KINDS.items():
        value = env_value(name, functools.partial(_parse, kind), env)
        if value is not None:
            values[name] = value
    values.update({k: v for k, v in overrides.items() if v is not None})
    return EngineConfig(**values)
