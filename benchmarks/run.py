"""Run the bundled benchmark and print its table (``--json PATH`` also writes it as JSON).

Usage: ``python -m tinyprop.benchmarks [--quick] [--json PATH]`` or ``tinyprop bench``.
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

BARS = {
    "floor": 1.20,
    "tax": 1.20,
    "memory": 1.5,
    "exponent": (0.9, 1.1),
    "c_speedup": 50.0,
    "blocked_memory_mb": 200.0,
    "blocked_speedup": 10.0,
}


def run(quick: bool = False, progress: bool = False) -> dict[str, Any]:
    """All measurements as one JSON-able dict; ``progress`` names each part on stderr as it starts."""
    calls, rounds = (2, 1) if quick else (20, 15)
    small_calls = 5 if quick else 500
    batches = (64,) if quick else (256, 4096)
    parts = ("floor", "tax", "memory", "scaling", "second_order", "blocked_lm", "inference")

    def starting(part: str) -> None:
        if progress:
            print(
                f"[{parts.index(part) + 1}/{len(parts)}] measuring {part.replace('_', '-')} "
                "...",
                file=sys.stderr, flush=True,
            )

    results: dict[str, Any] = {"machine": measure.machine(), "quick": quick}
    starting("floor")
    results["floor"] = [
        measure.floor_ratio(b, dtype, calls=calls if b < 4096 else max(2, calls // 4), rounds=rounds)
        for dtype in (np.float32, np.float64)
        for b in batches
    ]
    starting("tax")
    results["tax"] = [
        measure.abstraction_tax([4, 8, 1], 16, calls=small_calls, rounds=rounds),
        measure.abstraction_tax([8, 32, 32, 1], 32, calls=small_calls, rounds=rounds),
    ]
    starting("memory")
    results["memory"] = [measure.memory_ratio(64 if quick else 4096, dtype) for dtype in (np.float32, np.float64)]
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
    return results


def table(results: dict[str, Any]) -> str:
    """The results as a plain-text table, each ratio beside its bar."""
    m = results["machine"]
    lines = [
        f"tinyprop {m['tinyprop']} benchmark{' (quick smoke run: figures not meaningful)' if results['quick'] else ''}",
        f"machine: {m['cpu']}, {m['cores']} cores, Python {m['python']}, numpy {m['numpy']}, BLAS {m['blas']}"
        f", BLAS threads: {m.get('blas_threads', 'default')}",
        "",
        f"{'figure':<46} {'measured':>12} {'ratio':>8} {'bar':>10}",
    ]

    def row(name: str, measured: str, ratio: float | None, bar: str) -> None:
        shown = "-" if ratio is None else f"{ratio:.2f}"
        lines.append(f"{name:<46} {measured:>12} {shown:>8} {bar:>10}")

    for r in results["floor"]:
        row(
            f"floor ratio, batch {r['batch']} "
            f"{r['dtype']}",
            f"{r['step_s'] * 1e3:.3f} ms", r["ratio"], f"<= {BARS['floor']}",
        )
    for r in results["floor"]:
        row(
            f"  step / (floor + Adam update), {r['batch']} "
            f"{r['dtype']}",
            f"{r['floor_update_s'] * 1e3:.3f} ms", r["ratio_floor_update"], "",
        )
    for r in results["tax"]:
        row(
            f"abstraction tax, {r['network']} batch "
            f"{r['batch']}",
            f"{r['step_s'] * 1e6:.1f} us", r["ratio"], f"<= {BARS['tax']}",
        )
    for r in results["memory"]:
        row(
            f"memory ratio, batch {r['batch']} "
            f"{r['dtype']}",
            f"{r['peak_bytes'] / 2**20:.1f} MiB", r["ratio"], f"<= {BARS['memory']}",
        )
    s = results["scaling"]
    for n, sec in zip(s["samples"], s["seconds_per_epoch"]):
        row(f"epoch time, n = {n:.0e}", f"{sec * 1e3:.2f} ms", None, "")
    low, high = BARS["exponent"]
    row("scaling exponent (time ~ n^k)", "", s["exponent"], f"{low}..{high}")
    for r in results["second_order"]:
        row(
            f"Levenberg-Marquardt {r['problem']} ({r['jacobian_evaluations']} "
            "Jacobians)",
            f"{r['seconds'] * 1e3:.1f} ms", None, f"LRE {r['rss_lre']:.1f}",
        )
    memory, speed = results["blocked_lm"]["memory"], results["blocked_lm"]["speed"]
    met = "met" if memory["peak_bytes"] <= BARS["blocked_memory_mb"] * 2**20 else "NOT MET"
    row(f"blocked LM iteration, {memory['rows']:.0e} x {memory['n_params']}: peak extra memory",
        f"{memory['peak_bytes'] / 2**20:.1f} MiB", None, f"<= {BARS['blocked_memory_mb']:.0f} {met}")
    row("  (the whole Jacobian would take)", f"{memory['whole_jacobian_bytes'] / 2**20:.0f} MiB", None, "")
    row("  time of that iteration", f"{memory['seconds']:.2f} s", None, "")
    met = "met" if speed["speedup"] >= BARS["blocked_speedup"] else "NOT MET"
    row(f"LM iteration {speed['rows']} x {speed['n_params']}: MINPACK / blocked", f"{speed['blocked_s']:.3f} s",
        speed["speedup"], f">= {BARS['blocked_speedup']:.0f} {met}")
    row("  MINPACK iteration", f"{speed['minpack_s']:.3f} s", None, "")
    i = results["inference"]
    row("inference: net.predict, one sample", f"{i['predict_s'] * 1e6:.1f} us", 1.0, "")
    row("inference: exported Python / predict", f"{i['python_s'] * 1e6:.1f} us", i["python_ratio"], "")
    if i["c_s"] is None:
        row("inference: exported C", "no compiler", None, "")
    else:
        row(
            "inference: predict / exported C "
            "(speed-up)",
            f"{i['c_s'] * 1e9:.0f} ns", i["c_speedup"], f">= {BARS['c_speedup']:.0f}",
        )
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
    return 0


if __name__ == "__main__":
    sys.exit(main())
