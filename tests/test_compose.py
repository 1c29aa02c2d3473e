"""The Compose deployment (compose/compose.yaml), checked without Docker: its services, the
KRaft and AOF settings, and that the cellpulse commands and CELLPULSE_* variables it uses are
ones the command line accepts."""

from __future__ import annotations

import base64
import shlex
from dataclasses import fields
from pathlib import Path

import pytest
import yaml

from featurestore.cli import build_parser
from featurestore.config import ENV_PREFIX, EngineConfig

COMPOSE_DIR = Path(__file__).resolve().parent.parent / "compose"
COMPOSE = COMPOSE_DIR / "compose.yaml"


@pytest.fixture(scope="module")
def services() -> dict:
    doc = yaml.safe_load(COMPOSE.read_text())
    return doc["services"]


def _argv(command) -> list[str]:
    return shlex.split(command) if isinstance(command, str) else [str(a) for a in command]


def _subparsers() -> dict:
    parser = build_parser()
    for action in parser._actions:  # argparse keeps subcommands in a private action
        if action.__class__.__name__ == "_SubParsersAction":
            return dict(action.choices)
    return {}


def test_services_present(services):
    assert {"kafka", "redis", "kafka-topics", "ingest", "serve"} <= set(services)


def test_every_image_is_pinned_and_every_build_exists(services):
    for name, svc in services.items():
        assert "image" in svc or "build" in svc, name
        if "build" in svc:
            build = svc["build"]
            context = (COMPOSE_DIR / build["context"]).resolve()
            assert (context / build.get("dockerfile", "Dockerfile")).is_file(), name
            assert (context / "pyproject.toml").is_file(), name  # the project is the context
        if "image" in svc and "build" not in svc:
            repo, _, tag = svc["image"].rpartition(":")
            assert repo and tag and tag != "latest", f"{name}: pin {svc['image']!r}"


def test_kafka_runs_in_kraft_mode(services):
    kafka = services["kafka"]
    assert kafka["image"].startswith("apache/kafka:")
    env = {k: str(v) for k, v in kafka["environment"].items()}
    assert not any("ZOOKEEPER" in k for k in env)
    assert set(env["KAFKA_PROCESS_ROLES"].split(",")) == {"broker", "controller"}
    node = env["KAFKA_NODE_ID"]
    voters = env["KAFKA_CONTROLLER_QUORUM_VOTERS"].split(",")
    assert voters == [f"{node}@kafka:9093"]
    controller = env["KAFKA_CONTROLLER_LISTENER_NAMES"]
    listeners = dict(item.split("://", 1) for item in env["KAFKA_LISTENERS"].split(","))
    assert listeners[controller] == ":9093"
    protocols = dict(item.split(":") for item in env["KAFKA_LISTENER_SECURITY_PROTOCOL_MAP"]
                     .split(","))
    assert set(listeners) <= set(protocols)
    # the services reach the broker at kafka:9092 through an advertised listener
    advertised = dict(item.split("://", 1) for item in env["KAFKA_ADVERTISED_LISTENERS"]
                      .split(","))
    assert "kafka:9092" in advertised.values()
    assert controller not in advertised
    # a KRaft cluster id is 16 bytes in URL-safe base64 without padding (22 characters)
    assert len(base64.urlsafe_b64decode(env["CLUSTER_ID"] + "==")) == 16
    assert env["KAFKA_OFFSETS_TOPIC_REPLICATION_FACTOR"] == "1"  # one broker
    assert env["KAFKA_AUTO_CREATE_TOPICS_ENABLE"] == "false"
    assert any(v.endswith(":" + env["KAFKA_LOG_DIRS"]) for v in kafka["volumes"])


def test_redis_keeps_an_append_only_file(services):
    redis = services["redis"]
    assert redis["image"].split(":")[0] == "redis" and redis["image"].split(":")[1][0] == "7"
    argv = _argv(redis["command"])
    assert argv[0] == "redis-server"
    assert argv[argv.index("--appendonly") + 1] == "yes"
    assert argv[argv.index("--maxmemory-policy") + 1] == "noeviction"
    assert any(str(v).endswith(":/data") for v in redis["volumes"])


def test_topics_are_created_before_the_consumers(services):
    script = " ".join(_argv(services["kafka-topics"]["command"]))
    for topic in ("fixes", "fixes-dead-letters"):
        assert f"--topic {topic} " in script
    assert script.count("--create --if-not-exists") == 2
    deps = services["ingest"]["depends_on"]
    assert deps["kafka-topics"]["condition"] == "service_completed_successfully"
    assert deps["redis"]["condition"] == "service_healthy"
    assert services["kafka-topics"]["depends_on"]["kafka"]["condition"] == "service_healthy"


@pytest.mark.parametrize("service,subcommand", [("ingest", "ingest"), ("serve", "serve")])
def test_service_command_is_accepted_by_the_cli(services, service, subcommand):
    argv = _argv(services[service]["command"])
    assert argv[:2] == ["cellpulse", subcommand]
    # where the services point: the compose network's kafka and redis
    if "--bootstrap" in argv:
        assert argv[argv.index("--bootstrap") + 1] == "kafka:9092"
    assert argv[argv.index("--redis-url") + 1] == "redis://redis:6379/0"
    subs = _subparsers()
    if subcommand not in subs:
        pytest.skip(f"`cellpulse {subcommand}` is not registered in featurestore.cli yet; "
                    "its flags cannot be checked")
    known = {opt for action in subs[subcommand]._actions for opt in action.option_strings}
    unknown = [a for a in argv[2:] if a.startswith("--") and a.split("=")[0] not in known]
    assert unknown == [], f"cellpulse {subcommand} does not accept {unknown}"
    args = build_parser().parse_args(argv[1:])  # parses exactly as the container will
    assert args.redis_url == "redis://redis:6379/0"


@pytest.mark.parametrize("service,subcommand", [("ingest", "ingest"), ("serve", "serve")])
def test_service_environment_names_are_known_settings(services, service, subcommand):
    env = services[service].get("environment") or {}
    names = [k[len(ENV_PREFIX):].lower() for k in env if k.startswith(ENV_PREFIX)]
    assert names, f"{service} sets no {ENV_PREFIX}* variable"
    subs = _subparsers()
    if subcommand not in subs:
        pytest.skip(f"`cellpulse {subcommand}` is not registered in featurestore.cli yet")
    dests = {action.dest for action in subs[subcommand]._actions}
    engine = {f.name for f in fields(EngineConfig)}
    assert [n for n in names if n not in dests | engine] == []
