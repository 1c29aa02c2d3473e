"""`cellpulse bench`'s runner: module discovery, the table and JSON it writes, its options.

No timing is asserted here; the figures are made up and only their formatting is checked."""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import types

import pytest

from bench import runner
from bench.common import BenchEnv, BenchOptions, Figure

RATE = Figure("replay", "replay, 1 M fixes", 612_000.0, "fixes/s", floor=1_020_000.0,
              floor_what="numpy", target="≥ 500 k/s", met=True)
LATENCY = Figure("lookup", "one vehicle | client", 0.8, "ms", floor=0.2, floor_what="HMGET",
                 better="lower", target="≤ 1 ms", met=False)
PLAIN = Figure("memory", "bytes per cell-bucket", 23.7, "bytes", better="lower")


def fake_importer(modules: dict[str, object]):
    def importer(name: str):
        if name not in modules:
            raise ModuleNotFoundError(f"No module named {name!r}", name=name)
        return modules[name]
    return importer


def test_module_without_run_is_not_available_and_the_others_still_run():
    with_run = types.SimpleNamespace(run=lambda opts, env: [RATE])
    without = types.SimpleNamespace(main=lambda: None)

    def boom(opts, env):
        raise RuntimeError("generated day is empty")

    broken = types.SimpleNamespace(run=boom)
    imp = fake_importer({"bench.replay_throughput": with_run, "bench.decode": without,
                         "bench.lookup_latency": broken})
    opts, env = BenchOptions(quick=True), BenchEnv(redis_url="redis://x", bootstrap="y:1")
    res = {n: runner.run_module(n, runner.MODULES[n], opts, env, imp) for n in runner.MODULES}
    assert (res["replay"].status, res["replay"].figures) == ("ok", [RATE])
    assert res["decode"].status == "not available"
    assert res["decode"].detail == "bench.decode has no run(opts, env)"
    assert res["memory"].status == "not available"
    assert res["memory"].detail == "no module bench.memory"
    assert res["lookup"].status == "failed"
    assert res["lookup"].detail.startswith("RuntimeError: generated day is empty (at ")


def test_module_needing_a_server_that_did_not_start_is_not_available():
    mod = types.SimpleNamespace(run=lambda opts, env: pytest.fail("must not run"))
    res = runner.run_module("memory", "bench.memory", BenchOptions(), BenchEnv(),
                            fake_importer({"bench.memory": mod}))
    assert (res.status, res.detail) == ("not available",
                                        "needs redis-server, which did not start")


def test_ratio_is_oriented_so_higher_is_better():
    assert RATE.ratio == pytest.approx(0.6)  # 612 k / 1.02 M
    assert LATENCY.ratio == pytest.approx(0.25)  # 0.2 ms floor / 0.8 ms
    assert PLAIN.ratio is None


def test_rows_format_figure_floor_ratio_target_met():
    assert runner.rows([RATE, LATENCY, PLAIN]) == [
        ["replay", "replay, 1 M fixes", "612.0 k fixes/s", "1.02 M fixes/s (numpy)", "0.60×",
         "≥ 500 k/s", "yes"],
        ["lookup", "one vehicle | client", "0.800 ms", "0.200 ms (HMGET)", "0.25×", "≤ 1 ms",
         "NO"],
        ["memory", "bytes per cell-bucket", "23.70 bytes", "", "", "", ""],
    ]


def report() -> runner.BenchReport:
    results = [
        runner.ModuleResult("replay", "bench.replay_throughput", "ok", "2 figures", 3.0,
                            [RATE, PLAIN]),
        runner.ModuleResult("lookup", "bench.lookup_latency", "ok", "1 figures", 2.0, [LATENCY]),
        runner.ModuleResult("decode", "bench.decode", "not available",
                            "bench.decode has no run(opts, env)"),
    ]
    machine = {"cpu": "Test CPU", "cores": 2, "ram_gib": 4.0, "os": "Linux", "python": "3.11.7",
               "redis_server": "redis-server 7.0.15", "tansu": "0.6.0",
               "libraries": {"redis": "8.1.0"}}
    return runner.BenchReport(machine, {"quick": False}, results, "2026-06-01 00:00:00 UTC",
                              5.0)


def test_markdown_table_escapes_pipes_and_marks_missed_targets():
    md = runner.markdown(report()).splitlines()
    assert md[0] == ("Measured 2026-06-01 00:00:00 UTC with `cellpulse bench` on: Test CPU, "
                     "2 cores, 4.0 GiB RAM, Linux; Python 3.11.7; redis-server 7.0.15; "
                     "Tansu 0.6.0; redis 8.1.0.")
    assert md[2] == "| bench | what | figure | floor | ratio | target | met |"
    assert md[3] == "|---|---|---|---|---|---|---|"
    assert md[6] == ("| lookup | one vehicle \\| client | 0.800 ms | 0.200 ms (HMGET) | 0.25× "
                     "| ≤ 1 ms | **no** |")
    assert len([line for line in md if line.startswith("| ")]) == 4  # header + 3 figures
    assert md[-1] == "- decode: not available (bench.decode has no run(opts, env))"


def test_json_holds_every_figure_with_its_ratio_and_the_missed_targets():
    data = json.loads(json.dumps(report().as_dict()))
    assert [f["what"] for f in data["figures"]] == [RATE.what, PLAIN.what, LATENCY.what]
    assert data["figures"][0]["ratio"] == pytest.approx(0.6)
    assert data["figures"][0]["floor"] == 1_020_000.0
    assert data["targets_missed"] == ["one vehicle | client"]
    assert [(m["name"], m["status"], m["figures"]) for m in data["modules"]] == [
        ("replay", "ok", 2), ("lookup", "ok", 1), ("decode", "not available", 0)]
    assert data["machine"]["cores"] == 2


def test_text_summary_names_the_missed_target_and_what_did_not_run():
    text = runner.text_table(report())
    assert "targets missed: 1 of 2" in text
    assert "  - lookup: one vehicle | client: 0.800 ms (target ≤ 1 ms)" in text
    assert text.splitlines()[-1] == "not run: decode"


def test_options_from_flags_then_environment():
    ns = argparse.Namespace(only=None, quick=None, data_dir=None, json=None, markdown=None,
                            seed=None, kafka_clients=None)
    env = {"CELLPULSE_BENCH_ONLY": "memory, replay", "CELLPULSE_BENCH_QUICK": "yes",
           "CELLPULSE_BENCH_KAFKA_CLIENTS": "kafka-python", "CELLPULSE_BENCH_JSON": "out.json"}
    names, opts, js, md = runner.options_from(ns, env)
    assert names == ["replay", "memory"]  # run order, not the order asked
    assert (opts.quick, opts.kafka_clients, opts.seed, js, md) == (
        True, ("kafka-python",), 7, "out.json", None)
    ns.only, ns.quick = "decode", False
    names, opts, _, _ = runner.options_from(ns, env)
    assert (names, opts.quick) == (["decode"], False)
    with pytest.raises(ValueError, match="unknown benchmark ingst; choose from replay"):
        runner.parse_only("ingst")
    with pytest.raises(ValueError, match="CELLPULSE_BENCH_QUICK='maybe'"):
        runner.options_from(argparse.Namespace(**{**vars(ns), "quick": None}),
                            {"CELLPULSE_BENCH_QUICK": "maybe"})


def test_bench_help_works_from_the_console_script():
    out = subprocess.run([sys.executable, "-m", "featurestore.cli", "bench", "--help"],
                         capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    assert "--only NAMES" in out.stdout and "--markdown PATH" in out.stdout
