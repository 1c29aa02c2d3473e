"""The ``cellpulse`` command line: subcommands over the core, replay and the demo."""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Sequence
from typing import Any

from featurestore.config import ENV_PREFIX, EngineConfig, config_from_env, env_value

EPILOG = (f"Every engine option can also be set with an environment variable {ENV_PREFIX}<NAME>, "
          f"e.g. {ENV_PREFIX}CELL_RESOLUTION=9; flags win over the environment.")


def _engine_flags(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("engine (the feature definitions)")
    g.add_argument("--cell-resolution", type=int, metavar="RES",
                   help="H3 resolution of cells (default 8)")
    g.add_argument("--route-resolution", type=int, metavar="RES",
                   help="H3 resolution of routes (default 7)")
    g.add_argument("--bucket-seconds", type=int, dest="bucket_s",
                   metavar="SECONDS",
                   help="bucket length in seconds (default 60)")
    g.add_argument("--windows", dest="windows_min", metavar="MINUTES,...",
                   type=lambda t: tuple(int(x) for x in t.split(",")),
                   help="cell windows in minutes, comma-separated (default 5,15,60)")
    g.add_argument("--ring-window", type=int, dest="ring_window_min",
                   metavar="MINUTES",
                   help="window of cell_ring_pickups in minutes (default 15)")
    g.add_argument("--max-delay", type=float, dest="max_delay_s", metavar="SECONDS",
                   help="maximum arrival delay in seconds before a fix is too late (default 300)")
    g.add_argument("--clock-skew", type=float, dest="clock_skew_s", metavar="SECONDS",
                   help="allowed device clock lead in seconds (default 30)")
    g.add_argument("--route-days", type=int, metavar="DAYS",
                   help="days of completed trips in route features (default 28)")
    g.add_argument("--vehicle-ttl", type=float, dest="vehicle_ttl_s",
                   metavar="SECONDS",
                   help="seconds without a fix before a vehicle's state is forgotten "
                        "(default 21600)")
    g.add_argument("--city-tz", metavar="ZONE", help="IANA time zone for route hours (default UTC)")


_ENGINE_KEYS = ("cell_resolution", "route_resolution", "bucket_s", "windows_min",
                "ring_window_min", "max_delay_s", "clock_skew_s", "route_days", "vehicle_ttl_s",
                "city_tz")


def engine_config(args: argparse.Namespace) -> EngineConfig:
    return config_from_env(**{k: getattr(args, k, None) for k in _ENGINE_KEYS})


def cmd_catalog(args: argparse.Namespace) -> int:
    from featurestore.catalog import Catalog

    cat = Catalog(engine_config(args))
    if args.json:
        print(json.dumps(cat.to_dict(), indent=2))
    else:
        print(cat.to_text())
    return 0


def cmd_replay(args: argparse.Namespace) -> int:
    if args.to_kafka:
        return _replay_to_kafka(args)
    if not args.out:
        raise ValueError("say where the rows go: --out PATH (a training set) or "
                         "--to-kafka HOST:PORT (push the inputs into a topic)")
    from replay.output import output_format
    from replay.training import replay_labels, replay_trips

    cfg = engine_config(args)
    fmt = output_format(args.out, args.format)
    dead = args.dead_letters or f"{args.out}.dead-letters.parquet"
    common: dict[str, Any] = dict(config=cfg, fmt=fmt, assume_delay_s=args.assume_delay,
                                  sort=args.sort, dead_letters=dead,
                                  progress=not args.no_progress and sys.stderr.isatty())
    if args.labels:
        summary = replay_labels(args.inputs, args.labels, args.out, **common)
    else:
        summary = replay_trips(args.inputs, args.out, after_fixes=args.after_fixes, **common)
    print(json.dumps(summary.as_dict(), indent=2))
    return 0


def _kafka_client_name(text: str) -> str:
    if text not in ("kafka-python", "confluent"):
        raise ValueError("expected kafka-python or confluent")
    return text


def _replay_to_kafka(args: argparse.Namespace) -> int:
    """``replay --to-kafka``: push the inputs into a topic in arrival order."""
    import os

    from replay.to_kafka import ensure_topic, parse_speed, push_to_kafka

    topic = args.topic or os.environ.get(ENV_PREFIX + "TOPIC") or "fixes"
    given = [flag for flag, on in (("--out", args.out), ("--labels", args.labels),
                                   ("--trips", args.trips), ("--format", args.format),
                                   ("--dead-letters", args.dead_letters),
                                   ("--after-fixes", args.after_fixes != 1)) if on]
    if given:
        raise ValueError(f"{', '.join(given)}: not with --to-kafka (a push writes no training "
                         "set; the live path dead-letters what it rejects)")
    speed = parse_speed(args.speed)
    created = None
    if args.create_topic is not None:
        created, _parts = ensure_topic(args.to_kafka, topic, args.create_topic)
    client = args.kafka_client or env_value(
        "kafka_client", _kafka_client_name, os.environ) or "kafka-python"
    summary = push_to_kafka(args.inputs, args.to_kafka, topic, speed=speed,
                            assume_delay_s=args.assume_delay, sort=args.sort,
                            progress=not args.no_progress and sys.stderr.isatty(),
                            kafka_client=client)
    out = summary.as_dict()
    if created is not None:
        out["topic_created"] = created
    print(json.dumps(out, indent=2))
    return 1 if summary.failed else 0


def cmd_simulate(args: argparse.Namespace) -> int:
    from ingest.citysim import CityConfig, write_jsonl, write_parquet

    cfg = CityConfig(seed=args.seed, vehicles=args.vehicles, day=args.day, hours=args.hours)
    writer = write_parquet if args.out.endswith(".parquet") else write_jsonl
    n = writer(args.out, cfg)
    print(json.dumps({"out": args.out, "rows": n, "seed": args.seed}))
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    from replay.demo import run_demo

    return run_demo(out_dir=args.out_dir, seed=args.seed, vehicles=args.vehicles,
                    hours=args.hours, config=engine_config(args))


def cmd_serve(args: argparse.Namespace) -> int:
    from featurestore.server import serve

    return serve(redis_url=args.redis_url, host=args.host, port=args.port,
                 history_s=args.history, log_level=args.log_level, config=engine_config(args))


def cmd_ingest(args: argparse.Namespace) -> int:
    from ingest.main import run_ingest

    return run_ingest(args, engine_config(args))


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="cellpulse",
        description="Streaming feature store for live vehicle positions: H3 cell, vehicle, "
                    "trip and route features, served live and rebuilt point-in-time correct.",
        epilog=EPILOG,
    )
    from featurestore import __version__

    parser.add_argument("--version", action="version", version=f"cellpulse {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("catalog", help="print the declared features and vector layout",
                       epilog=EPILOG)
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    _engine_flags(p)
    p.set_defaults(func=cmd_catalog)

    p = sub.add_parser(
        "replay", help="rebuild features from recorded files into a training set, or "
                  "push a recorded day into Kafka",
        description="Process recorded fixes in arrival order (ties in file order) through the "
                    "engine and write a training set: label rows joined as of their ts "
                    "(--labels), or one row per completed trip (--trips, the default). "
                    "With --to-kafka, push the recorded fixes into a Kafka topic instead, "
                    "in arrival order (key = vehicle_id, timestamp = arrival_ts), to run a "
                    "recorded day through the live path.",
        epilog=EPILOG)
    p.add_argument("inputs", nargs="+", metavar="INPUT",
                   help="recorded fixes: .parquet, .csv or .jsonl files")
    p.add_argument("--out", help="training set path (.parquet, or .csv); required unless "
                                 "--to-kafka")
    mode = p.add_mutually_exclusive_group()
    mode.add_argument("--labels", help="label table with a ts column and key columns")
    mode.add_argument("--trips", action="store_true", help="one row per completed trip")
    p.add_argument("--after-fixes", type=int, default=1, metavar="N",
                   help="with --trips: features as of the arrival of the trip's N-th fix "
                        "(1 = the pickup fix)")
    p.add_argument("--format", choices=("parquet", "csv"),
                   help="output format (default from the --out name, else parquet)")
    p.add_argument("--assume-delay", type=float, metavar="SECONDS",
                   help="arrival_ts = event_ts + SECONDS for rows without arrival_ts")
    p.add_argument("--sort", action="store_true",
                   help="sort inputs by arrival first (spills to a temp dir; for unordered files)")
    p.add_argument("--dead-letters", metavar="PATH",
                   help="where rejected rows go (default OUT.dead-letters.parquet)")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    k = p.add_argument_group("push into Kafka (instead of writing a training set)")
    k.add_argument("--to-kafka", metavar="HOST:PORT",
                   help="a Kafka bootstrap server: send each row with an arrival time to "
                        "--topic in arrival order (rows without one are skipped and counted)")
    k.add_argument("--topic", metavar="NAME",
                   help=f"topic to push to (default: {ENV_PREFIX}TOPIC, else 'fixes')")
    k.add_argument("--speed", default="max", metavar="FACTOR|max",
                   help="pace: 1 = real time, 60 = one recorded hour per minute, max = as fast "
                        "as the broker takes them (default max)")
    k.add_argument("--create-topic", type=int, metavar="PARTITIONS",
                   help="create the topic with this many partitions if it does not exist")
    k.add_argument("--kafka-client", choices=("kafka-python", "confluent"),
                   help=f"producer library: kafka-python (default) or confluent (librdkafka, "
                        f"far faster; pip install \"cellpulse[fast]\"); also "
                        f"{ENV_PREFIX}KAFKA_CLIENT")
    _engine_flags(p)
    p.set_defaults(func=cmd_replay)

    p = sub.add_parser("simulate", help="write a recorded day of the demo city to a file")
    p.add_argument("--out", required=True, help=".jsonl (raw messages) or .parquet")
    p.add_argument("--seed", type=int, default=7)
    p.add_argument("--vehicles", type=int, default=200)
    p.add_argument("--day", default="2026-06-01", help="simulated date (UTC)")
    p.add_argument("--hours", type=float, default=24.0)
    p.set_defaults(func=cmd_simulate)

    p = sub.add_parser("demo", help="generate a day in the demo city, replay it, report",
                       description="Generates a seeded day in the fictional city, runs it "
                                   "through the engine on the embedded store (no servers), "
                                   "prints a report and writes a training set and a map.",
                       epilog=EPILOG)
    p.add_argument("--out-dir", default="demo-out", help="where to write files (default demo-out)")
    p.add_argument("--seed", type=int, default=7)
    p.add_argument("--vehicles", type=int, default=200)
    p.add_argument("--hours", type=float, default=24.0)
    _engine_flags(p)
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser(
        "serve", help="serve feature vectors over HTTP (JSON API, OpenAPI, Prometheus metrics)",
        description="Answer vector lookups from the Redis state the consumers write: "
                    "/v1/vehicles/ID, /v1/cells/CELL, /v1/routes/ORIGIN/DEST, POST /v1/vectors "
                    "(up to 1,000 keys), /v1/catalog, /v1/health, /metrics; schema at "
                    "/openapi.json, docs at /docs. Use the consumers' engine options: every "
                    "response carries the catalog version to check it.",
        epilog=EPILOG + f" Also {ENV_PREFIX}REDIS_URL, {ENV_PREFIX}HOST, {ENV_PREFIX}PORT, "
               f"{ENV_PREFIX}HISTORY and {ENV_PREFIX}LOG_LEVEL.")
    p.add_argument("--redis-url", metavar="URL",
                   help="redis://HOST:PORT/DB of the consumers' state (memory:// for an empty "
                        "in-process store)")
    p.add_argument("--host", help="address to listen on (default 127.0.0.1)")
    p.add_argument("--port", type=int, help="port to listen on (default 8000)")
    p.add_argument("--history", type=float, metavar="SECONDS",
                   help="answer lookups at most this far before the watermark (default: as "
                        "far as the consumers keep history, which they record in the state; "
                        "a larger value is capped at theirs)")
    p.add_argument("--log-level", choices=("critical", "error", "warning", "info", "debug"),
                   help="server log level; debug also logs every request (default info)")
    _engine_flags(p)
    p.set_defaults(func=cmd_serve)

    _ingest_parser(sub)
    from bench.runner import add_parser as _bench_parser  # the benchmarks' runner, bench/

    _bench_parser(sub)
    return parser


def _ingest_parser(sub: Any) -> None:
    p = sub.add_parser(
        "ingest", help="consume fixes from Kafka (or a file) into the Redis state",
        description="Read position messages (key = vehicle_id, value = JSON fix, arrival = the "
                    "record timestamp) from a Kafka topic as a member of a consumer group, "
                    "apply them with the shared engine to Redis together with their offsets in "
                    "one atomic step per batch, and send rejected messages to a dead-letter "
                    "topic. Resumes from the offsets stored in Redis; stops cleanly on "
                    "SIGTERM/SIGINT.",
        epilog=f"Every option can also be set with an environment variable {ENV_PREFIX}<NAME> "
               f"(e.g. {ENV_PREFIX}BOOTSTRAP, {ENV_PREFIX}REDIS_URL, {ENV_PREFIX}TOPIC, "
               f"{ENV_PREFIX}GROUP, {ENV_PREFIX}HISTORY, {ENV_PREFIX}CELL_RESOLUTION); flags "
               "win over the environment.")
    g = p.add_argument_group("source")
    g.add_argument("--bootstrap", metavar="HOST:PORT[,HOST:PORT]", help="Kafka bootstrap servers")
    g.add_argument("--kafka-client", choices=("kafka-python", "confluent"),
                   help="Kafka client library: kafka-python (default) or confluent "
                        "(librdkafka, faster; pip install \"cellpulse[fast]\")")
    g.add_argument("--topic", metavar="NAME", help="topic of the fixes (default fixes)")
    g.add_argument("--group", metavar="NAME", help="consumer group (default cellpulse)")
    g.add_argument("--partitions", metavar="N,N,...",
                   help="read exactly these partitions (static assignment, no group "
                        "rebalancing) instead of joining the group")
    g.add_argument("--start", choices=("earliest", "latest"),
                   help="where to begin in partitions that the state has never applied "
                        "(default earliest)")
    g.add_argument("--from-file", metavar="PATH|-",
                   help="read JSON Lines from a file (or - for stdin) instead of Kafka")
    g.add_argument("--arrival-from-message", action="store_true", default=None,
                   help="with --from-file: arrival = the message's arrival_ts (a recorded "
                        "day), not the time the line is read")
    g = p.add_argument_group("state and outputs")
    g.add_argument("--redis-url", metavar="URL", help="redis://HOST:PORT/DB of the state")
    g.add_argument("--history", type=float, metavar="SECONDS",
                   help="seconds of history the state keeps for earlier as-of reads "
                        "(default 900)")
    g.add_argument("--dead-letter-topic", metavar="NAME",
                   help="topic for rejected messages (default TOPIC-dead-letters)")
    g.add_argument("--dead-letter-file", metavar="PATH",
                   help="with --from-file: JSON Lines file for rejected messages (default "
                        "PATH.dead-letters.jsonl)")
    g.add_argument("--tape", metavar="DIR",
                   help="also record every message received as hourly Parquet files in DIR "
                        "(readable by cellpulse replay)")
    g.add_argument("--tape-keep-hours", type=float, metavar="HOURS",
                   help="with --tape: delete tape hours older than HOURS (positions are "
                        "personal data; default: keep)")
    g.add_argument("--metrics-port", type=int, metavar="PORT",
                   help="serve Prometheus metrics on PORT (path /metrics)")
    g.add_argument("--metrics-host", metavar="ADDR",
                   help="address of the metrics server (default 127.0.0.1; 0.0.0.0 in a "
                        "container)")
    g = p.add_argument_group("consumer tuning")
    g.add_argument("--max-poll-records", type=int, metavar="N",
                   help="most messages per batch (default 500)")
    g.add_argument("--session-timeout-ms", type=int, metavar="MS",
                   help="consumer-group session timeout (default 10000)")
    g.add_argument("--heartbeat-interval-ms", type=int, metavar="MS",
                   help="consumer-group heartbeat interval (default 3000)")
    g.add_argument("--fetch-max-wait-ms", type=int, metavar="MS",
                   help="longest wait of a fetch for new messages (default 500)")
    g.add_argument("--max-records", type=int, metavar="N",
                   help="stop after applying N messages")
    g.add_argument("--idle-exit", type=float, metavar="SECONDS",
                   help="stop after SECONDS without a message")
    g.add_argument("--log-level", choices=("critical", "error", "warning", "info", "debug"),
                   help="log level (default info)")
    _engine_flags(p)
    p.set_defaults(func=cmd_ingest)


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except (ValueError, OSError) as exc:
        print(f"cellpulse {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"cellpulse {args.command}: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
