"""Counters of the consumer loop, and their export as Prometheus metrics.

Every message of an applied batch is counted once: ``received == accepted + sum(rejected)``
(by reason: the decode reasons and the engine's too_late / duplicate / from_future). Messages
of batches that were not applied (refused as stale, or dropped on a lost connection) are read
again and counted then; ``dropped`` counts those readings.
"""

from __future__ import annotations

import time
from collections import Counter, deque
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from typing import Any

RATE_WINDOW_S = 10.0


@dataclass
class ConsumerStats:
    """Running totals of one consumer process."""

    received: int = 0
    accepted: int = 0
    rejected: Counter = field(default_factory=Counter)
    batches: int = 0
    last_batch_size: int = 0
    last_batch_seconds: float = 0.0
    last_batch_at: float | None = None  # wall-clock seconds
    dead_letters: int = 0
    dropped: int = 0  # records read but not applied (stale batch, lost connection, shutdown)
    stale_batches: int = 0
    reconnects: Counter = field(default_factory=Counter)  # "kafka" / "redis" / "dead_letters"
    lag: dict[str, int] = field(default_factory=dict)  # partition -> end offset - applied
    applied: dict[str, int] = field(default_factory=dict)  # partition -> next offset applied
    started_at: float = field(default_factory=time.time)
    clock: Callable[[], float] = field(default=time.monotonic, repr=False, compare=False)
    _window: deque = field(default_factory=deque, repr=False, compare=False)

    def record_batch(self, size: int, accepted: int, rejected: Mapping[str, int],
                     seconds: float) -> None:
        self.received += size
        self.accepted += accepted
        self.rejected.update(rejected)
        self.batches += 1
        self.last_batch_size = size
        self.last_batch_seconds = seconds
        self.last_batch_at = time.time()
        now = self.clock()
        self._window.append((now, size))
        self._trim(now)

    def _trim(self, now: float) -> None:
        w = self._window
        while w and w[0][0] < now - RATE_WINDOW_S:
            w.popleft()

    def fixes_per_second(self) -> float:
        """Messages applied per second over the last ``RATE_WINDOW_S`` seconds."""
        now = self.clock()
        self._trim(now)
        if not self._window:
            return 0.0
        span = max(now - self._window[0][0], 1.0)
        return sum(n for _, n in self._window) / span

    @property
    def rejected_total(self) -> int:
        return sum(self.rejected.values())

    def as_dict(self) -> dict[str, Any]:
        return {
            "received": self.received,
            "accepted": self.accepted,
            "rejected": dict(sorted(self.rejected.items())),
            "rejected_total": self.rejected_total,
            "batches": self.batches,
            "dead_letters": self.dead_letters,
            "dropped": self.dropped,
            "stale_batches": self.stale_batches,
            "reconnects": dict(sorted(self.reconnects.items())),
            "lag": dict(sorted(self.lag.items())),
            "fixes_per_second": round(self.fixes_per_second(), 1),
        }


def metric_families(stats: ConsumerStats, prefix: str = "cellpulse_ingest") -> Iterator[Any]:
    """Prometheus metric families for the stats, computed at scrape time."""
    from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily

    def counter(name: str, doc: str, value: float) -> CounterMetricFamily:
        return CounterMetricFamily(f"{prefix}_{name}", doc, value=value)

    yield counter("received", "Messages in applied batches", stats.received)
    yield counter("accepted", "Messages accepted into the state", stats.accepted)
    rej = CounterMetricFamily(f"{prefix}_rejected", "Messages rejected, by reason",
                              labels=["reason"])
    for reason, n in sorted(stats.rejected.items()):
        rej.add_metric([reason], n)
    yield rej
    yield counter("batches", "Batches applied", stats.batches)
    yield counter("dead_letters", "Dead letters stored (a crash may repeat one)",
                  stats.dead_letters)
    yield counter("dropped", "Messages read but not applied (read again later)", stats.dropped)
    yield counter("stale_batches", "Batches refused because their offsets were already applied",
                  stats.stale_batches)
    rec = CounterMetricFamily(f"{prefix}_reconnects", "Reconnections after a lost server",
                              labels=["server"])
    for server, n in sorted(stats.reconnects.items()):
        rec.add_metric([server], n)
    yield rec
    yield GaugeMetricFamily(f"{prefix}_last_batch_size", "Messages in the last applied batch",
                            value=stats.last_batch_size)
    yield GaugeMetricFamily(f"{prefix}_last_batch_seconds",
                            "Seconds from decode to applied state of the last batch",
                            value=stats.last_batch_seconds)
    yield GaugeMetricFamily(f"{prefix}_fixes_per_second",
                            f"Messages applied per second over the last {RATE_WINDOW_S:g} s",
                            value=stats.fixes_per_second())
    lag = GaugeMetricFamily(f"{prefix}_lag", "End offset minus applied offset, by partition",
                            labels=["partition"])
    for part, n in sorted(stats.lag.items()):
        lag.add_metric([part], n)
    yield lag


class ConsumerCollector:
    """A prometheus_client collector over a ConsumerStats (register it with a registry)."""

    def __init__(self, stats: ConsumerStats, prefix: str = "cellpulse_ingest") -> None:
        self.stats = stats
        self.prefix = prefix

    def collect(self) -> Iterator[Any]:
        yield from metric_families(self.stats, self.prefix)


def register_metrics(stats: ConsumerStats, registry: Any = None) -> ConsumerCollector:
    """Expose the stats in a Prometheus registry (the default one when None)."""
    from prometheus_client import REGISTRY

    collector = ConsumerCollector(stats)
    (registry if registry is not None else REGISTRY).register(collector)
    return collector


def start_metrics_server(stats: ConsumerStats, port: int, addr: str = "127.0.0.1") -> None:
    """Serve /metrics for the stats on ``addr:port`` from a background thread."""
    from prometheus_client import CollectorRegistry, start_http_server

    registry = CollectorRegistry()
    register_metrics(stats, registry)
    start_http_server(port, addr=addr, registry=registry)
