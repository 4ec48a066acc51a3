"""Latency a release is gated on, from a machine that is not quiet: a finished run's teacher and shipped step timed
together in interleaved rounds (as `shrinkwrap run` times them), quiet, beside one busy neighbour process and
beside two, each condition several times in turn, and the gate's verdict on `min_speedup` each time (re-timing
what it cannot trust, as `shrinkwrap gate` does).

    .venv/bin/python benchmarks/noisy_neighbour.py [--run runs/demo] [--repeats 3] [--min-speedup 3]

A neighbour is a process that keeps one core busy with arithmetic (bounded: it stops by itself after
--neighbour-seconds, and is killed when its condition ends). Prints a Markdown table and writes
benchmarks/out/noisy_neighbour.json. Goals: the speed-up ratio (teacher p95 / shipped p95) within ±15 % of its
quiet value in every condition, and a gate verdict that never flips between pass and fail on the same model.
"""
from __future__ import annotations

import argparse
import copy
import json
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
BURN = "import time\nend = time.time() + {s}\nwhile time.time() < end:\n    sum(i * i for i in range(20000))\n"


def neighbours(n: int, seconds: float) -> list[subprocess.Popen]:
    procs = [subprocess.Popen([sys.executable, "-c", BURN.format(s=seconds)]) for _ in range(n)]
    time.sleep(1.0)  # let them take their cores before anything is timed
    return procs


def stop(procs: list[subprocess.Popen]) -> None:
    for p in procs:
        p.kill()
    for p in procs:
        p.wait(10)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--run", default=str(ROOT / "runs" / "demo"), help="a finished run folder (default: runs/demo)")
    ap.add_argument("--conditions", type=int, nargs="+", default=[0, 1, 2], help="busy neighbours per condition")
    ap.add_argument("--repeats", type=int, default=3, help="times each condition is measured, in turn")
    ap.add_argument("--min-speedup", type=float, default=3.0, help="the gate's limit judged each time")
    ap.add_argument("--neighbour-seconds", type=float, default=600, help="a neighbour stops by itself after this")
    ap.add_argument("--out", default=str(ROOT / "benchmarks" / "out" / "noisy_neighbour.json"))
    args = ap.parse_args()

    from shrinkwrap.bench.machine import describe
    from shrinkwrap.bench.rounds import STEADY_RULE, time_folders
    from shrinkwrap.outputs.gate import evaluate
    from shrinkwrap.outputs.results import final_row, load, recipe_of, teacher_row
    from shrinkwrap.recipe.budget import BudgetConfig

    results = load(Path(args.run) / "results.json")
    bench = recipe_of(results).bench
    folders = [Path(teacher_row(results)["path"]), Path(final_row(results)["path"])]
    budget = BudgetConfig(min_speedup=args.min_speedup)

    def retime(paths):
        return time_folders(paths, bench, bench.rounds)

    rows = []
    for repeat in range(args.repeats):
        for n in args.conditions:
            procs = neighbours(n, args.neighbour_seconds)
            try:
                teacher, step = retime(folders)
                measured = copy.deepcopy(results)
                teacher_row(measured)["latency_ms"], final_row(measured)["latency_ms"] = teacher, step
                check = next(c for c in evaluate(measured, budget, retime=retime).checks if c.name == "min_speedup")
            finally:
                stop(procs)
            rows.append({"neighbours": n, "repeat": repeat + 1, "ratio": teacher["p95"] / step["p95"],
                         "step_p95_over_reference": step["p95_over_reference"], "teacher_p95": teacher["p95"],
                         "step_p95": step["p95"], "unstable": teacher["unstable"] or step["unstable"],
                         "verdict": check.verdict, "gate": check.detail})
            print(f"neighbours {n}, run {repeat + 1}: ratio {rows[-1]['ratio']:.2f}, verdict {check.verdict}",
                  file=sys.stderr, flush=True)

    quiet = [r for r in rows if r["neighbours"] == 0]
    base_ratio = sum(r["ratio"] for r in quiet) / len(quiet)
    base_ref = sum(r["step_p95_over_reference"] for r in quiet) / len(quiet)
    print("| neighbours | run | teacher p95 ms | shipped p95 ms | ratio | vs quiet | shipped p95 / reference | vs quiet "
          "| timing | gate min_speedup |\n|---:|---:|---:|---:|---:|---:|---:|---:|---|---|")
    for r in rows:
        r["ratio_vs_quiet"] = r["ratio"] / base_ratio - 1
        r["reference_vs_quiet"] = r["step_p95_over_reference"] / base_ref - 1
        print(f"| {r['neighbours']} | {r['repeat']} | {r['teacher_p95']:.2f} | {r['step_p95']:.2f} | {r['ratio']:.2f} | "
              f"{r['ratio_vs_quiet']:+.0%} | {r['step_p95_over_reference']:.2f} | {r['reference_vs_quiet']:+.0%} | "
              f"{'unstable' if r['unstable'] else 'steady'} | {r['verdict']} |")
    goals = {"the ratio within ±15 % of quiet in every condition": all(abs(r["ratio_vs_quiet"]) <= 0.15 for r in rows),
             "the gate's verdict never flips": len({r["verdict"] for r in rows}) == 1}
    for goal, met in goals.items():
        print(f"{'met' if met else 'NOT met'}: {goal}")
    print(f"\nrule: {STEADY_RULE}; batch {bench.batch_size} × {bench.sequence_length} tokens, {bench.threads} threads, "
          f"{bench.rounds} rounds")
    Path(args.out).parent.mkdir(parents=True, exist_ok=True)
    Path(args.out).write_text(json.dumps({"rows": rows, "goals": goals, "quiet_ratio": base_ratio,
                                          "machine": describe(), "rule": STEADY_RULE}, indent=2))


if __name__ == "__main__":
    main()
