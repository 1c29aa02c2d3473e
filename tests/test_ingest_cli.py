"""``cellpulse ingest`` as users run it: a file through the CLI with a tape that replay reads back
identically, configuration from the environment, and readable errors."""

from __future__ import annotations

import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import orjson
import pyarrow.parquet as pq
import pytest
from ingest_support import KAFKA_CLIENTS, replayed
from servers import free_port

from featurestore.config import EngineConfig
from ingest.citysim import CityConfig, write_jsonl

CLI = [sys.executable, "-m", "featurestore.cli"]


@pytest.fixture(scope="module")
def day(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("cli") / "day.jsonl"
    write_jsonl(path, CityConfig(seed=5, vehicles=40, hours=1.5))
    return path


def _run(argv: list[str], env: dict[str, str] | None = None, timeout: float = 60
         ) -> subprocess.CompletedProcess:
    return subprocess.run([*CLI, *argv], capture_output=True, timeout=timeout,
                          env={**os.environ, **(env or {})})


def _same_rows(a, b) -> bool:
    if a.column_names != b.column_names or a.num_rows != b.num_rows:
        return False
    for name in a.column_names:
        for x, y in zip(a[name].to_pylist(), b[name].to_pylist(), strict=True):
            if isinstance(x, float) and isinstance(y, float) and math.isnan(x) and math.isnan(y):
                continue
            if x != y:
                return False
    return True


def test_a_file_with_a_tape_replays_to_the_same_training_set(day: Path, tmp_path: Path) -> None:
    tape, dead = tmp_path / "tape", tmp_path / "dead.jsonl"
    got = _run(["ingest", "--from-file", str(day), "--arrival-from-message", "--redis-url",
                "memory://", "--tape", str(tape), "--dead-letter-file", str(dead)])
    assert got.returncode == 0, got.stderr.decode()[-2000:]
    summary = orjson.loads(got.stdout)
    lines = sum(1 for x in day.read_bytes().splitlines() if x.strip())
    assert summary["received"] == lines
    assert summary["received"] == summary["accepted"] + summary["rejected_total"]
    assert len(dead.read_bytes().splitlines()) == summary["rejected_total"] > 0
    assert sorted(p.parent.name for p in tape.rglob("*.parquet")) == [
        "2026-06-01T00", "2026-06-01T01"]  # hourly files of the arrival hours

    from_tape = _run(["replay", str(tape), "--trips", "--out", str(tmp_path / "a.parquet")])
    from_file = _run(["replay", str(day), "--trips", "--out", str(tmp_path / "b.parquet")])
    assert from_tape.returncode == 0 and from_file.returncode == 0
    a, b = orjson.loads(from_tape.stdout), orjson.loads(from_file.stdout)
    assert a["engine"] == b["engine"]
    assert a["engine"]["accepted"] == summary["accepted"]
    assert a["engine"]["rejected"] == summary["rejected"]
    ta, tb = pq.read_table(tmp_path / "a.parquet"), pq.read_table(tmp_path / "b.parquet")
    assert ta.num_rows > 0 and _same_rows(ta, tb)


def test_tape_hours_past_the_retention_are_deleted(day: Path, tmp_path: Path) -> None:
    tape = tmp_path / "tape"
    base = ["ingest", "--from-file", str(day), "--arrival-from-message", "--redis-url",
            "memory://", "--tape", str(tape), "--dead-letter-file", str(tmp_path / "d.jsonl")]
    bad = _run([*base, "--tape-keep-hours", "0"])
    assert bad.returncode == 2 and "--tape-keep-hours 0 must be > 0" in bad.stderr.decode()
    # the recorded day (2026-06-01) ended long before now by the wall clock: with a 1-hour
    # retention every hour it wrote is deleted again once closed
    got = _run([*base, "--tape-keep-hours", "1"])
    assert got.returncode == 0, got.stderr.decode()[-2000:]
    assert orjson.loads(got.stdout)["received"] > 0
    assert not list(tape.rglob("*.parquet"))


def test_settings_from_the_environment_and_flags_win(day: Path, tmp_path: Path) -> None:
    env = {"CELLPULSE_REDIS_URL": "memory://", "CELLPULSE_FROM_FILE": str(day),
           "CELLPULSE_ARRIVAL_FROM_MESSAGE": "1", "CELLPULSE_MAX_RECORDS": "100",
           "CELLPULSE_DEAD_LETTER_FILE": str(tmp_path / "d.jsonl"),
           "CELLPULSE_MAX_DELAY_S": "1"}  # an engine option: nearly every fix is too late
    got = _run(["ingest", "--max-records", "250"], env)
    assert got.returncode == 0, got.stderr.decode()[-2000:]
    summary = orjson.loads(got.stdout)
    assert summary["received"] == 250  # the flag won over CELLPULSE_MAX_RECORDS
    head = tmp_path / "head.jsonl"
    head.write_bytes(b"".join(day.read_bytes().splitlines(keepends=True)[:250]))
    _, strict = replayed(head, EngineConfig(max_delay_s=1.0))
    _, default = replayed(head)
    assert summary["rejected"].get("too_late", 0) == strict.rejected["too_late"]
    assert strict.rejected["too_late"] > default.rejected["too_late"]


def test_a_bad_redis_url_is_one_readable_line() -> None:
    got = _run(["ingest", "--bootstrap", "127.0.0.1:1", "--redis-url", "http://nowhere/"])
    assert got.returncode == 2
    err = got.stderr.decode().strip()
    assert len(err.splitlines()) == 1
    assert err.startswith("cellpulse ingest: error: --redis-url 'http://nowhere/':")
    got = _run(["ingest", "--bootstrap", "127.0.0.1:1"], {"CELLPULSE_REDIS_URL": ""})
    assert got.returncode == 2
    assert "--redis-url" in got.stderr.decode()


# what each client's retry log says, and how many "unreachable" lines to wait for
RETRY_TEXT = {"kafka-python": ("backoff", 2), "confluent": ("trying again in", 1)}


@pytest.mark.parametrize("client", KAFKA_CLIENTS)
def test_an_unreachable_broker_is_named_and_retried_until_sigterm(tmp_path: Path,
                                                                 client: str) -> None:
    port = free_port()  # nothing listens there
    log = tmp_path / "err.log"
    retry_text, lines = RETRY_TEXT[client]
    with open(log, "wb") as fh:
        proc = subprocess.Popen([*CLI, "ingest", "--kafka-client", client, "--bootstrap",
                                 f"127.0.0.1:{port}", "--redis-url", "memory://"],
                                stdout=subprocess.DEVNULL, stderr=fh)
    try:
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline and log.read_text().count("unreachable") < lines:
            time.sleep(0.05)
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=30) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    text = log.read_text()
    assert f"broker 127.0.0.1:{port} unreachable" in text
    assert retry_text in text
    assert "SIGTERM received" in text
