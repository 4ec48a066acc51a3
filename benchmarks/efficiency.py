"""How close each step runs to this machine's matrix-multiply limit, at the model's own shapes.

    .venv/bin/python benchmarks/efficiency.py RUN_DIR [--batch-size 1 8] [--sequence-length 128] [--threads 2]

For every matrix product of a forward pass (shrinkwrap.bench.flops: q/k/v/output projections, the two
attention products, feed-forward up and down) this times the same product alone, in the same run:
fp32 with PyTorch (torch.matmul) and ONNX Runtime (MatMul), int8 with ONNX Runtime (the graph
quantize_dynamic makes: DynamicQuantizeLinear + MatMulInteger) and PyTorch (dynamic int8 Linear).
The "limit" of a step is the time its products would take at those isolated rates (the best of the two
kernels of its format); efficiency = that time / the step's measured p50. Prints a table and writes
benchmarks/out/efficiency.json.
"""
from __future__ import annotations

import argparse
import json
import sys
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]


def _time(fn, threads: int) -> float:
    from shrinkwrap.bench.latency import summarize, time_calls

    return summarize(time_calls(fn, warmup=5, repeats=30, min_time_s=0.3))["p50"]


def onnx_matmul(m: int, k: int, n: int, int8: bool, threads: int, folder: Path) -> float:
    import onnx
    from onnx import TensorProto, helper, numpy_helper

    from shrinkwrap.serve.sessions import session

    w = numpy_helper.from_array(np.random.default_rng(0).standard_normal((k, n)).astype(np.float32), "w")
    graph = helper.make_graph([helper.make_node("MatMul", ["x", "w"], ["y"])], "mm",
                              [helper.make_tensor_value_info("x", TensorProto.FLOAT, [m, k])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, [m, n])], [w])
    path = folder / f"mm_{m}_{k}_{n}.onnx"
    onnx.save(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]), path)
    if int8:
        from onnxruntime.quantization import QuantType, quantize_dynamic

        q = path.with_suffix(".int8.onnx")
        quantize_dynamic(str(path), str(q), weight_type=QuantType.QInt8)
        path = q
    sess = session(path, threads)
    x = {"x": np.random.default_rng(1).standard_normal((m, k)).astype(np.float32)}
    return _time(lambda: sess.run(None, x), threads)


def torch_matmul(m: int, k: int, n: int, int8: bool, threads: int) -> float:
    import torch

    torch.set_num_threads(threads)
    lin = torch.nn.Linear(k, n, bias=False).eval()
    if int8:
        from shrinkwrap.ml.int8 import quantize_dynamic_int8

        lin = quantize_dynamic_int8(torch.nn.Sequential(lin))
    x = torch.randn(m, k)
    with torch.inference_mode():
        return _time(lambda: lin(x), threads)


def limit_ms(config, batch: int, length: int, fmt: str, int8: bool, threads: int, folder: Path, memo: dict) -> dict:
    """Per-product times at this machine's isolated rate, and their sum (the step's limit)."""
    from shrinkwrap.bench.flops import encoder_matmuls

    rows, total = [], 0.0
    for mm in encoder_matmuls(config, batch, length):
        # activation-by-activation products stay fp32 in both int8 paths
        q = int8 and mm.weight
        key = (fmt, q, mm.m, mm.k, mm.n)
        if key not in memo:
            times = [torch_matmul(mm.m, mm.k, mm.n, q, threads)]
            if fmt == "onnx" or not q:
                times.append(onnx_matmul(mm.m, mm.k, mm.n, q, threads, folder))
            memo[key] = min(times)
        t = memo[key] * mm.count
        total += t
        rows.append({"product": mm.name, "shape": [mm.m, mm.k, mm.n], "count": mm.count, "int8": q,
                     "ms": t, "gops_per_s": mm.ops / t / 1e6})
    return {"ms": total, "products": rows}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("run_dir")
    ap.add_argument("--batch-size", type=int, nargs="+", default=[1, 8])
    ap.add_argument("--sequence-length", type=int, default=128)
    ap.add_argument("--threads", type=int, default=2)
    args = ap.parse_args()

    from transformers import AutoConfig

    from shrinkwrap.bench.flops import ops_per_forward
    from shrinkwrap.bench.grid import Point
    from shrinkwrap.bench.machine import describe
    from shrinkwrap.bench.measure import bench_target

    results = json.loads((Path(args.run_dir) / "results.json").read_text())
    cfg = type("Cfg", (), dict(threads=args.threads, warmup=5, warm_seconds=0.2, repeats=30, timed_seconds=1.0,
                               eval_batch_size=32))()
    memo: dict = {}
    out = []
    with tempfile.TemporaryDirectory() as tmp:
        for step in results["steps"]:
            config = AutoConfig.from_pretrained(Path(step["path"]))
            int8 = "int8" in step["name"]
            measured = bench_target(step["path"], cfg, [Point(b, args.sequence_length) for b in args.batch_size])
            for row in measured["latency"]:
                b = row["batch_size"]
                lim = limit_ms(config, b, args.sequence_length, step["format"], int8, args.threads, Path(tmp), memo)
                ops = ops_per_forward(config, b, args.sequence_length)
                out.append({"step": step["name"], "batch_size": b, "sequence_length": args.sequence_length,
                            "ops": ops, "p50_ms": row["p50"], "achieved_gops_per_s": ops / row["p50"] / 1e6,
                            "limit_ms": lim["ms"], "efficiency": lim["ms"] / row["p50"], "products": lim["products"]})
    lines = ["| step | batch × tokens | GOP per call | p50 ms | achieved GOP/s | limit ms | share of limit |",
             "|---|---|---:|---:|---:|---:|---:|"]
    for r in out:
        lines.append(f"| {r['step']} | {r['batch_size']} × {r['sequence_length']} | {r['ops'] / 1e9:.2f} | "
                     f"{r['p50_ms']:.2f} | {r['achieved_gops_per_s']:.1f} | {r['limit_ms']:.2f} | {r['efficiency']:.0%} |")
    text = "\n".join(lines)
    print(text)
    print(f"\n{describe()['cpu']}, {args.threads} threads. Limit: the same matrix products timed alone at the "
          f"best of PyTorch and ONNX Runtime kernels (int8 for the int8 steps' weight products).")
    (ROOT / "benchmarks" / "out").mkdir(parents=True, exist_ok=True)
    (ROOT / "benchmarks" / "out" / "efficiency.json").write_text(json.dumps(
        {"rows": out, "machine": describe(), "threads": args.threads}, indent=2))


if __name__ == "__main__":
    sys.exit(main())
