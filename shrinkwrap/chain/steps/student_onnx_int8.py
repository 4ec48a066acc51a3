"""Student ONNX int8 (ships, and is gated): int8 weights, and activations scaled one row (one token of one text)
at a time, so that every text gets the same scores whatever else is in its batch (shrinkwrap.ml.int8_rows).
The embedding tables are int8 too (weight-only lookups).

A fused Attention node would quantise its input over the whole batch, so the last fp32 student is exported again,
unfused: its query, key and value projections stay MatMuls, which per-row int8 reaches, and ONNX Runtime fuses its
LayerNorms and GELUs itself when it loads the graph (timed faster than the graph fused without attention:
benchmarks/batch_independence.py). That export is proven against PyTorch as student-onnx's is
(export.parity_tolerance). The conversions are shrinkwrap.ml.convert's and shrinkwrap.ml.int8_rows'.
"""
from __future__ import annotations

import shutil
import tempfile
from pathlib import Path

from shrinkwrap.ml.convert import agreement, export_checked, int8_summary, vocab_size_of
from shrinkwrap.ml.int8_rows import METHOD, quantize_rows
from shrinkwrap.serve.rundir import BENCH_FILE, MODEL_FILE, STEP_FILE, STUDENT_ONNX_INT8

__all__ = ["METHOD", "run"]  # METHOD: part of this step's fingerprint (the chain reads it here)


def run(ctx, src: Path, out: Path) -> dict:
    cfg, threads = ctx.recipe.onnx_quantize, ctx.recipe.bench.threads
    tokens = ctx.student_tokens(src)
    model = ctx.task.load(str(ctx.last_student_dir))

    with tempfile.TemporaryDirectory(dir=out) as tmp:
        plain = ctx.recipe.export.model_copy(update={"optimize": "never"})
        export = export_checked(model, tokens.encoded["test"], tokens.pad_id, lambda path: None, plain, threads,
                                Path(tmp), ctx.task, what=STUDENT_ONNX_INT8)
        rows = quantize_rows(Path(tmp) / MODEL_FILE, out / MODEL_FILE, cfg.per_channel, cfg.int8_operators)

    for f in src.iterdir():  # tokenizer and config travel with the model
        if f.is_file() and f.name not in (MODEL_FILE, STEP_FILE, BENCH_FILE):
            shutil.copyfile(f, out / f.name)
    return {"method": METHOD, "activation_scales": "one per row (token), at run time", "batch_independent": True,
            "graph": export["graph"],
            "parity": export["parity"], "per_channel": cfg.per_channel, "int8_operators": list(cfg.int8_operators),
            **rows, **int8_summary(out / MODEL_FILE, vocab_size_of(out)),
            **agreement(src / MODEL_FILE, out / MODEL_FILE, tokens.encoded["test"], tokens.pad_id, threads,
                        ctx.recipe.bench.eval_batch_size, ctx.task)}
