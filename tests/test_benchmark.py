"""The bundled benchmark runs end to end (seconds-long smoke mode; no timing assertions)."""

from __future__ import annotations

import importlib
import json

from tinyprop.benchmarks import main, run, table


def test_quick_run_produces_every_figure(tmp_path, capsys):
    path = tmp_path / "bench.json"
    assert main(["--quick", "--json", str(path)]) == 0
    printed, progress = capsys.readouterr()
    results = json.loads(path.read_text())
    for key in ("machine", "floor", "train_epoch", "tax", "light_path", "stacked", "memory", "scaling", "second_order",
                "blocked_lm", "inference", "verdicts"):
        assert key in results
    for row in results["train_epoch"] + results["light_path"]:
        assert row["ratio"] > 0
    assert {row["case"] for row in results["stacked"]} == {"stacked_small", "stacked_medium"}
    assert all(row["speedup"] > 0 and row["speedup_bound"] > 0 for row in results["stacked"])
    assert all(v["met"] in (True, False, None) and v["bar"] for v in results["verdicts"])
    for row in results["floor"] + results["tax"] + results["memory"]:
        assert row["ratio"] > 0
    for row in results["floor"]:  # the step is timed against the floor alone and the floor plus the update
        assert row["floor_update_s"] > 0 and row["ratio_floor_update"] > 0
    assert results["second_order"][0]["rss_lre"] >= 8  # NIST Rat42 certified RSS reached
    assert progress.splitlines()[0] == "[1/10] measuring floor ..." and "[10/10] measuring inference" in progress
    memory, speed = results["blocked_lm"]["memory"], results["blocked_lm"]["speed"]
    assert 0 < memory["peak_bytes"] and memory["evaluations"] >= 2 and speed["speedup"] > 0
    for heading in ("floor ratio", "floor + Adam update", "abstraction tax", "scaling exponent",
                    "blocked LM iteration", "MINPACK / blocked"):
        assert heading in printed


def test_table_marks_a_missing_compiler():
    results = run(quick=True)
    results["inference"]["c_s"] = None
    assert "no compiler" in table(results)


def test_threads_option_reruns_with_the_blas_thread_count(tmp_path):
    path = tmp_path / "bench.json"
    assert main(["--quick", "--threads", "1", "--json", str(path)]) == 0
    assert json.loads(path.read_text())["machine"]["blas_threads"] == "1"


def test_every_bar_is_judged_and_strict_mode_exits_1_on_a_miss(monkeypatch, capsys):
    bench = importlib.import_module("tinyprop.benchmarks.run")  # the module, not the function of that name

    results = run(quick=True)
    results["stacked"][0]["speedup"] = 1.0  # below its bar of 10
    results["light_path"][0]["ratio"] = 1.1  # within its bar of 1.2
    results["verdicts"] = bench.verdicts(results)
    judged = {v["figure"]: v for v in results["verdicts"]}
    small = next(name for name in judged if name.startswith("stacked speed-up, 4 x 4-16-16-1"))
    assert judged[small]["met"] is False and judged[small]["bar"] == ">= 10"
    assert judged["no-workspace path tax, 4-8-1 batch 16"]["met"] is True
    printed = table(results)
    assert "NOT MET" in printed and "not met (" in printed
    monkeypatch.setattr(bench, "run", lambda quick=False, progress=False: results)
    assert main(["--quick", "--strict"]) == 1
    assert main(["--quick"]) == 0
    capsys.readouterr()
