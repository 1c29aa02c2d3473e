"""What every benchmark module returns, so `cellpulse bench` can print one table.

Each module in ``bench/`` that `cellpulse bench` runs exposes

    def run(opts: BenchOptions, env: BenchEnv) -> list[Figure]

and keeps its own ``main()`` for running it alone (``python -m bench.<name>``). A figure is
measured beside its floor in the same run; ``ratio`` is figure / floor oriented so that higher
is better for rates and lower is better for latencies/sizes (see ``better``).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any


@dataclass(frozen=True)
class Figure:
    """One measured figure, with the floor it is compared against (when it has one)."""

    bench: str  # module short name: replay, ingest, lookup, memory, decode
    what: str  # readable description of the case
    value: float
    unit: str  # "fixes/s", "ms", "bytes", "MB", "msgs/s", "s"
    floor: float | None = None  # the floor measured in the same run, same unit
    floor_what: str = ""  # what the floor is
    better: str = "higher"  # "higher" (rates) or "lower" (latencies, sizes)
    target: str = ""  # the target for this figure, as text ("≥ 500 k/s", "≤ 1 ms")
    met: bool | None = None  # whether the target is met (None: no target)
    extra: dict[str, Any] = field(default_factory=dict)

    @property
    def ratio(self) -> float | None:
        """value / floor for rates, floor / value for latencies (1.0 = as fast as the floor)."""
        if not self.floor or not self.value:
            return None
        return self.value / self.floor if self.better == "higher" else self.floor / self.value

    def as_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["ratio"] = self.ratio
        return d


@dataclass(frozen=True)
class BenchOptions:
    """Size knobs shared by all benchmarks; ``quick`` shrinks every case for a smoke run."""

    quick: bool = False
    data_dir: str | None = None  # cache for generated demo days
    seed: int = 7
    kafka_clients: tuple[str, ...] = ("kafka-python", "confluent")


@dataclass
class BenchEnv:
    """Servers shared by the benchmarks of one run (started by the runner, stopped by PID).

    ``redis_url`` of a redis-server on loopback; ``bootstrap`` of the Tansu broker. Either may
    be None when the runner was asked not to start it; a benchmark that needs it then skips.
    """

    redis_url: str | None = None
    bootstrap: str | None = None
    redis_pid: int | None = None
    broker_pid: int | None = None
    machine: dict[str, Any] = field(default_factory=dict)
