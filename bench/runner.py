"""`cellpulse bench`: start the test servers, run every benchmark, print one table.

The runner starts a redis-server and the Tansu broker on loopback (``bench.servers``, the same
starters the tests use), calls ``run(opts, env)`` of each benchmark module in turn, stops the
servers by PID, and prints every figure beside its floor, the ratio and the issue's target.
A module that is missing or has no ``run`` is reported "not available"; one that fails is
reported with its error and the others still run. Benchmarks are not tests: the exit code is 0
even when targets are missed (a "targets missed" summary says which); it is 2 only when the
run could not start (bad options, no server).
"""

from __future__ import annotations

import argparse
import importlib
import json
import os
import platform
import subprocess
import sys
import time
import traceback
from collections.abc import Callable, Mapping, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from bench.common import BenchEnv, BenchOptions, Figure

# short name -> module; the order they run in
MODULES: dict[str, str] = {
    "replay": "bench.replay_throughput",
    "ingest": "bench.ingest_throughput",
    "lookup": "bench.lookup_latency",
    "memory": "bench.memory",
    "decode": "bench.decode",
}
NEEDS_REDIS = {"ingest", "lookup", "memory"}
NEEDS_BROKER = {"ingest", "lookup"}
CLIENT_LIBRARIES = ("redis", "kafka-python", "confluent-kafka", "crc32c", "orjson", "msgspec",
                    "pydantic", "numpy", "pyarrow", "h3", "fastapi", "uvicorn", "httpx")

OK, NOT_AVAILABLE, FAILED = "ok", "not available", "failed"


@dataclass
class ModuleResult:
    """How one benchmark module went."""

    name: str
    module: str
    status: str  # ok, not available, failed
    detail: str = ""
    seconds: float = 0.0
    figures: list[Figure] = field(default_factory=list)


@dataclass
class BenchReport:
    machine: dict[str, Any]
    options: dict[str, Any]
    results: list[ModuleResult]
    started: str = ""
    seconds: float = 0.0

    @property
    def figures(self) -> list[Figure]:
        return [f for r in self.results for f in r.figures]

    @property
    def missed(self) -> list[Figure]:
        return [f for f in self.figures if f.met is False]

    def as_dict(self) -> dict[str, Any]:
        return {
            "started": self.started,
            "seconds": round(self.seconds, 1),
            "machine": self.machine,
            "options": self.options,
            "modules": [{"name": r.name, "module": r.module, "status": r.status,
                         "detail": r.detail, "seconds": round(r.seconds, 1),
                         "figures": len(r.figures)} for r in self.results],
            "figures": [f.as_dict() for f in self.figures],
            "targets_missed": [f.what for f in self.missed],
        }


# ------------------------------------------------------------------------------------------
# The machine
# ------------------------------------------------------------------------------------------
def _first_line(argv: Sequence[str]) -> str:
    try:
        out = subprocess.run(argv, capture_output=True, text=True, timeout=10)
    except (OSError, subprocess.TimeoutExpired) as exc:
        return f"unknown ({exc.__class__.__name__})"
    text = (out.stdout or out.stderr).strip()
    return text.splitlines()[0] if text else "unknown"


def _cpu_model() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def _ram_gib() -> float | None:
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal:"):
                return round(int(line.split()[1]) / 1024 / 1024, 1)
    except OSError:
        pass
    return None


def _version(dist: str) -> str | None:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version(dist)
    except PackageNotFoundError:
        return None


def machine_description() -> dict[str, Any]:
    """CPU, cores, RAM, OS, Python, the servers' versions and the client libraries'."""
    from bench.servers import ServerError, redis_server_binary, tansu_binary

    desc: dict[str, Any] = {
        "cpu": _cpu_model(),
        "cores": os.cpu_count(),
        "ram_gib": _ram_gib(),
        "os": platform.platform(),
        "python": platform.python_version(),
    }
    try:
        line = _first_line([redis_server_binary(), "--version"])
        # "Redis server v=7.0.15 sha=... malloc=jemalloc-5.3.0 ..." -> "redis-server 7.0.15"
        fields = dict(p.split("=", 1) for p in line.split() if "=" in p)
        desc["redis_server"] = (f"redis-server {fields['v']} ({fields.get('malloc', '?')})"
                                if "v" in fields else line)
    except ServerError as exc:
        desc["redis_server"] = f"missing: {exc}"
    try:
        desc["tansu"] = _first_line([tansu_binary(), "--version"])
    except ServerError as exc:
        desc["tansu"] = f"missing: {exc}"
    desc["libraries"] = {name: v for name in CLIENT_LIBRARIES if (v := _version(name))}
    return desc


def machine_line(m: Mapping[str, Any]) -> str:
    libs = ", ".join(f"{k} {v}" for k, v in m.get("libraries", {}).items())
    return (f"{m.get('cpu')}, {m.get('cores')} cores, {m.get('ram_gib')} GiB RAM, "
            f"{m.get('os')}; Python {m.get('python')}; {m.get('redis_server')}; "
            f"Tansu {m.get('tansu')}; {libs}")


# ------------------------------------------------------------------------------------------
# Running the modules
# ------------------------------------------------------------------------------------------
def _log(msg: str) -> None:
    print(f"[bench] {msg}", file=sys.stderr, flush=True)


def _error_text(exc: BaseException) -> str:
    frames = traceback.extract_tb(exc.__traceback__)
    where = f" (at {Path(frames[-1].filename).name}:{frames[-1].lineno})" if frames else ""
    text = str(exc) or exc.__class__.__name__
    return f"{exc.__class__.__name__}: {text}{where}"


def run_module(name: str, module: str, opts: BenchOptions, env: BenchEnv,
               importer: Callable[[str], Any] = importlib.import_module,
               show_traceback: bool = False) -> ModuleResult:
    """Import ``module`` and call its ``run``; never raises (except KeyboardInterrupt)."""
    try:
        mod = importer(module)
    except ModuleNotFoundError as exc:
        if exc.name == module or (exc.name and module.startswith(exc.name + ".")):
            return ModuleResult(name, module, NOT_AVAILABLE, f"no module {module}")
        return ModuleResult(name, module, NOT_AVAILABLE,
                            f"{module} needs {exc.name}, which is not installed")
    except Exception as exc:  # noqa: BLE001 - a broken module must not stop the others
        if show_traceback:
            traceback.print_exc()
        return ModuleResult(name, module, FAILED, f"import failed: {_error_text(exc)}")
    run = getattr(mod, "run", None)
    if not callable(run):
        return ModuleResult(name, module, NOT_AVAILABLE, f"{module} has no run(opts, env)")
    if name in NEEDS_REDIS and env.redis_url is None:
        return ModuleResult(name, module, NOT_AVAILABLE, "needs redis-server, which did not start")
    if name in NEEDS_BROKER and env.bootstrap is None:
        return ModuleResult(name, module, NOT_AVAILABLE, "needs the Tansu broker, which did "
                                                         "not start")
    t0 = time.perf_counter()
    try:
        figures = list(run(opts, env) or [])
    except Exception as exc:  # noqa: BLE001 - report it and carry on with the next module
        if show_traceback:
            traceback.print_exc()
        return ModuleResult(name, module, FAILED, _error_text(exc), time.perf_counter() - t0)
    bad = [f for f in figures if not isinstance(f, Figure)]
    if bad:
        return ModuleResult(name, module, FAILED,
                            f"run() returned {type(bad[0]).__name__}, not Figure",
                            time.perf_counter() - t0)
    return ModuleResult(name, module, OK, f"{len(figures)} figures", time.perf_counter() - t0,
                        figures)


def parse_only(text: str | None) -> list[str]:
    """``replay,memory`` -> the names in run order; a readable error for an unknown name."""
    if not text:
        return list(MODULES)
    wanted = [w.strip() for w in text.split(",") if w.strip()]
    unknown = [w for w in wanted if w not in MODULES]
    if unknown:
        raise ValueError(f"unknown benchmark {', '.join(unknown)}; choose from "
                         f"{', '.join(MODULES)}")
    return [n for n in MODULES if n in wanted]


def run_all(names: Sequence[str], opts: BenchOptions, *, start_servers: bool = True,
            show_traceback: bool = False,
            importer: Callable[[str], Any] = importlib.import_module) -> BenchReport:
    """Start the servers the chosen modules need, run the modules, stop the servers."""
    from bench.servers import KafkaBroker, RedisServer, ServerError

    started = time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime())
    t0 = time.perf_counter()
    _log("describing the machine")
    env = BenchEnv(machine=machine_description())
    servers: list[Any] = []
    results: list[ModuleResult] = []
    try:
        if start_servers and NEEDS_REDIS.intersection(names):
            try:
                redis = RedisServer()
                redis.start()
                servers.append(redis)
                env.redis_url, env.redis_pid = redis.url, redis.pid
                _log(f"redis-server on {redis.url} (pid {redis.pid})")
            except ServerError as exc:
                _log(f"redis-server did not start: {exc}")
        if start_servers and NEEDS_BROKER.intersection(names):
            try:
                broker = KafkaBroker()
                broker.start(timeout_s=30)
                servers.append(broker)
                env.bootstrap, env.broker_pid = broker.bootstrap, broker.pid
                _log(f"Tansu broker on {broker.bootstrap} (pid {broker.pid})")
            except ServerError as exc:
                _log(f"Tansu broker did not start: {exc}")
        for i, name in enumerate(names, 1):
            module = MODULES[name]
            _log(f"[{i}/{len(names)}] {name} ({module}) ...")
            res = run_module(name, module, opts, env, importer, show_traceback)
            results.append(res)
            _log(f"[{i}/{len(names)}] {name}: {res.status}"
                 f"{' - ' + res.detail if res.detail else ''} ({res.seconds:.1f} s)")
    finally:
        for server in reversed(servers):
            server.close()  # SIGTERM by PID, then SIGKILL
    options = asdict(opts)
    options["only"] = list(names)
    return BenchReport(env.machine, options, results, started, time.perf_counter() - t0)


# ------------------------------------------------------------------------------------------
# Formatting
# ------------------------------------------------------------------------------------------
def fmt_number(x: float | None) -> str:
    if x is None:
        return ""
    ax = abs(x)
    if ax >= 1e6:
        return f"{x / 1e6:.2f} M"
    if ax >= 1e4:
        return f"{x / 1e3:.1f} k"
    if ax >= 100:
        return f"{x:,.0f}"
    if ax >= 1:
        return f"{x:.2f}"
    return f"{x:#.3g}"


def fmt_ratio(r: float | None) -> str:
    return "" if r is None else f"{r:.2f}×"


def fmt_met(met: bool | None) -> str:
    return "" if met is None else ("yes" if met else "NO")


def rows(figures: Sequence[Figure]) -> list[list[str]]:
    """The table's rows: benchmark, what, figure, floor, ratio, target, met."""
    out = []
    for f in figures:
        floor = ""
        if f.floor is not None:
            floor = f"{fmt_number(f.floor)} {f.unit}"
            if f.floor_what:
                floor += f" ({f.floor_what})"
        out.append([f.bench, f.what, f"{fmt_number(f.value)} {f.unit}", floor,
                    fmt_ratio(f.ratio), f.target, fmt_met(f.met)])
    return out


HEADER = ["bench", "what", "figure", "floor", "ratio", "target", "met"]


def markdown(report: BenchReport) -> str:
    """A README-ready section: the machine, then one table row per figure."""
    esc = lambda s: s.replace("|", "\\|")  # noqa: E731
    lines = [f"Measured {report.started} with `cellpulse bench"
             f"{' --quick' if report.options.get('quick') else ''}` on: "
             f"{machine_line(report.machine)}.", "",
             "| " + " | ".join(HEADER) + " |", "|" + "---|" * len(HEADER)]
    for row in rows(report.figures):
        if row[6] == "NO":
            row[6] = "**no**"
        lines.append("| " + " | ".join(esc(c) for c in row) + " |")
    absent = [r for r in report.results if r.status != OK]
    if absent:
        lines.append("")
        lines += [f"- {r.name}: {r.status} ({r.detail})" for r in absent]
    return "\n".join(lines) + "\n"


def text_table(report: BenchReport) -> str:
    """The console table, then the modules that did not run and the targets missed."""
    body = rows(report.figures)
    widths = [max([len(h)] + [len(r[i]) for r in body]) for i, h in enumerate(HEADER)]
    widths[1] = min(widths[1], 70)
    widths[3] = min(widths[3], 40)

    def line(cells: Sequence[str]) -> str:
        return "  ".join(c.ljust(w) if i < 2 else c.rjust(w) if i in (2, 4) else c.ljust(w)
                         for i, (c, w) in enumerate(zip(cells, widths, strict=True))).rstrip()

    out = [line(HEADER), line(["-" * w for w in widths])]
    out += [line(r) for r in body] or ["(no figures)"]
    out.append("")
    for r in report.results:
        out.append(f"{r.name:8s} {r.status}{': ' + r.detail if r.detail else ''}"
                   f" ({r.seconds:.1f} s)")
    missed = report.missed
    out.append("")
    if missed:
        out.append(f"targets missed: {len(missed)} of "
                   f"{sum(1 for f in report.figures if f.met is not None)}")
        out += [f"  - {f.bench}: {f.what}: {fmt_number(f.value)} {f.unit} (target {f.target})"
                for f in missed]
    elif any(f.met is not None for f in report.figures):
        out.append("targets missed: none")
    failed = [r.name for r in report.results if r.status != OK]
    if failed:
        out.append(f"not run: {', '.join(failed)}")
    return "\n".join(out)


# ------------------------------------------------------------------------------------------
# Command line
# ------------------------------------------------------------------------------------------
def add_parser(sub: Any) -> argparse.ArgumentParser:
    """Add the ``bench`` subcommand to ``cellpulse``'s subparsers."""
    from featurestore.config import ENV_PREFIX

    p = sub.add_parser(
        "bench", help="run the benchmarks (figures beside floors measured in the same run)",
        description="Start a redis-server and the Tansu broker on loopback, run every "
                    "benchmark (" + ", ".join(MODULES) + ") and print each figure beside its "
                    "floor, the ratio and the target. Exits 0 even when targets are missed "
                    "(benchmarks are not tests). Needs the test extra (Tansu, crc32c).",
        epilog=f"Also {ENV_PREFIX}BENCH_ONLY, {ENV_PREFIX}BENCH_QUICK (1/0), "
               f"{ENV_PREFIX}BENCH_DATA_DIR, {ENV_PREFIX}BENCH_JSON, {ENV_PREFIX}BENCH_MARKDOWN, "
               f"{ENV_PREFIX}BENCH_SEED, {ENV_PREFIX}BENCH_KAFKA_CLIENTS; flags win.")
    p.add_argument("--only", metavar="NAMES",
                   help="comma-separated benchmarks to run (default all: "
                        + ",".join(MODULES) + ")")
    p.add_argument("--quick", action="store_true", default=None,
                   help="smoke sizes: every case shrunk to seconds (figures not comparable)")
    p.add_argument("--data-dir", metavar="DIR",
                   help="cache for generated demo days (default a directory under the temp dir)")
    p.add_argument("--json", metavar="PATH", help="write every figure and the machine as JSON")
    p.add_argument("--markdown", metavar="PATH", help="write a README-ready table")
    p.add_argument("--seed", type=int, help="seed of generated data (default 7)")
    p.add_argument("--kafka-clients", metavar="NAMES",
                   help="Kafka clients the ingest benchmark compares "
                        "(default kafka-python,confluent)")
    p.add_argument("--traceback", action="store_true",
                   help="print the full traceback of a benchmark that fails")
    p.set_defaults(func=cmd_bench)
    return p


def _flag_bool(text: str) -> bool:
    low = text.strip().lower()
    if low in ("1", "true", "yes", "on"):
        return True
    if low in ("0", "false", "no", "off"):
        return False
    raise ValueError("expected 1/0, true/false, yes/no or on/off")


def options_from(args: argparse.Namespace, environ: Mapping[str, str] | None = None
                 ) -> tuple[list[str], BenchOptions, str | None, str | None]:
    """The modules, options and output paths from flags, then ``CELLPULSE_BENCH_*``."""
    from featurestore.config import env_value

    env = os.environ if environ is None else environ

    def pick(flag: Any, name: str, parse: Callable[[str], Any]) -> Any:
        return flag if flag is not None else env_value(name, parse, env)

    names = parse_only(pick(args.only, "bench_only", str))
    quick = bool(pick(args.quick, "bench_quick", _flag_bool))
    data_dir = pick(args.data_dir, "bench_data_dir", str)
    seed = pick(args.seed, "bench_seed", int)
    clients = pick(args.kafka_clients, "bench_kafka_clients", str)
    kw: dict[str, Any] = {"quick": quick, "data_dir": data_dir}
    if seed is not None:
        kw["seed"] = seed
    if clients:
        kw["kafka_clients"] = tuple(c.strip() for c in clients.split(",") if c.strip())
    return (names, BenchOptions(**kw), pick(args.json, "bench_json", str),
            pick(args.markdown, "bench_markdown", str))


def cmd_bench(args: argparse.Namespace) -> int:
    names, opts, json_path, md_path = options_from(args)  # ValueError -> readable, exit 2
    if opts.data_dir:
        Path(opts.data_dir).mkdir(parents=True, exist_ok=True)
    report = run_all(names, opts, show_traceback=args.traceback)
    print(text_table(report))
    if json_path:
        Path(json_path).write_text(json.dumps(report.as_dict(), indent=2, ensure_ascii=False)
                                   + "\n")
        _log(f"wrote {json_path}")
    if md_path:
        Path(md_path).write_text(markdown(report))
        _log(f"wrote {md_path}")
    return 0
