"""Student ONNX int8, dynamic (optional, measured only): ONNX Runtime's dynamic int8 of student-onnx, the form
the chain shipped before per-row int8. The weights of the chosen operator types become int8 (per tensor or per
channel); activations are quantised at run time with one scale for the whole batch tensor, padding included, so
a text's scores depend on the texts batched with it: **batch-dependent**. Its accuracy is measured one test text
at a time (the benchmark feeds a batch-dependent graph so), which is what a caller sending single texts gets.

Quantising the embedding lookup matters: the embedding matrix is about half of a small encoder's bytes. Which
operator holds it depends on the graph: Gather in an unfused graph, EmbedLayerNormalization in one fused by the
transformer optimizer. The conversion is shrinkwrap.ml.convert's.
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
    return {"method": "ONNX Runtime dynamic int8", "activation_scales": "one per batch tensor, at run time",
            "batch_independent": False, "per_channel": cfg.per_channel,
            "int8_operators": list(cfg.int8_operators), **int8_summary(out / MODEL_FILE, vocab_size_of(out)),
            # one text at a time, as its accuracy is measured
            **agreement(src / MODEL_FILE, out / MODEL_FILE, tokens.encoded["test"], tokens.pad_id,
                        ctx.recipe.bench.threads, 1, ctx.task)}
