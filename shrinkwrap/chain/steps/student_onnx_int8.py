"""Student ONNX int8 (dynamic): the weights of the chosen operator types of student-onnx become int8 (per tensor
or per channel); activations are quantised on the fly at run time. Quantising the embedding lookup matters:
the embedding matrix is about half of a small encoder's bytes. Which operator holds it depends on the graph:
Gather in an unfused graph, EmbedLayerNormalization in one fused by the transformer optimizer.

The conversion is shrinkwrap.ml.convert's (shared with `shrinkwrap package`).
"""
from __future__ import annotations

import shutil
from pathlib import Path

from shrinkwrap.ml.convert import agreement, int8_summary, quantize_dynamic, vocab_size_of
from shrinkwrap.serve.rundir import BENCH_FILE, MODEL_FILE, STEP_FILE


def run(ctx, src: Path, out: Path) -> dict:
    cfg = ctx.recipe.onnx_quantize
    tokens = ctx.student_tokens(src)

    quantize_dynamic(src / MODEL_FILE, out / MODEL_FILE, cfg.per_channel, cfg.int8_operators)

    for f in src.iterdir():  # tokenizer and config travel with the model
        if f.is_file() and f.name not in (MODEL_FILE, STEP_FILE, BENCH_FILE):
            shutil.copyfile(f, out / f.name)
    return {"method": "ONNX Runtime dynamic int8", "per_channel": cfg.per_channel,
            "int8_operators": list(cfg.int8_operators), **int8_summary(out / MODEL_FILE, vocab_size_of(out)),
            **agreement(src / MODEL_FILE, out / MODEL_FILE, tokens.encoded["test"], tokens.pad_id,
                        ctx.recipe.bench.threads, ctx.recipe.bench.eval_batch_size, ctx.task)}
