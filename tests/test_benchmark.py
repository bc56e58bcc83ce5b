"""The bundled benchmark runs end to end (seconds-long smoke mode; no timing assertions)."""

from __future__ import annotations

import json

from tinyprop.benchmarks import main, run, table


def test_quick_run_produces_every_figure(tmp_path, capsys):
    path = tmp_path / "bench.json"
    assert main(["--quick", "--json", str(path)]) == 0
    printed, progress = capsys.readouterr()
    results = json.loads(path.read_text())
    for key in ("machine", "floor", "tax", "memory", "scaling", "second_order", "blocked_lm", "inference"):
        assert key in results
    for row in results["floor"] + results["tax"] + results["memory"]:
        assert row["ratio"] > 0
    for row in results["floor"]:  # the step is timed against the floor alone and the floor plus the update
        assert row["floor_update_s"] > 0 and row["ratio_floor_update"] > 0
    assert results["second_order"][0]["rss_lre"] >= 8  # NIST Rat42 certified RSS reached
    assert progress.splitlines()[0] == "[1/7] measuring floor ..." and "[7/7] measuring inference" in progress
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
