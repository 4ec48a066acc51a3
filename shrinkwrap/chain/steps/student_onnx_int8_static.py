"""Student ONNX int8, static (optional, measured only): weights and activations int8 in the QDQ format, with
activation ranges (min/max) calibrated on training texts. ONNX Runtime's QDQ quantiser has no form of the fused
Attention and EmbedLayerNormalization, so this step exports the student again without fusion.

The conversions are shrinkwrap.ml.convert's.
"""
from __future__ import annotations

import tempfile
from pathlib import Path

from shrinkwrap.ml.convert import agreement, export_onnx, int8_summary, quantize_static_qdq
from shrinkwrap.recipe.schema import STATIC_OP_TYPES
from shrinkwrap.serve.rundir import MODEL_FILE


def run(ctx, src: Path, out: Path) -> dict:
    cfg = ctx.recipe.onnx_quantize
    op_types = [t for t in cfg.int8_operators if t in STATIC_OP_TYPES]
    tokens = ctx.student_tokens(src)
    calibration = tokens.encoded["train"][: cfg.static_calibration_texts]
    model = ctx.task.load(str(src))

    with tempfile.TemporaryDirectory(dir=out) as tmp:
        plain = export_onnx(model, Path(tmp), ctx.recipe.export.opset, ctx.task)
        quantize_static_qdq(plain, out / MODEL_FILE, calibration, tokens.pad_id, cfg.per_channel, op_types)
        agrees = agreement(plain, out / MODEL_FILE, tokens.encoded["test"], tokens.pad_id, ctx.recipe.bench.threads,
                           ctx.recipe.bench.eval_batch_size, ctx.task)

    ctx.task.save_config(model, out)
    tokens.tokenizer.save_pretrained(out)
    return {"method": "ONNX Runtime static int8 (QDQ)", "activation_scales": "calibrated once, fixed",
            "batch_independent": True, "graph": "plain",
            "per_channel": cfg.per_channel,
            "int8_operators": op_types, "calibration_texts": len(calibration), "calibration": "MinMax",
            "activations": "uint8", "weights": "int8",
            **int8_summary(out / MODEL_FILE, model.config.vocab_size), **agrees}
