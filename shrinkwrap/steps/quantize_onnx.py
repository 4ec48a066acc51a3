"""Student ONNX int8, two ways.

student-onnx-int8 (dynamic): weights of the chosen operator types become int8 (per tensor or per
channel); activations are quantised on the fly at run time. Quantising the embedding lookup matters:
the embedding matrix is about half of a small encoder's bytes. Which operator holds it depends on
the graph: Gather in an unfused graph, EmbedLayerNormalization in one fused by the transformer optimizer.

student-onnx-int8-static (optional): weights and activations int8 in the QDQ format, with activation
ranges (min/max) calibrated on training texts. ONNX Runtime's QDQ quantiser has no form of the fused
Attention and EmbedLayerNormalization, so this step exports the student again without fusion.
"""
from __future__ import annotations

import logging
import tempfile
from collections import Counter
from pathlib import Path

import numpy as np
import onnx

from shrinkwrap.data import all_logits, collate
from shrinkwrap.onnx_tools import run_logits, session
from shrinkwrap.recipe import STATIC_OP_TYPES
from shrinkwrap.steps.export import MODEL_FILE

_EIGHT_BIT = (onnx.TensorProto.INT8, onnx.TensorProto.UINT8)


def quantize(src: Path, dst: Path, per_channel: bool, op_types: list[str]) -> None:
    from onnxruntime.quantization import QuantType, quantize_dynamic

    logging.getLogger().setLevel(logging.ERROR)  # its advice to pre-process is for static CNN quantisation
    quantize_dynamic(str(src), str(dst), per_channel=per_channel, weight_type=QuantType.QInt8,
                     op_types_to_quantize=list(op_types),
                     # a graph already fused by the transformer optimizer fails type inference without this
                     extra_options={"DefaultTensorType": onnx.TensorProto.FLOAT})
    onnx.checker.check_model(str(dst), full_check=True)


def quantize_static_qdq(src: Path, dst: Path, calibration: list[dict], pad_id: int, per_channel: bool,
                        op_types: list[str]) -> None:
    """QDQ int8 of `src`: int8 weights, uint8 activations (the pairing ONNX Runtime's CPU kernels are
    fastest with), ranges from the min/max seen on `calibration` (one unpadded text per run)."""
    from onnxruntime.quantization import (CalibrationDataReader, CalibrationMethod, QuantFormat, QuantType,
                                          quantize_static)

    graph_inputs = {i.name for i in onnx.load(str(src), load_external_data=False).graph.input}

    class Texts(CalibrationDataReader):
        def __init__(self):
            self._left = iter(calibration)

        def get_next(self):
            example = next(self._left, None)
            if example is None:
                return None
            return {k: v for k, v in collate([example], pad_id).items() if k in graph_inputs}

    logging.getLogger().setLevel(logging.ERROR)
    quantize_static(str(src), str(dst), Texts(), quant_format=QuantFormat.QDQ, per_channel=per_channel,
                    weight_type=QuantType.QInt8, activation_type=QuantType.QUInt8,
                    op_types_to_quantize=list(op_types), calibrate_method=CalibrationMethod.MinMax,
                    extra_options={"DefaultTensorType": onnx.TensorProto.FLOAT})
    onnx.checker.check_model(str(dst), full_check=True)


def int8_summary(path: Path, vocab_size: int | None) -> dict:
    """What really became int8, read back from the graph (an op type in the recipe that the graph does
    not have, or that the quantiser skips, changes nothing, silently)."""
    graph = onnx.load(str(path), load_external_data=False).graph
    eight = sum(int(np.prod(i.dims)) for i in graph.initializer if i.data_type in _EIGHT_BIT)
    floats = sum(int(np.prod(i.dims)) * 4 for i in graph.initializer if i.data_type == onnx.TensorProto.FLOAT)
    table = [i for i in graph.initializer if len(i.dims) == 2 and vocab_size and i.dims[0] == vocab_size]
    ops = Counter(n.op_type for n in graph.node)
    int8_ops = {k: v for k, v in ops.items()
                if k in ("MatMulInteger", "QAttention", "QEmbedLayerNormalization", "QuantizeLinear",
                         "DequantizeLinear", "DynamicQuantizeLinear", "QGemm")}
    return {"embeddings_int8": bool(table) and all(t.data_type in _EIGHT_BIT for t in table),
            "weight_bytes_int8_share": round(eight / max(1, eight + floats), 4),
            "int8_nodes": int8_ops}


def vocab_size_of(folder: Path) -> int | None:
    """The vocabulary size in the folder's config.json; None without one."""
    import json

    try:
        return json.loads((folder / "config.json").read_text(encoding="utf-8")).get("vocab_size")
    except (OSError, ValueError):
        return None


def agreement(fp32_path: Path, int8_path: Path, examples: list[dict], pad_id: int, n_labels: int,
              threads: int) -> dict:
    fp32_sess, int8_sess = session(fp32_path, threads), session(int8_path, threads)
    fp32 = all_logits(lambda b: run_logits(fp32_sess, b), examples, pad_id, n_labels)
    int8 = all_logits(lambda b: run_logits(int8_sess, b), examples, pad_id, n_labels)
    return {"agreement_with_fp32": float((fp32.argmax(1) == int8.argmax(1)).mean()),
            "max_abs_logit_diff_vs_fp32": float(np.abs(fp32 - int8).max())}


def run(ctx, src: Path, out: Path) -> dict:
    cfg = ctx.recipe.onnx_quantize
    src_dir = src
    tokens = ctx.tokens_of(src)
    quantize(src_dir / MODEL_FILE, out / MODEL_FILE, cfg.per_channel, cfg.op_types)
    for f in src_dir.iterdir():  # tokenizer and config travel with the model
        if f.is_file() and f.name not in (MODEL_FILE, "step.json", "bench.json"):
            (out / f.name).write_bytes(f.read_bytes())
    return {"method": "ONNX Runtime dynamic int8", "per_channel": cfg.per_channel,
            "op_types": list(cfg.op_types), **int8_summary(out / MODEL_FILE, vocab_size_of(out)),
            **agreement(src_dir / MODEL_FILE, out / MODEL_FILE, tokens.encoded["test"], tokens.pad_id,
                        len(ctx.data.label_names), ctx.recipe.bench.threads)}


def run_static(ctx, src: Path, out: Path) -> dict:
    from shrinkwrap.models import load_classifier
    from shrinkwrap.steps.export import export_onnx

    cfg = ctx.recipe.onnx_quantize
    op_types = [t for t in cfg.op_types if t in STATIC_OP_TYPES]
    tokens = ctx.tokens_of(src)
    calibration = tokens.encoded["train"][: cfg.static_calibration_texts]
    model = load_classifier(str(src))
    with tempfile.TemporaryDirectory(dir=out) as tmp:
        plain = export_onnx(model, Path(tmp), ctx.recipe.export.opset)
        quantize_static_qdq(plain, out / MODEL_FILE, calibration, tokens.pad_id, cfg.per_channel, op_types)
        agrees = agreement(plain, out / MODEL_FILE, tokens.encoded["test"], tokens.pad_id, len(ctx.data.label_names),
                           ctx.recipe.bench.threads)
    model.config.save_pretrained(out)
    tokens.tokenizer.save_pretrained(out)
    return {"method": "ONNX Runtime static int8 (QDQ)", "graph": "plain",
            "per_channel": cfg.per_channel,
            "op_types": op_types, "calibration_texts": len(calibration), "calibration": "MinMax",
            "activations": "uint8", "weights": "int8",
            **int8_summary(out / MODEL_FILE, model.config.vocab_size), **agrees}
