"""Student ONNX int8, two ways (the conversions are shrinkwrap.onnx_ops's).

student-onnx-int8 (dynamic): weights of the chosen operator types become int8 (per tensor or per
channel); activations are quantised on the fly at run time. Quantising the embedding lookup matters:
the embedding matrix is about half of a small encoder's bytes. Which operator holds it depends on
the graph: Gather in an unfused graph, EmbedLayerNormalization in one fused by the transformer optimizer.

student-onnx-int8-static (optional): weights and activations int8 in the QDQ format, with activation
ranges (min/max) calibrated on training texts. ONNX Runtime's QDQ quantiser has no form of the fused
Attention and EmbedLayerNormalization, so this step exports the student again without fusion.
"""
from __future__ import annotations

import shutil
import tempfile
from pathlib import Path

from shrinkwrap.models import load_classifier
from shrinkwrap.onnx_ops import (agreement, export_onnx, int8_summary, quantize_dynamic, quantize_static_qdq,
                                 vocab_size_of)
from shrinkwrap.recipe import STATIC_OP_TYPES
from shrinkwrap.rundir import BENCH_FILE, MODEL_FILE, STEP_FILE


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
                        len(ctx.data.label_names), ctx.recipe.bench.threads, ctx.recipe.bench.eval_batch_size)}


def run_static(ctx, src: Path, out: Path) -> dict:
    cfg = ctx.recipe.onnx_quantize
    op_types = [t for t in cfg.int8_operators if t in STATIC_OP_TYPES]
    tokens = ctx.student_tokens(src)
    calibration = tokens.encoded["train"][: cfg.static_calibration_texts]
    model = load_classifier(str(src))

    with tempfile.TemporaryDirectory(dir=out) as tmp:
        plain = export_onnx(model, Path(tmp), ctx.recipe.export.opset)
        quantize_static_qdq(plain, out / MODEL_FILE, calibration, tokens.pad_id, cfg.per_channel, op_types)
        agrees = agreement(plain, out / MODEL_FILE, tokens.encoded["test"], tokens.pad_id, len(ctx.data.label_names),
                           ctx.recipe.bench.threads, ctx.recipe.bench.eval_batch_size)

    model.config.save_pretrained(out)
    tokens.tokenizer.save_pretrained(out)
    return {"method": "ONNX Runtime static int8 (QDQ)", "graph": "plain",
            "per_channel": cfg.per_channel,
            "int8_operators": op_types, "calibration_texts": len(calibration), "calibration": "MinMax",
            "activations": "uint8", "weights": "int8",
            **int8_summary(out / MODEL_FILE, model.config.vocab_size), **agrees}
