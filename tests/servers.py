"""The tests' real servers: re-exported from ``bench.servers``, which the benchmarks (and
`cellpulse bench` from an installed project) share."""

from bench.servers import (  # noqa: F401
    LOOPBACK,
    START_TIMEOUT_S,
    STOP_TIMEOUT_S,
    KafkaBroker,
    RedisServer,
    ServerError,
    create_topic,
    free_port,
    redis_server_binary,
    tansu_binary,
)
