"""Int8 with one activation scale per row: every text's scores independent of the texts batched with it.

ONNX Runtime's dynamic int8 (DynamicQuantizeLinear, QAttention) scales a MatMul's input by the range of the whole
batch tensor, padding included, so a text's int8 codes, and its scores, change with its batch companions. Here
each MatMul (and Gemm) with a stored weight is rewritten so that every row of its input (one token of one text)
gets its own scale. With the input viewed as rows × K:

    s = max(ReduceMax(|x|, per row), tiny) / 127                       one scale per row
    q = QuantizeLinear(x, s, 128, axis=0)                              symmetric codes -127..127, stored + 128
    y = MatMulIntegerToFloat(q, W_int8, 1, w_scale, 128) · s (+ b)     exact integer product, then both scales

q depends on its row alone, the integer product is exact whatever the batch, and the rescaling is elementwise, so a
row's output is the same in any batch, padded or not. The weights are int8, symmetric, one scale per output column
(per_channel) or one per tensor. MatMulIntegerToFloat is an ONNX Runtime operator (com.microsoft, like the
QAttention of its dynamic int8); the rest is standard ONNX (opset 13 or later). The embedding tables are quantised by
ONNX Runtime's quantiser, whose Gather and EmbedLayerNormalization forms are weight-only (they read stored rows; no
activation is scaled), hence row-independent too. A fused Attention node would quantise its input over the whole
batch: the graph to rewrite is the plain export (benchmarks/batch_independence.py timed it faster than one fused
without attention; ONNX Runtime fuses its LayerNorms and GELUs when it loads it).
"""
from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
import onnx
from onnx import helper, numpy_helper

METHOD = "int8, one activation scale per row (QuantizeLinear per row, MatMulIntegerToFloat)"
# The operator types whose ONNX Runtime int8 form is weight-only (the embedding lookups).
WEIGHT_ONLY_OPS = ("Gather", "EmbedLayerNormalization")
_OFFSET = 128   # uint8 storage of symmetric codes: MLAS's fast u8 x s8 kernels take uint8 activations
_CONSTANTS = {"tiny": np.array(1e-30, np.float32), "inv127": np.array(1 / 127, np.float32),
              "zero_point": np.array(_OFFSET, np.uint8), "one": np.array(1.0, np.float32),
              "rows_axis": np.array([1], np.int64), "start": np.array([0], np.int64), "end": np.array([-1], np.int64)}


def quantize_rows(src: Path, dst: Path, per_channel: bool, op_types: list[str]) -> dict:
    """dst: `src` with every MatMul (and Gemm) whose weight is stored rewritten to per-row int8 (when "MatMul" is
    in op_types), and its embedding lookups int8 weight-only (the WEIGHT_ONLY_OPS in op_types, by ONNX Runtime's
    quantiser). Returns what it rewrote."""
    from shrinkwrap.ml.convert import quantize_dynamic, sort_topologically

    lookups = [t for t in op_types if t in WEIGHT_ONLY_OPS]
    with tempfile.TemporaryDirectory() as tmp:
        start = Path(src)
        if lookups:
            start = Path(tmp) / "lookups.onnx"
            quantize_dynamic(Path(src), start, per_channel, lookups)
        model = onnx.load(str(start))
    rewritten = rewrite_matmuls(model, per_channel) if {"MatMul", "Gemm"} & set(op_types) else 0
    onnx.save(model, str(dst))
    sort_topologically(dst)
    onnx.checker.check_model(str(dst), full_check=True)
    return {"matmuls_per_row": rewritten, "weight_only_ops": lookups}


def rewrite_matmuls(model: onnx.ModelProto, per_channel: bool) -> int:
    """Rewrites, in place, the main graph's MatMul nodes whose second input is a stored 2-D weight, and its Gemm
    nodes of the plain x·Wᵀ + b form. MatMuls reading the same input (a layer's query, key and value) share its
    codes. Returns how many were rewritten."""
    graph = model.graph
    opset = next((o.version for o in model.opset_import if o.domain in ("", "ai.onnx")), 0)
    if opset < 13:
        raise ValueError(f"per-row int8 needs opset 13 or later, the graph has {opset}")
    weights = {i.name: i for i in graph.initializer}
    uses: dict[str, int] = {}
    for node in graph.node:
        for x in node.input:
            uses[x] = uses.get(x, 0) + 1
    constants: dict[str, str] = {}
    codes: dict[str, tuple[str, str, str]] = {}   # input -> (its codes, its row scales, its leading shape)
    stored: set[str] = set()                      # weights already written as int8 codes and scales
    nodes, count = [], 0
    for node in graph.node:
        found = _stored_weight(node, weights)
        if found is None:
            nodes.append(node)
            continue
        name, matrix, bias = found
        constants = constants or _add_constants(graph)
        x = node.input[0]
        if x not in codes:
            codes[x] = (f"{_safe(x)}_rows_q", f"{_safe(x)}_rows_s", f"{_safe(x)}_rows_lead")
            nodes.extend(_row_codes(graph, x, matrix.shape[0], *codes[x], constants, opset))
        key = name if node.op_type == "MatMul" else f"{name}_T"   # a Gemm's weight is stored transposed
        if key not in stored:
            stored.add(key)
            w_codes, w_scale = weight_codes(matrix, per_channel)
            # ONNX Runtime's quantiser's names (<weight>_quantized, <weight>_scale), which tools read
            graph.initializer.extend([numpy_helper.from_array(w_codes, f"{key}_quantized"),
                                      numpy_helper.from_array(w_scale, f"{key}_scale"),
                                      numpy_helper.from_array(np.array([matrix.shape[1]], np.int64), f"{key}_width")])
        prefix = f"{_safe(node.name or node.output[0])}_rows"
        nodes.extend(_row_product(graph, prefix, *codes[x], key, bias, node.output[0], constants))
        count += 1
        for used in [name] + ([node.input[2]] if node.op_type == "Gemm" and len(node.input) > 2 else []):
            uses[used] -= 1
            if uses[used] == 0 and used in weights:
                graph.initializer.remove(weights.pop(used))
    del graph.node[:]
    graph.node.extend(nodes)
    if count and not any(o.domain == "com.microsoft" for o in model.opset_import):
        model.opset_import.append(helper.make_opsetid("com.microsoft", 1))
    return count


def _safe(name: str) -> str:
    return "".join(ch if ch.isalnum() or ch in "_." else "_" for ch in name)


def _stored_weight(node, weights) -> tuple[str, np.ndarray, np.ndarray | None] | None:
    """(weight name, W as [K, N], bias or None) of a MatMul / Gemm computing x·W (+ b) with W stored; else None."""
    if node.op_type == "MatMul" and node.input[1] in weights:
        w = numpy_helper.to_array(weights[node.input[1]])
        if w.ndim == 2 and w.dtype == np.float32:
            return node.input[1], w, None
    if node.op_type == "Gemm" and node.input[1] in weights:
        attrs = {a.name: helper.get_attribute_value(a) for a in node.attribute}
        if attrs.get("transA", 0) or attrs.get("alpha", 1.0) != 1.0 or attrs.get("beta", 1.0) != 1.0:
            return None
        w = numpy_helper.to_array(weights[node.input[1]])
        bias = None
        if len(node.input) > 2 and node.input[2]:
            if node.input[2] not in weights:
                return None
            bias = numpy_helper.to_array(weights[node.input[2]])
        if w.dtype == np.float32:
            return node.input[1], (w.T if attrs.get("transB", 0) else w), bias
    return None


def _add_constants(graph) -> dict[str, str]:
    """The constants every rewritten MatMul uses, added once."""
    names = {}
    for key, value in _CONSTANTS.items():
        graph.initializer.append(numpy_helper.from_array(value, f"int8_rows_{key}"))
        names[key] = f"int8_rows_{key}"
    return names


def weight_codes(w: np.ndarray, per_channel: bool) -> tuple[np.ndarray, np.ndarray]:
    """(int8 codes, scales): W ≈ codes × scales, symmetric, one scale per column (per_channel) or one in all."""
    peak = np.abs(w).max(axis=0) if per_channel else np.array(np.abs(w).max())
    scale = (np.where(peak > 0, peak, 1.0) / 127).astype(np.float32)
    codes = np.clip(np.round(w / scale), -127, 127).astype(np.int8)
    return codes, scale


def _row_codes(graph, x: str, k: int, q: str, scale: str, lead: str, c: dict, opset: int) -> list:
    """Nodes viewing `x` as rows of k, and computing each row's scale (as a column) and uint8 codes."""
    p = q.removesuffix("_q")
    graph.initializer.append(numpy_helper.from_array(np.array([-1, k], np.int64), f"{p}_as_rows"))
    reduce_max = (helper.make_node("ReduceMax", [f"{p}_abs", c["rows_axis"]], [f"{p}_peak"], keepdims=0)
                  if opset >= 18 else   # axes became an input in opset 18
                  helper.make_node("ReduceMax", [f"{p}_abs"], [f"{p}_peak"], axes=[1], keepdims=0))
    return [
        helper.make_node("Reshape", [x, f"{p}_as_rows"], [f"{p}_rows"]),
        helper.make_node("Shape", [x], [f"{p}_shape"]),
        helper.make_node("Slice", [f"{p}_shape", c["start"], c["end"]], [lead]),   # all but the last axis
        helper.make_node("Abs", [f"{p}_rows"], [f"{p}_abs"]),
        reduce_max,
        helper.make_node("Max", [f"{p}_peak", c["tiny"]], [f"{p}_peak_safe"]),   # an all-zero row
        helper.make_node("Mul", [f"{p}_peak_safe", c["inv127"]], [f"{p}_step"]),
        helper.make_node("Shape", [f"{p}_step"], [f"{p}_count"]),
        helper.make_node("Expand", [c["zero_point"], f"{p}_count"], [f"{p}_zero_points"]),
        helper.make_node("QuantizeLinear", [f"{p}_rows", f"{p}_step", f"{p}_zero_points"], [q], axis=0),
        helper.make_node("Unsqueeze", [f"{p}_step", c["rows_axis"]], [scale]),
    ]


def _row_product(graph, p: str, q: str, scale: str, lead: str, w: str, bias, out: str, c: dict) -> list:
    """Nodes computing x·W (+ b) from x's codes and row scales and W's codes and scales (w: W's stored name)."""
    nodes = [
        helper.make_node("MatMulIntegerToFloat", [q, f"{w}_quantized", c["one"], f"{w}_scale", c["zero_point"]],
                         [f"{p}_float"], domain="com.microsoft"),
        helper.make_node("Mul", [f"{p}_float", scale], [f"{p}_scaled"]),
    ]
    last = f"{p}_scaled"
    if bias is not None:
        graph.initializer.append(numpy_helper.from_array(bias.astype(np.float32), f"{p}_bias"))
        nodes.append(helper.make_node("Add", [last, f"{p}_bias"], [f"{p}_biased"]))
        last = f"{p}_biased"
    return nodes + [helper.make_node("Concat", [lead, f"{w}_width"], [f"{p}_shape"], axis=0),
                    helper.make_node("Reshape", [last, f"{p}_shape"], [out])]
