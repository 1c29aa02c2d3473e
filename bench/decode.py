"""Decode and validation: messages per second of the live consumer's decode beside JSON floors.

    python -m bench.decode                # a demo day: 200 vehicles, 8 hours, about 100 k messages
    python -m bench.decode --quick        # 45 vehicles, 4 hours

On the same generated messages (the demo's day, with its share of broken ones), each keyed as
the live topic keys them (key = vehicle_id, record timestamp = the recorded arrival):

- ``decode_records(records)``: the call the consumer makes per batch (the shortcut for the
  common valid shape, the pydantic schema for everything else);
- ``decode_record(..., fast=False)`` per record: the pure pydantic path the consumer used before;
- floors: ``orjson.loads`` alone and ``msgspec.json.decode`` alone (no schema, no Fix), each
  catching the errors of the broken messages.

Every case works as the consumer does: batches of ``--batch`` records (the consumer's default
``max_poll_records``), each batch's results dropped before the next. (One list of the whole day
is slower for every case that builds objects the garbage collector tracks -- Fix, dicts -- as
each collection walks everything still alive.) Each case runs ``--repeat`` times, the cases
taking turns, and the best pass counts: the machine is shared, so single passes are noisy. The
ratio is decode / the orjson floor.
"""

from __future__ import annotations

import argparse
import gc
import json
import sys
import time
from collections.abc import Callable
from typing import Any

import msgspec
import orjson

from bench.common import BenchEnv, BenchOptions, Figure
from featurestore.schema import Fix, decode_record, decode_records
from ingest.citysim import CityConfig, simulate
from ingest.consumer import LoopOptions
from ingest.records import SourceRecord

FULL = {"vehicles": 200, "hours": 8.0}
QUICK = {"vehicles": 45, "hours": 4.0}
BATCH = LoopOptions().max_poll_records


def _log(text: str) -> None:
    print(f"[decode] {text}", file=sys.stderr, flush=True)


def demo_records(seed: int, vehicles: int, hours: float) -> list[SourceRecord]:
    """The demo day as live records: key = vehicle_id, timestamp = arrival (broken messages
    without one take the previous record's), four partitions by key as the topic has."""
    out: list[SourceRecord] = []
    offsets = [0, 0, 0, 0]
    last = None
    for line in simulate(CityConfig(seed=seed, vehicles=vehicles, hours=hours)):
        try:
            d = orjson.loads(line)
        except orjson.JSONDecodeError:
            d = None
        d = d if isinstance(d, dict) else {}
        arrival = d.get("arrival_ts")
        ts = round(arrival * 1000) if isinstance(arrival, float) else last
        last = ts
        vid = d.get("vehicle_id")
        key = vid.encode() if isinstance(vid, str) else None
        p = hash(key) % 4 if key else 0
        out.append(SourceRecord(f"fixes:{p}", offsets[p], ts, key, line))
        offsets[p] += 1
    return out


def _orjson_floor(recs: list[SourceRecord]) -> list[Any]:
    loads, error = orjson.loads, orjson.JSONDecodeError
    out: list[Any] = []
    for r in recs:
        try:
            out.append(loads(r.value))
        except error:
            out.append(None)
    return out


def _msgspec_floor(recs: list[SourceRecord]) -> list[Any]:
    decode, error = msgspec.json.Decoder().decode, msgspec.DecodeError
    out: list[Any] = []
    for r in recs:
        try:
            out.append(decode(r.value))
        except error:
            out.append(None)
    return out


def _pydantic(recs: list[SourceRecord]) -> list[Any]:
    return [decode_record(r.key, r.value, r.timestamp_ms, fast=False) for r in recs]


def _consumer(recs: list[SourceRecord]) -> list[Any]:
    return decode_records(recs)


CASES: dict[str, Callable[[list[SourceRecord]], list[Any]]] = {
    "consumer": _consumer,
    "pydantic": _pydantic,
    "orjson": _orjson_floor,
    "msgspec": _msgspec_floor,
}


def measure(recs: list[SourceRecord], repeat: int, batch: int) -> dict[str, float]:
    """Best messages/s of each case over ``repeat`` passes, the cases taking turns."""
    best = dict.fromkeys(CASES, float("inf"))
    batches = [recs[lo:lo + batch] for lo in range(0, len(recs), batch)]
    for _ in range(repeat):
        for name, case in CASES.items():
            gc.collect()
            t0 = time.perf_counter()
            for part in batches:
                case(part)
            best[name] = min(best[name], time.perf_counter() - t0)
    return {name: len(recs) / s for name, s in best.items()}


def run(opts: BenchOptions, env: BenchEnv, repeat: int | None = None, batch: int = BATCH
        ) -> list[Figure]:
    del env  # no servers
    size = QUICK if opts.quick else FULL
    recs = demo_records(opts.seed, size["vehicles"], size["hours"])
    fast, reference = decode_records(recs), _pydantic(recs)
    if fast != reference:  # the property test proves it in general; this day, here
        raise AssertionError("decode_records differs from the pydantic path on the demo day")
    rejected = sum(not isinstance(x, Fix) for x in reference)
    share = rejected / len(recs)
    _log(f"{len(recs):,} messages ({size['vehicles']} vehicles, {size['hours']:g} h), "
         f"{rejected:,} rejected ({share:.2%})")
    rates = measure(recs, repeat or (3 if opts.quick else 5), batch)
    for name, rate in rates.items():
        _log(f"{name:9s} {rate:12,.0f} msgs/s")
    on = f"{len(recs):,} demo messages, {share:.2%} rejected, batches of {batch}"
    floor, floor_what = rates["orjson"], "orjson.loads alone (no schema)"
    common = {"messages": len(recs), "rejected": rejected, "batch": batch, "input": on}
    return [
        Figure("decode", "decode + validate: the consumer's decode_records", rates["consumer"],
               "msgs/s", floor, floor_what,
               extra={**common, "msgspec_floor_msgs_s": round(rates["msgspec"]),
                      "pydantic_msgs_s": round(rates["pydantic"]),
                      "speedup_vs_pydantic": round(rates["consumer"] / rates["pydantic"], 2)}),
        Figure("decode", "decode + validate: pure pydantic path (before)", rates["pydantic"],
               "msgs/s", floor, floor_what, extra=common),
        Figure("decode", "msgspec.json.decode alone", rates["msgspec"], "msgs/s", floor,
               floor_what, extra=common),
        Figure("decode", "orjson.loads alone", rates["orjson"], "msgs/s", extra=common),
    ]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="45 vehicles, 4 hours")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--repeat", type=int, help="passes per case; the best counts (default 5)")
    ap.add_argument("--batch", type=int, default=BATCH,
                    help=f"records per decode call (default {BATCH}, the consumer's)")
    ap.add_argument("--json", action="store_true", help="print the figures as JSON")
    args = ap.parse_args()
    figures = run(BenchOptions(quick=args.quick, seed=args.seed), BenchEnv(), args.repeat,
                  args.batch)
    if args.json:
        print(json.dumps([f.as_dict() for f in figures], indent=2))
        return
    for f in figures:
        ratio = f"{f.ratio:.2f} x the orjson floor" if f.ratio is not None else "(the floor)"
        print(f"{f.value:12,.0f} {f.unit}  {ratio:24s}  {f.what}")
    extra = figures[0].extra
    print(f"on {extra['input']}: decode_records is {extra['speedup_vs_pydantic']:.2f} x "
          "the pure pydantic path")


if __name__ == "__main__":
    main()
