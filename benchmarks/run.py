"""Run the bundled benchmark and print its table (``--json PATH`` also writes it as JSON).

Usage: ``python -m tinyprop.benchmarks [--quick] [--json PATH] [--threads N] [--strict]`` or
``tinyprop bench``. Every figure with a bar is marked met or NOT MET; ``--strict`` makes a
miss exit with status 1.
The default takes a few minutes on a 2-core laptop; ``--quick`` is a
seconds-long smoke run whose figures are too short to trust.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
from typing import Any

import numpy as np

from . import measure

_THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")
_THREADS_SET = "TINYPROP_BENCH_THREADS"

# Each bar: (comparison, limit). "<=" bars are upper limits of a ratio, ">=" lower limits,
# "in" a closed interval. The training-step bar is against the floor plus the optimizer's
# own update (the core stays numpy-only; see docs/benchmark.md).
BARS: dict[str, tuple[str, Any]] = {
    "step_floor_update_256": ("<=", 1.30),
    "step_floor_update_4096": ("<=", 1.20),
    "train_epoch": ("<=", 1.05),
    "tax": ("<=", 1.20),
    "light_path": ("<=", 1.20),
    "memory": ("<=", 1.5),
    "exponent": ("in", (0.9, 1.1)),
    "stacked_small": (">=", 10.0),
    "stacked_medium": (">=", 2.0),
    "c_speedup": (">=", 50.0),
    "blocked_memory_mb": ("<=", 200.0),
    "blocked_speedup": (">=", 10.0),
}
STACKED_CASES = {"stacked_small": ([4, 16, 16, 1], 64, 32), "stacked_medium": ([8, 64, 64, 1], 16, 32)}
PARTS = (
    "floor", "train_epoch", "tax", "light_path", "stacked", "memory", "scaling", "second_order", "blocked_lm",
    "inference",
)


def run(quick: bool = False, progress: bool = False) -> dict[str, Any]:
    """All measurements as one JSON-able dict; ``progress`` names each part on stderr as it starts."""
    calls, rounds = (2, 1) if quick else (20, 15)
    small_calls = 5 if quick else 500
    batches = (64,) if quick else (256, 4096)
    dtypes = (np.float32, np.float64)

    def starting(part: str) -> None:
        if progress:
            number = f"[{PARTS.index(part) + 1}/{len(PARTS)}]"
            print(f"{number} measuring {part.replace('_', '-')} ...", file=sys.stderr, flush=True)

    results: dict[str, Any] = {"machine": measure.machine(), "quick": quick}
    starting("floor")
    results["floor"] = [
        measure.floor_ratio(b, dtype, calls=calls if b < 4096 else max(2, calls // 4), rounds=rounds)
        for dtype in dtypes
        for b in batches
    ]
    starting("train_epoch")
    results["train_epoch"] = [
        measure.train_epoch(b, dtype, rounds=1 if quick else 5, steps=2 if quick else 16)
        for dtype in dtypes
        for b in batches
    ]
    starting("tax")
    results["tax"] = [
        measure.abstraction_tax([4, 8, 1], 16, calls=small_calls, rounds=rounds),
        measure.abstraction_tax([8, 32, 32, 1], 32, calls=small_calls, rounds=rounds),
    ]
    starting("light_path")
    results["light_path"] = [measure.light_path([4, 8, 1], 16, calls=small_calls, rounds=rounds)]
    starting("stacked")
    results["stacked"] = [
        {"case": case, **measure.stacked_speedup(sizes, 4 if quick else members, batch, dtype, rounds=1 if quick else 3,
                                                 rows=64 if quick else 1024, epochs=1 if quick else 3)}
        for case, (sizes, members, batch) in STACKED_CASES.items()
        for dtype in dtypes
    ]
    starting("memory")
    results["memory"] = [measure.memory_ratio(64 if quick else 4096, dtype) for dtype in dtypes]
    starting("scaling")
    results["scaling"] = measure.scaling([300, 1000] if quick else [1000, 10000, 100000, 1000000])
    starting("second_order")
    results["second_order"] = measure.second_order()
    starting("blocked_lm")
    results["blocked_lm"] = {
        "memory": measure.blocked_memory(10_000 if quick else 1_000_000, [4, 50, 1]),
        "speed": measure.blocked_speed(400 if quick else 8_000, [8, 10, 1] if quick else [8, 100, 1]),
    }
    starting("inference")
    results["inference"] = measure.inference(calls=small_calls, rounds=rounds, c_calls=1000 if quick else 2000000)
    results["verdicts"] = verdicts(results)
    return results


def _met(bar: str, value: float | None) -> bool | None:
    comparison, limit = BARS[bar]
    if value is None:
        return None
    if comparison == "<=":
        return value <= limit
    if comparison == ">=":
        return value >= limit
    return limit[0] <= value <= limit[1]


def _bar_text(bar: str) -> str:
    comparison, limit = BARS[bar]
    return f"{limit[0]}..{limit[1]}" if comparison == "in" else f"{comparison} {limit:g}"


def _rows(results: dict[str, Any]) -> list[tuple[str, str, float | None, str | None]]:
    """Every figure in table order: ``(name, measured, ratio, bar)``; ``bar`` is a key of :data:`BARS` or ``None``."""
    rows: list[tuple[str, str, float | None, str | None]] = []
    for r in results["floor"]:
        rows.append((f"floor ratio, batch {r['batch']} {r['dtype']}", f"{r['step_s'] * 1e3:.3f} ms", r["ratio"], None))
    for r in results["floor"]:
        bar = "step_floor_update_4096" if r["batch"] >= 4096 else "step_floor_update_256"
        rows.append((f"step / (floor + Adam update), batch {r['batch']} {r['dtype']}",
                     f"{r['floor_update_s'] * 1e3:.3f} ms", r["ratio_floor_update"], bar))
    for r in results["train_epoch"]:
        rows.append((f"train epoch / {r['steps']} steps, batch {r['batch']} {r['dtype']}",
                     f"{r['epoch_s'] * 1e3:.2f} ms", r["ratio"], "train_epoch"))
    for key, label in (("tax", "abstraction tax"), ("light_path", "no-workspace path tax")):
        for r in results[key]:
            rows.append((f"{label}, {r['network']} batch {r['batch']}", f"{r['step_s'] * 1e6:.1f} us", r["ratio"], key))
    for r in results["stacked"]:
        rows.append((f"stacked speed-up, {r['members']} x {r['network']} batch {r['batch']} {r['dtype']}",
                     f"{r['stacked_s'] * 1e3:.1f} ms", r["speedup"], r["case"]))
        rows.append(("  loop / bare stacked arithmetic (a numpy stack's limit)",
                     f"{r['arithmetic_s'] * 1e3:.1f} ms", r["speedup_bound"], None))
    for r in results["memory"]:
        rows.append((f"memory ratio, batch {r['batch']} {r['dtype']}", f"{r['peak_bytes'] / 2**20:.1f} MiB",
                     r["ratio"], "memory"))
    s = results["scaling"]
    for n, sec in zip(s["samples"], s["seconds_per_epoch"]):
        rows.append((f"epoch time, n = {n:.0e}", f"{sec * 1e3:.2f} ms", None, None))
    rows.append(("scaling exponent (time ~ n^k)", "", s["exponent"], "exponent"))
    for r in results["second_order"]:
        name = f"Levenberg-Marquardt {r['problem']} ({r['jacobian_evaluations']} Jacobians, LRE {r['rss_lre']:.1f})"
        rows.append((name, f"{r['seconds'] * 1e3:.1f} ms", None, None))
    memory, speed = results["blocked_lm"]["memory"], results["blocked_lm"]["speed"]
    rows.append((f"blocked LM iteration, {memory['rows']:.0e} x {memory['n_params']}: peak extra memory (MiB)",
                 f"{memory['peak_bytes'] / 2**20:.1f} MiB", memory["peak_bytes"] / 2**20, "blocked_memory_mb"))
    rows.append(("  (the whole Jacobian would take)", f"{memory['whole_jacobian_bytes'] / 2**20:.0f} MiB", None, None))
    rows.append(("  time of that iteration", f"{memory['seconds']:.2f} s", None, None))
    rows.append((f"LM iteration {speed['rows']} x {speed['n_params']}: MINPACK / blocked",
                 f"{speed['blocked_s']:.3f} s", speed["speedup"], "blocked_speedup"))
    rows.append(("  MINPACK iteration", f"{speed['minpack_s']:.3f} s", None, None))
    i = results["inference"]
    rows.append(("inference: net.predict, one sample", f"{i['predict_s'] * 1e6:.1f} us", 1.0, None))
    rows.append(("inference: exported Python / predict", f"{i['python_s'] * 1e6:.1f} us", i["python_ratio"], None))
    measured = "no compiler" if i["c_s"] is None else f"{i['c_s'] * 1e9:.0f} ns"
    rows.append(("inference: predict / exported C (speed-up)", measured, i["c_speedup"], "c_speedup"))
    return rows


def verdicts(results: dict[str, Any]) -> list[dict[str, Any]]:
    """Every figure that has a bar: its name, value, bar and whether it is met (``None``: not measured)."""
    return [
        {"figure": name, "value": value, "bar": _bar_text(bar), "met": _met(bar, value)}
        for name, _, value, bar in _rows(results)
        if bar is not None
    ]


def table(results: dict[str, Any]) -> str:
    """The results as a plain-text table, each ratio beside its bar and whether it is met."""
    m = results["machine"]
    lines = [
        f"tinyprop {m['tinyprop']} benchmark{' (quick smoke run: figures not meaningful)' if results['quick'] else ''}",
        f"machine: {m['cpu']}, {m['cores']} cores, Python {m['python']}, numpy {m['numpy']}, BLAS {m['blas']}"
        f", BLAS threads: {m.get('blas_threads', 'default')}",
        "",
        f"{'figure':<60} {'measured':>12} {'ratio':>8} {'bar':>10}  verdict",
    ]
    judged = verdicts(results)
    for name, measured, ratio, bar in _rows(results):
        shown = "-" if ratio is None else f"{ratio:.2f}"
        met = "" if bar is None else {True: "met", False: "NOT MET", None: "not measured"}[_met(bar, ratio)]
        bar_text = "" if bar is None else _bar_text(bar)
        lines.append(f"{name:<60} {measured:>12} {shown:>8} {bar_text:>10}  {met}".rstrip())
    missed = [v["figure"] for v in judged if v["met"] is False]
    lines += ["", f"bars: {sum(v['met'] is True for v in judged)} met, {len(missed)} not met"
              + (f" ({'; '.join(missed)})" if missed else "")]
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="tinyprop bench", description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="seconds-long smoke run (figures not meaningful)")
    parser.add_argument("--json", metavar="PATH", help="also write the results as JSON to PATH")
    parser.add_argument(
        "--threads", type=int, metavar="N",
        help="BLAS threads (set before numpy starts, so the benchmark runs in a fresh process); "
        "default: BLAS's own choice",
    )
    parser.add_argument(
        "--strict", action="store_true",
        help="exit with status 1 when a figure misses its bar (after printing the table and writing the JSON)",
    )
    args = parser.parse_args(argv)
    if args.threads is not None and os.environ.get(_THREADS_SET) != str(args.threads):
        if args.threads < 1:
            parser.error(f"--threads must be a positive integer, got {args.threads}")
        variables = {name: str(args.threads) for name in _THREAD_VARIABLES}
        env = {**os.environ, **variables, _THREADS_SET: str(args.threads)}
        again = [sys.executable, "-m", "tinyprop.benchmarks", *(argv if argv is not None else sys.argv[1:])]
        return subprocess.run(again, env=env, check=False).returncode
    results = run(quick=args.quick, progress=True)
    results["machine"]["blas_threads"] = os.environ.get(_THREADS_SET, "default")
    print(table(results))
    if args.json:
        with open(args.json, "w", encoding="utf-8") as handle:
            json.dump(results, handle, indent=2)
        print(f"\nwrote {args.json}")
    if args.strict and any(v["met"] is False for v in results["verdicts"]):
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
