"""Same text, same answer? Each int8 form the tool makes, on real test texts: a text classified alone against the
same text inside batches of mixed lengths, with accuracy and latency beside it.

    .venv/bin/python benchmarks/batch_independence.py [--demo-run runs/demo] [--bbc-run runs/bbc-slice]
        [--bbc-per-class 60] [--sizes 8 32 128] [--rounds 3] [--timed-seconds 3] [--threads 2]

It runs (or reuses, when finished) recipes/demo.yaml and recipes/bbc-news.yaml on a stratified slice of BBC News
(`--bbc-per-class` articles per topic, the first 1,000 characters, pruning off to save time), then builds every
int8 form from each run's last fp32 PyTorch student:

- dynamic: ONNX Runtime's quantize_dynamic of the shipped fp32 graph (the chain's int8 step until this script
  was written): activation scales from the whole batch tensor;
- static: QDQ, activation ranges calibrated once on `--calibration-texts` training texts (min/max), and the same
  with the attention products (activation x activation MatMuls) left fp32;
- per-row: one activation scale per token (shrinkwrap.ml.int8_rows), on the plain export and on a graph fused
  without attention;
all with int8 weights per output column and the embedding tables int8.

For every form and every test text: its outputs alone (batch of one, no padding), inside batches of each
`--sizes` drawn in a shuffled order (mixed lengths, padded to each batch's longest), and inside predict's
length-sorted batches of 32 (the chain's accuracy pass). Reported: the largest change of any score
(softmax of the logits) and of any logit against alone, the texts whose label changed in any batching, the
accuracy alone and batched; latency p50/p95 at batch 1 and 32 texts of `bench.sequence_length` tokens (cut to the
student's length) in interleaved rounds (bench/rounds.py), and size. Prints a Markdown table and writes
benchmarks/out/batch_independence.json.
"""
from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
OUT = ROOT / "benchmarks" / "out" / "batch_independence.json"
sys.path.insert(0, str(ROOT / "recipes" / "data"))


def bbc_recipe(per_class: int, folder: Path):
    import bbc_news

    from shrinkwrap.recipe.schema import load_recipe

    data = bbc_news.write(folder / f"bbc-news-{per_class}.csv", bbc_news.rows(per_class, 1000))
    return load_recipe(ROOT / "recipes" / "bbc-news.yaml", [f"data.path={data}", "prune.enabled=false"])


def forms(run_dir: Path, recipe, tokens, folder: Path, calibration: int) -> dict[str, dict]:
    """Every int8 form of the run's last fp32 student, as .onnx files in `folder`."""
    import onnx

    from shrinkwrap.chain.steps import chain
    from shrinkwrap.ml.convert import export_onnx, fuse, quantize_dynamic, quantize_static_qdq
    from shrinkwrap.ml.int8_rows import quantize_rows
    from shrinkwrap.ml.tasks import of_recipe
    from shrinkwrap.serve.rundir import MODEL_FILE, STUDENT_ONNX

    onnx_step = next(s for s in chain(recipe) if s.name == STUDENT_ONNX)
    model = of_recipe(recipe).load(str(run_dir / onnx_step.source))
    shipped_fp32 = run_dir / STUDENT_ONNX / MODEL_FILE
    plain = export_onnx(model, folder, recipe.export.opset)
    no_attention = fuse(plain, model.config, folder / "fused-no-attention.onnx", attention=False)
    ops = list(recipe.onnx_quantize.int8_operators)
    out = {"fp32 (shipped graph)": {"path": shipped_fp32, "batch_independent": True}}
    quantize_dynamic(shipped_fp32, folder / "dynamic.onnx", True, ops)
    out["dynamic, per-channel"] = {"path": folder / "dynamic.onnx", "batch_independent": False}
    texts = tokens.encoded["train"][:calibration]
    quantize_static_qdq(plain, folder / "static.onnx", texts, tokens.pad_id, True, ["MatMul", "Gather"])
    out[f"static QDQ, {len(texts)} calibration texts"] = {"path": folder / "static.onnx", "batch_independent": True}
    graph = onnx.load(str(plain), load_external_data=False).graph
    stored = {i.name for i in graph.initializer}
    products = tuple(n.name for n in graph.node if n.op_type == "MatMul" and not set(n.input) & stored)
    quantize_static_qdq(plain, folder / "static-attn.onnx", texts, tokens.pad_id, True, ["MatMul", "Gather"], products)
    out["static QDQ, attention products fp32"] = {"path": folder / "static-attn.onnx", "batch_independent": True}
    quantize_rows(plain, folder / "rows-plain.onnx", True, ops)
    out["per-row, plain graph"] = {"path": folder / "rows-plain.onnx", "batch_independent": True}
    quantize_rows(no_attention, folder / "rows-fused.onnx", True, ops)
    out["per-row, fused without attention"] = {"path": folder / "rows-fused.onnx", "batch_independent": True}
    return out


def softmax(x: np.ndarray) -> np.ndarray:
    e = np.exp(x - x.max(1, keepdims=True))
    return e / e.sum(1, keepdims=True)


def batchings(n: int, sizes: list[int], seed: int = 0) -> dict[str, list[np.ndarray]]:
    """Index batches: shuffled (mixed lengths) at each size; predict's length-sorted ones are added by the caller."""
    rng = np.random.default_rng(seed)
    out = {}
    for size in sizes:
        order = rng.permutation(n)
        out[f"mixed {size}"] = [order[i:i + size] for i in range(0, n, size)]
    return out


def outputs_of(path: Path, examples: list[dict], pad_id: int, sizes: list[int], threads: int) -> dict[str, np.ndarray]:
    from shrinkwrap.serve.batches import all_outputs, collate
    from shrinkwrap.serve.sessions import run_outputs, session

    sess = session(path, threads)
    run = lambda batch: run_outputs(sess, batch)   # noqa: E731
    got = {"alone": np.concatenate([run(collate([e], pad_id)) for e in examples])}
    for name, idx in batchings(len(examples), sizes).items():
        out = np.zeros_like(got["alone"])
        for i in idx:
            out[i] = run(collate([examples[j] for j in i], pad_id))
        got[name] = out
    got["sorted 32"] = all_outputs(run, examples, pad_id, got["alone"].shape[1], 32)
    return got


def figures(got: dict[str, np.ndarray], labels: np.ndarray) -> dict:
    alone = got["alone"]
    rows = {"accuracy_alone": float((alone.argmax(1) == labels).mean())}
    flipped = np.zeros(len(alone), bool)
    for name, out in got.items():
        if name == "alone":
            continue
        flipped |= out.argmax(1) != alone.argmax(1)
        rows[name] = {"max_abs_score_change": float(np.abs(softmax(out) - softmax(alone)).max()),
                      "max_abs_logit_change": float(np.abs(out - alone).max()),
                      "label_flips": int((out.argmax(1) != alone.argmax(1)).sum()),
                      "accuracy": float((out.argmax(1) == labels).mean())}
    rows["texts_flipped_anywhere"] = int(flipped.sum())
    return rows


def measure_run(name: str, run_dir: Path, recipe, args) -> list[dict]:
    from shrinkwrap.bench.grid import fixed_batch
    from shrinkwrap.bench.rounds import time_in_rounds
    from shrinkwrap.chain.preflight import prepare
    from shrinkwrap.chain.steps import chain
    from shrinkwrap.serve.rundir import STUDENT_ONNX

    ctx = prepare(recipe, run_dir, quiet=True)
    last = run_dir / next(s for s in chain(recipe) if s.name == STUDENT_ONNX).source
    tokens = ctx.student_tokens(last)
    test, labels = tokens.encoded["test"], np.asarray(ctx.data.test.labels)
    length = min(recipe.student_length, recipe.bench.sequence_length)
    bench = recipe.bench.model_copy(update={"threads": args.threads, "timed_seconds": args.timed_seconds,
                                            "repeats": 30})
    with tempfile.TemporaryDirectory() as tmp:
        print(f"[{name}] building the int8 forms", file=sys.stderr, flush=True)
        variants = forms(run_dir, recipe, tokens, Path(tmp), args.calibration_texts)
        rows = []
        for form, v in variants.items():
            print(f"[{name}] {form}: alone and in batches", file=sys.stderr, flush=True)
            rows.append({"run": name, "form": form, "batch_independent_by_design": v["batch_independent"],
                         "test_texts": len(test), "size_bytes": v["path"].stat().st_size,
                         **figures(outputs_of(v["path"], test, tokens.pad_id, args.sizes, args.threads), labels)})
        print(f"[{name}] timing, {args.rounds} interleaved rounds", file=sys.stderr, flush=True)
        models = [(v["path"], fixed_batch(test, tokens.pad_id, b, length)) for v in variants.values() for b in (1, 32)]
        timed = time_in_rounds(models, bench, args.rounds)
    for k, row in enumerate(rows):
        for j, b in enumerate((1, 32)):
            t = timed[2 * k + j]
            row[f"batch_{b}"] = {"p50_ms": t["p50"], "p95_ms": t["p95"], "n": t["n"], "tokens": length}
    return rows


def table(rows: list[dict], sizes: list[int]) -> str:
    cols = [f"mixed {s}" for s in sizes] + ["sorted 32"]
    head = ("| run | form | largest score change, " + " / ".join(cols) + " | texts whose label changed | accuracy alone"
            " | accuracy batched (" + " / ".join(cols) + ") | p50 / p95 ms, batch 1 | p50 / p95 ms, batch 32 | MB |")
    lines = [head, "|---|---|---:|---:|---:|---:|---:|---:|---:|"]
    for r in rows:
        lines.append(
            f"| {r['run']} | {r['form']} | " + " / ".join(f"{r[c]['max_abs_score_change']:.1e}" for c in cols)
            + f" | {r['texts_flipped_anywhere']} of {r['test_texts']} | {r['accuracy_alone']:.4f} | "
            + " / ".join(f"{r[c]['accuracy']:.4f}" for c in cols)
            + f" | {r['batch_1']['p50_ms']:.2f} / {r['batch_1']['p95_ms']:.2f}"
            + f" | {r['batch_32']['p50_ms']:.1f} / {r['batch_32']['p95_ms']:.1f} | {r['size_bytes'] / 1e6:.1f} |")
    return "\n".join(lines)


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--demo-run", type=Path, default=ROOT / "runs" / "demo", help="run folder of recipes/demo.yaml "
                   "(run here unless finished; default: runs/demo)")
    p.add_argument("--bbc-run", type=Path, default=ROOT / "runs" / "bbc-slice",
                   help="run folder of the BBC News slice (default: runs/bbc-slice)")
    p.add_argument("--bbc-per-class", type=int, default=60, help="BBC News articles per topic (default: 60)")
    p.add_argument("--only", choices=["demo", "bbc"], help="measure one of the two runs")
    p.add_argument("--sizes", type=int, nargs="+", default=[8, 32, 128], help="mixed batch sizes (default: 8 32 128)")
    p.add_argument("--calibration-texts", type=int, default=100, help="training texts the static forms calibrate on")
    p.add_argument("--rounds", type=int, default=3, help="interleaved timing rounds (default: 3)")
    p.add_argument("--timed-seconds", type=float, default=3.0, help="timed seconds per model over all rounds")
    p.add_argument("--threads", type=int, default=2, help="ONNX Runtime intra-op threads (default: 2)")
    args = p.parse_args()

    from shrinkwrap.bench.machine import describe
    from shrinkwrap.chain.pipeline import run_recipe
    from shrinkwrap.recipe.schema import load_recipe

    started, load_before = time.perf_counter(), os.getloadavg()[0]
    runs = []
    if args.only in (None, "demo"):
        runs.append(("demo", args.demo_run, load_recipe(ROOT / "recipes" / "demo.yaml")))
    if args.only in (None, "bbc"):
        args.bbc_run.mkdir(parents=True, exist_ok=True)
        runs.append((f"BBC News, {5 * args.bbc_per_class} articles", args.bbc_run,
                     bbc_recipe(args.bbc_per_class, args.bbc_run.parent)))
    rows = []
    for name, run_dir, recipe in runs:
        print(f"[{name}] the run (finished steps are reused)", file=sys.stderr, flush=True)
        run_recipe(recipe, run_dir, quiet=True)
        rows += measure_run(name, run_dir, recipe, args)
    machine = describe()
    caption = (f"{args.threads} threads; {args.rounds} interleaved timing rounds; {machine['cpu']}, "
               f"{machine['cores_available']} cores; onnxruntime {machine['versions'].get('onnxruntime')}; 1-min load "
               f"average {load_before:.1f} before, {os.getloadavg()[0]:.1f} after"
               + (" — busier than its cores: rerun on a quiet machine" if load_before > machine["cores_available"]
                  else ""))
    print(table(rows, args.sizes) + "\n\n" + caption)
    OUT.parent.mkdir(parents=True, exist_ok=True)
    import json

    OUT.write_text(json.dumps({"what": caption, "rows": rows, "machine": machine, "settings": vars(args) | {
        "demo_run": str(args.demo_run), "bbc_run": str(args.bbc_run)},
        "seconds": round(time.perf_counter() - started, 1)}, indent=2))
    print(f"\nwrote {OUT} ({time.perf_counter() - started:.0f} s)", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
