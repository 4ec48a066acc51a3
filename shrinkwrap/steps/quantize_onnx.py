"""Student ONNX int8: ONNX Runtime dynamic int8 of the exported graph.

Weights of the chosen operator types become int8 (per tensor or per channel); activations are
quantised on the fly. Quantising the embedding lookup (Gather / EmbedLayerNormalization) matters:
the embedding matrix is about half of a small encoder's bytes.
"""
from __future__ import annotations

from pathlib import Path

import onnx

from shrinkwrap.data import all_logits
from shrinkwrap.onnx_tools import run_logits, session
from shrinkwrap.steps.export import MODEL_FILE


def quantize(src: Path, dst: Path, per_channel: bool, op_types: list[str]) -> None:
    import logging

    from onnxruntime.quantization import QuantType, quantize_dynamic

    logging.getLogger().setLevel(logging.ERROR)  # its advice to pre-process is for static CNN quantisation
    quantize_dynamic(str(src), str(dst), per_channel=per_channel, weight_type=QuantType.QInt8,
                     op_types_to_quantize=list(op_types),
                     # a graph already fused by the transformer optimizer fails type inference without this
                     extra_options={"DefaultTensorType": onnx.TensorProto.FLOAT})
    onnx.checker.check_model(str(dst), full_check=True)


def run(ctx, out: Path) -> dict:
    cfg = ctx.recipe.onnx_quantize
    src_dir = ctx.outputs["student-onnx"]
    quantize(src_dir / MODEL_FILE, out / MODEL_FILE, cfg.per_channel, cfg.op_types)
    for f in src_dir.iterdir():  # tokenizer and config travel with the model
        if f.is_file() and f.name not in (MODEL_FILE, "step.json", "bench.json"):
            (out / f.name).write_bytes(f.read_bytes())
    n = len(ctx.data.label_names)
    fp32_sess = session(src_dir / MODEL_FILE, ctx.recipe.bench.threads)
    int8_sess = session(out / MODEL_FILE, ctx.recipe.bench.threads)
    fp32 = all_logits(lambda b: run_logits(fp32_sess, b), ctx.encoded["test"], ctx.pad_id, n)
    int8 = all_logits(lambda b: run_logits(int8_sess, b), ctx.encoded["test"], ctx.pad_id, n)
    return {"per_channel": cfg.per_channel, "op_types": list(cfg.op_types),
            "agreement_with_fp32": float((fp32.argmax(1) == int8.argmax(1)).mean())}
