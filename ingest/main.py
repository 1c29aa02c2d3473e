"""``cellpulse ingest``: settings from flags and ``CELLPULSE_*`` variables, wiring of the source,
the Redis store, the dead letters, the tape and metrics around the consumer loop, signals."""

from __future__ import annotations

import argparse
import json
import logging
import os
import re
import signal
import socket
import sys
import threading
from collections.abc import Callable, Mapping
from dataclasses import dataclass, fields
from typing import Any

from featurestore.config import ENV_PREFIX, EngineConfig, env_value

log = logging.getLogger("cellpulse.ingest")

LOG_LEVELS = ("critical", "error", "warning", "info", "debug")


def _flag(text: str) -> bool:
    low = text.strip().lower()
    if low in ("1", "true", "yes", "on"):
        return True
    if low in ("0", "false", "no", "off", ""):
        return False
    raise ValueError("expected true/false")


def _choice(*allowed: str) -> Callable[[str], str]:
    def parse(text: str) -> str:
        if text not in allowed:
            raise ValueError(f"expected one of {', '.join(allowed)}")
        return text
    return parse


@dataclass(frozen=True)
class IngestSettings:
    """Every ``cellpulse ingest`` option (flag dest = field name; env CELLPULSE_<NAME>)."""

    bootstrap: str | None = None
    kafka_client: str = "kafka-python"
    topic: str = "fixes"
    group: str = "cellpulse"
    partitions: str | None = None
    start: str = "earliest"
    redis_url: str | None = None
    history: float = 900.0
    tape: str | None = None
    tape_keep_hours: float | None = None
    from_file: str | None = None
    arrival_from_message: bool = False
    dead_letter_topic: str | None = None
    dead_letter_file: str | None = None
    max_poll_records: int = 500
    session_timeout_ms: int = 10_000
    heartbeat_interval_ms: int = 3_000
    fetch_max_wait_ms: int = 500
    max_records: int | None = None
    idle_exit: float | None = None
    metrics_port: int | None = None
    metrics_host: str = "127.0.0.1"
    log_level: str = "info"


_PARSERS: dict[str, Callable[[str], Any]] = {
    "history": float, "idle_exit": float, "tape_keep_hours": float, "max_poll_records": int,
    "session_timeout_ms": int,
    "heartbeat_interval_ms": int, "fetch_max_wait_ms": int, "max_records": int,
    "metrics_port": int, "arrival_from_message": _flag, "start": _choice("earliest", "latest"),
    "kafka_client": _choice("kafka-python", "confluent"),
    "log_level": _choice(*LOG_LEVELS),
}


def env_name(field: str) -> str:
    return ENV_PREFIX + field.upper()


def resolve_settings(args: argparse.Namespace, environ: Mapping[str, str] | None = None
                     ) -> IngestSettings:
    """Flags, else ``CELLPULSE_<NAME>`` variables, else defaults; readable errors."""
    env = os.environ if environ is None else environ
    values: dict[str, Any] = {}
    for f in fields(IngestSettings):
        given = getattr(args, f.name, None)
        if given is not None and given is not False:
            values[f.name] = given
            continue
        value = env_value(f.name, _PARSERS.get(f.name, str), env)
        if value is not None:
            values[f.name] = value
    s = IngestSettings(**values)
    _check(s)
    return s


def _check(s: IngestSettings) -> None:
    if not s.redis_url:
        raise ValueError(f"say where the state lives: --redis-url redis://HOST:PORT/DB (or "
                         f"{env_name('redis_url')})")
    if s.tape_keep_hours is not None and not s.tape_keep_hours > 0:
        raise ValueError(f"--tape-keep-hours {s.tape_keep_hours:g} must be > 0")
    if s.from_file is None and not s.bootstrap:
        raise ValueError(f"say where the fixes come from: --bootstrap HOST:PORT (or "
                         f"{env_name('bootstrap')}), or --from-file PATH|-")
    if s.kafka_client not in ("kafka-python", "confluent"):
        raise ValueError(f"--kafka-client {s.kafka_client!r}: expected kafka-python or confluent")
    if s.from_file is not None and s.partitions is not None:
        raise ValueError("--partitions is for a Kafka topic, not with --from-file")
    for name in ("max_poll_records", "session_timeout_ms", "heartbeat_interval_ms"):
        if getattr(s, name) <= 0:
            raise ValueError(f"--{name.replace('_', '-')} must be > 0")
    if s.heartbeat_interval_ms >= s.session_timeout_ms:
        raise ValueError("--heartbeat-interval-ms must be below --session-timeout-ms")
    if s.history < 0 or (s.idle_exit is not None and s.idle_exit < 0):
        raise ValueError("--history and --idle-exit must be >= 0")
    if s.max_records is not None and s.max_records <= 0:
        raise ValueError("--max-records must be > 0")


def setup_logging(level: str) -> None:
    logging.basicConfig(level=getattr(logging, level.upper()), stream=sys.stderr,
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    # kafka-python logs every failed connection attempt in several lines; the source logs one
    # readable line per attempt instead (the library's own lines return with --log-level debug)
    if level != "debug":
        for handler in logging.getLogger().handlers:
            handler.addFilter(_quiet_kafka)


def _quiet_kafka(record: logging.LogRecord) -> bool:
    return not record.name.startswith("kafka") or record.levelno >= logging.CRITICAL


class StopFlag:
    """Set by SIGTERM/SIGINT; a second signal interrupts at once."""

    def __init__(self) -> None:
        self.set = False
        self.on_stop: Callable[[], None] | None = None

    def __call__(self) -> bool:
        return self.set

    def handle(self, signum: int, frame: Any) -> None:
        if self.set:
            raise KeyboardInterrupt
        self.set = True
        log.info("%s received: stopping after the batch at hand (again to stop at once)",
                 signal.Signals(signum).name)
        if self.on_stop is not None:
            self.on_stop()

    def install(self) -> None:
        if threading.current_thread() is threading.main_thread():
            signal.signal(signal.SIGTERM, self.handle)
            signal.signal(signal.SIGINT, self.handle)


def run_ingest(args: argparse.Namespace, config: EngineConfig) -> int:
    """The ``cellpulse ingest`` command; prints the final counters as JSON."""
    from featurestore.redis_store import RedisStore
    from ingest.consumer import ConsumerLoop, LoopOptions
    from ingest.dead_letters import (
        ConfluentDeadLetters,
        DeadLetterError,
        FileDeadLetters,
        KafkaDeadLetters,
    )
    from ingest.sources import (
        FileSource,
        KafkaSettings,
        KafkaSource,
        SourceError,
        SourceUnavailable,
        parse_partitions,
    )
    from ingest.stats import ConsumerStats, start_metrics_server

    s = resolve_settings(args)
    setup_logging(s.log_level)
    stop = StopFlag()
    stop.install()
    try:
        store = RedisStore.from_url(s.redis_url, config, history_ms=round(s.history * 1000))
    except ValueError as exc:
        raise ValueError(f"--redis-url {s.redis_url!r}: {exc}") from None
    stats = ConsumerStats()
    if s.metrics_port is not None:
        start_metrics_server(stats, s.metrics_port, s.metrics_host)
        log.info("metrics on http://%s:%d/metrics", s.metrics_host, s.metrics_port)
    source: Any
    if s.from_file is not None:
        try:
            source = FileSource(s.from_file, arrival_from_message=s.arrival_from_message)
        except SourceError as exc:
            raise ValueError(str(exc)) from None
        dl_path = s.dead_letter_file or (
            "cellpulse-stdin.dead-letters.jsonl" if s.from_file == "-"
            else f"{s.from_file}.dead-letters.jsonl")
        dead_letters: Any = FileDeadLetters(dl_path)
        log.info("reading %s; dead letters to %s", source.partition, dl_path)
    else:
        assert s.bootstrap is not None
        settings = KafkaSettings(session_timeout_ms=s.session_timeout_ms,
                                 heartbeat_interval_ms=s.heartbeat_interval_ms,
                                 max_poll_records=s.max_poll_records,
                                 fetch_max_wait_ms=s.fetch_max_wait_ms)
        parts = parse_partitions(s.partitions) if s.partitions is not None else None
        source_class: Any = KafkaSource
        sink_class: Any = KafkaDeadLetters
        if s.kafka_client == "confluent":
            from ingest.confluent_source import ConfluentSource, load_confluent

            try:
                load_confluent()
            except SourceError as exc:
                raise ValueError(f"--kafka-client confluent: {exc}") from None
            source_class, sink_class = ConfluentSource, ConfluentDeadLetters
        try:
            source = source_class(s.bootstrap, s.topic, s.group, partitions=parts,
                                  start=s.start, settings=settings, should_stop=stop)
        except SourceUnavailable as exc:
            log.info("stopped before starting: %s", exc)
            return 0
        except SourceError as exc:
            raise ValueError(str(exc)) from None
        dl_topic = s.dead_letter_topic or f"{s.topic}-dead-letters"
        try:
            dead_letters = sink_class(s.bootstrap, dl_topic)
        except DeadLetterError as exc:
            source.close()
            raise ValueError(str(exc)) from None
        except BaseException:
            source.close()
            raise
        log.info("dead letters to topic %s (Kafka client %s)", dl_topic, s.kafka_client)
    tape = None
    if s.tape:
        from ingest.tape import TapeWriter

        host = re.sub(r"[^A-Za-z0-9_.-]", "-", socket.gethostname())[:80] or "ingest"
        name = f"{host}-{os.getpid()}"  # one writer per process; never clashes
        tape = TapeWriter(s.tape, name, keep_hours=s.tape_keep_hours)
        log.info("tape to %s (writer %s%s)", s.tape, name,
                 "" if s.tape_keep_hours is None else f", hours older than "
                 f"{s.tape_keep_hours:g} h deleted")
    options = LoopOptions(max_poll_records=s.max_poll_records, max_records=s.max_records,
                          idle_exit_s=s.idle_exit)
    loop = ConsumerLoop(source, store, dead_letters, config=config, tape=tape, stats=stats,
                        options=options)
    stop.on_stop = loop.stop
    if stop.set:
        loop.stop()
    loop.run()
    print(json.dumps(stats.as_dict(), indent=2))
    return 0
