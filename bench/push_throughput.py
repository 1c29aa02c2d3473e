"""Throughput of ``cellpulse replay --to-kafka`` (replay.to_kafka) into the Tansu test broker.

    python -m bench.push_throughput                 # a generated day of 60 vehicles
    python -m bench.push_throughput --vehicles 200

Figures, each on the same JSON Lines day: the floor (reading, decoding and ordering the rows
with the replay readers, no Kafka), then the push with kafka-python's default producer
batching (linger 0 ms, 16 KiB batches) and with the settings replay.to_kafka uses. Each push
goes to a fresh 8-partition topic at full speed (--speed max). Not a test.
"""

from __future__ import annotations

import argparse
import tempfile
import time
import uuid
from pathlib import Path

from ingest.citysim import CityConfig, write_jsonl
from replay.to_kafka import PRODUCER_CONFIG, push_to_kafka
from replay.training import _ordered_items


def floor(path: Path) -> tuple[float, int]:
    t0 = time.perf_counter()
    n = sum(1 for it in _ordered_items([path], None, False) if it.arrival_ms is not None)
    return time.perf_counter() - t0, n


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--vehicles", type=int, default=60)
    ap.add_argument("--hours", type=float, default=24.0)
    ap.add_argument("--seed", type=int, default=7)
    args = ap.parse_args()
    from bench.servers import KafkaBroker

    with tempfile.TemporaryDirectory() as tmp, KafkaBroker() as broker:
        day = Path(tmp) / "day.jsonl"
        write_jsonl(day, CityConfig(seed=args.seed, vehicles=args.vehicles, hours=args.hours))
        floor_s, rows = floor(day)
        print(f"{rows:,} rows with an arrival time; broker {broker.bootstrap}")
        print(f"{'what':44} {'seconds':>8} {'rows/s':>10} {'ratio to floor':>15}")
        print(f"{'floor: read, decode, order (no Kafka)':44} {floor_s:8.2f} "
              f"{rows / floor_s:10,.0f} {1.0:15.2f}")
        default = {"linger_ms": 0, "batch_size": 16384}
        for label, cfg in (("push, kafka-python default batching", default),
                           (f"push, linger {PRODUCER_CONFIG['linger_ms']} ms, batch "
                            f"{PRODUCER_CONFIG['batch_size'] // 1024} KiB (used)", {})):
            topic = f"bench-push-{uuid.uuid4().hex[:8]}"
            broker.create_topic(topic, 8)
            s = push_to_kafka([day], broker.bootstrap, topic, producer_config=cfg)
            assert s.delivered == rows, (s.delivered, rows)
            print(f"{label:44} {s.seconds:8.2f} {s.rows_per_s:10,.0f} "
                  f"{floor_s / s.seconds:15.2f}", flush=True)


if __name__ == "__main__":
    main()
