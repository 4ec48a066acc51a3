"""ONNX conversions shared by the ONNX steps and by `shrinkwrap package`: the fp32 export proven against
PyTorch, the transformer-graph fusion, the two int8 variants, and what a graph holds after them.

The exporter is optimum's (torch.onnx underneath): it knows the text-classification task's inputs,
outputs and dynamic batch/sequence axes for every BERT-family architecture, so the graph it writes
is the same one we would write by hand with torch.onnx, without per-architecture code here.
Sessions and feeds come from shrinkwrap.serve.sessions, the torch-free part the predict path uses.
"""
from __future__ import annotations

import logging
import shutil
import tempfile
import warnings
from collections import Counter
from pathlib import Path
from types import ModuleType
from typing import Callable, Optional

import numpy as np
import onnx

from shrinkwrap.ml import classification
from shrinkwrap.ml.models import MISTRAL_REGEX_NOTICE, library_notices_silenced
from shrinkwrap.ml.train import predict_outputs
from shrinkwrap.serve.batches import all_outputs, collate
from shrinkwrap.serve.errors import StepFailed
from shrinkwrap.serve.rundir import CONFIG_FILE, MODEL_FILE, STUDENT_ONNX, read_json_or_none
from shrinkwrap.serve.sessions import run_outputs, session

# Part of the student-onnx step's fingerprint: a run folder whose export was chosen by an earlier rule is redone.
GRAPH_RULE = "fused when it passes parity, never by timing"

_EIGHT_BIT = (onnx.TensorProto.INT8, onnx.TensorProto.UINT8)
_INT8_OPS = ("MatMulInteger", "MatMulIntegerToFloat", "QAttention", "QEmbedLayerNormalization", "QuantizeLinear",
             "DequantizeLinear", "DynamicQuantizeLinear", "QGemm")


# ---- fp32 export -----------------------------------------------------------------------------------------


def export_onnx(model, folder: Path, opset: int, task: ModuleType = classification, finish: bool = True) -> Path:
    """folder/model.onnx: the model's fp32 graph (the exporter's graph for the task, finished as the task says: a
    classifier's ends in its logits, a sentence encoder's in its pooled vector), checked by onnx.checker.
    finish=False: the exporter's graph alone (export_checked finishes it after fusion)."""
    from optimum.exporters.onnx import onnx_export_from_model

    # The exporter loads the tokenizer beside the model's weights too, hence transformers' notice there.
    with warnings.catch_warnings(), library_notices_silenced(MISTRAL_REGEX_NOTICE):
        warnings.simplefilter("ignore")
        onnx_export_from_model(task.exportable(model), str(folder), task=task.EXPORT_TASK, opset=opset,
                               do_validation=False)
    path = folder / MODEL_FILE
    if finish:
        task.finish_graph(path, model)
    onnx.checker.check_model(str(path), full_check=True)
    return path


def fuse(path: Path, config, out_path: Path, attention: bool = True) -> Path:
    """ONNX Runtime's transformer optimizer: fuses attention (unless attention=False), LayerNorm, GELU and the
    embedding layer."""
    from onnxruntime.transformers.fusion_options import FusionOptions
    from onnxruntime.transformers.optimizer import optimize_model

    options = FusionOptions("bert")
    options.enable_attention = attention
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        # Its BERT fusions serve every encoder family we export (BERT, RoBERTa, DistilBERT, ELECTRA alike).
        opt = optimize_model(str(path), model_type="bert", num_heads=config.num_attention_heads,
                             hidden_size=config.hidden_size, opt_level=1, optimization_options=options)
    opt.save_model_to_file(str(out_path))
    onnx.checker.check_model(str(out_path), full_check=True)
    return out_path


def parity(path: Path, torch_outputs: np.ndarray, examples: list[dict], pad_id: int, threads: int,
           task: ModuleType = classification) -> dict:
    """How far the graph's outputs are from PyTorch's on `examples` (the task's figures: a classifier's largest
    logit gap and how many labels differ)."""
    sess = session(path, threads)
    got = all_outputs(lambda b: run_outputs(sess, b), examples, pad_id, torch_outputs.shape[1])
    return {**task.parity(got, torch_outputs), "texts": len(examples)}


def export_checked(model, examples: list[dict], pad_id: int, time_graph: Callable[[Path], Optional[float]], cfg,
                   threads: int, out: Path, task: ModuleType = classification, what: str = STUDENT_ONNX) -> dict:
    """Writes out/model.onnx: the fp32 export, fused unless `cfg.optimize` is `never`, proven to give
    PyTorch's logits on `examples`. Raises StepFailed naming `what` when no graph passes (with `always`:
    when the fused one does not). `time_graph(path) -> ms or None` times each graph for the record (the benchmark's
    protocol, shrinkwrap.bench.latency.graph_p50_ms, given by the caller).

    The choice never depends on the timings, which are recorded for both graphs: on a busy 2-core machine
    the two are within noise of each other, and a choice by speed made the same recipe ship different
    artifacts (different int8 graphs, different accuracy) from run to run."""
    torch_logits = predict_outputs(model, examples, pad_id, task=task)
    with tempfile.TemporaryDirectory(dir=out) as tmp:
        tmp = Path(tmp)
        plain = export_onnx(model, tmp, cfg.opset, task, finish=False)
        candidates = {"plain": plain}
        if cfg.optimize != "never":  # the exporter's graph is fused, then finished (the optimizer knows its nodes)
            candidates["fused"] = fuse(plain, model.config, tmp / "fused.onnx")
        for path in candidates.values():
            task.finish_graph(path, model)
        report = {}
        for name, path in candidates.items():
            report[name] = parity(path, torch_logits, examples, pad_id, threads, task)
            report[name]["p50_ms"] = time_graph(path)
            report[name]["passes"] = (report[name][task.PARITY_KEY] <= cfg.parity_tolerance
                                      and report[name].get("label_mismatches", 0) == 0)
        shippable = ["fused"] if cfg.optimize == "always" else list(candidates)
        passing = [n for n in shippable if report[n]["passes"]]
        if not passing:
            worst = min((report[n] for n in shippable), key=lambda r: r[task.PARITY_KEY])
            raise StepFailed(f"{what}: ONNX {task.OUTPUTS} differ from PyTorch's by {_gap(worst, task)}"
                             + f" (allowed {cfg.parity_tolerance:g})"
                             + (" (export.optimize = always: the fused graph)" if cfg.optimize == "always" else ""))
        chosen = "fused" if "fused" in passing else "plain"
        fusion = fusion_summary(candidates["fused"], model.config) if "fused" in candidates else None
        shutil.move(str(candidates[chosen]), out / MODEL_FILE)
    info = {"exporter": "optimum (torch.onnx)", "opset": cfg.opset, "graph": chosen, "candidates": report,
            "parity": report[chosen]}
    if fusion is not None:
        info["fusion"] = fusion
    if chosen == "plain":
        info["why_plain"] = ("export.optimize = never" if cfg.optimize == "never" else
                             f"the fused graph's {task.OUTPUTS} differ from PyTorch's by "
                             f"{_gap(report['fused'], task)} (allowed {cfg.parity_tolerance:g})")
    return info


def _gap(report: dict, task: ModuleType) -> str:
    """A parity report in words: the largest gap, and how many texts got another label (a classifier)."""
    words = f"{report[task.PARITY_KEY]:.2e}"
    if "label_mismatches" in report:
        words += f" with {report['label_mismatches']} different labels"
    return words


_FUSED_OPS = ("Attention", "MultiHeadAttention", "EmbedLayerNormalization", "SkipLayerNormalization",
              "LayerNormalization", "BiasGelu", "FastGelu", "Gelu")


def fusion_summary(path: Path, config) -> dict:
    """What ONNX Runtime's transformer optimizer fused, read back from the graph; a note when it fused no
    attention (families whose attention is not BERT's: DeBERTa's disentangled, MPNet's relative bias)."""
    ops = Counter(n.op_type for n in onnx.load(str(path), load_external_data=False).graph.node)
    summary = {"fused_ops": {k: ops[k] for k in _FUSED_OPS if ops[k]},
               "attention_fused": bool(ops["Attention"] or ops["MultiHeadAttention"])}
    if not summary["attention_fused"]:
        summary["note"] = (f"ONNX Runtime's optimizer has no attention fusion for {config.model_type!r}: only "
                           f"layer norms and activations are fused")
    return summary


# ---- int8 ------------------------------------------------------------------------------------------------


def _outer_names(graph) -> set[str]:
    """Names a subgraph reads from the graphs around it: used by its nodes (or theirs), defined nowhere in it."""
    defined = {i.name for i in graph.input} | {i.name for i in graph.initializer}
    used: set[str] = set()
    for node in graph.node:
        defined.update(node.output)
        used |= _node_reads(node)
    return used - defined


def _node_reads(node) -> set[str]:
    reads = {x for x in node.input if x}
    for attr in node.attribute:
        for sub in ([attr.g] if attr.type == onnx.AttributeProto.GRAPH else []) + list(attr.graphs):
            reads |= _outer_names(sub)
    return reads


def sort_topologically(path: Path) -> None:
    """Reorders the graph's nodes so that every node comes after what it reads, the outer values its
    subgraphs (If branches) read included, keeping the original order wherever it already holds (Kahn's
    algorithm, earliest node first). ONNX Runtime's quantiser can leave a value a DeBERTa If branch reads
    defined after the If, which onnx.checker refuses ("nodes must be topologically sorted")."""
    import heapq

    model = onnx.load(str(path))
    nodes = list(model.graph.node)
    producer = {o: k for k, n in enumerate(nodes) for o in n.output if o}
    deps = [{producer[x] for x in _node_reads(n) if x in producer and producer[x] != k} for k, n in enumerate(nodes)]
    waiting = [len(d) for d in deps]
    users: dict[int, list[int]] = {}
    for k, d in enumerate(deps):
        for j in d:
            users.setdefault(j, []).append(k)
    ready = [k for k, w in enumerate(waiting) if w == 0]
    heapq.heapify(ready)
    order = []
    while ready:
        k = heapq.heappop(ready)
        order.append(k)
        for u in users.get(k, []):
            waiting[u] -= 1
            if waiting[u] == 0:
                heapq.heappush(ready, u)
    if len(order) != len(nodes):
        raise RuntimeError(f"{path}: the graph has a cycle; it cannot be sorted")
    if order == list(range(len(nodes))):
        return
    del model.graph.node[:]
    model.graph.node.extend(nodes[k] for k in order)
    onnx.save(model, str(path))


def quantize_dynamic(src: Path, dst: Path, per_channel: bool, op_types: list[str]) -> None:
    """Dynamic int8 of `src`: the weights of `op_types` int8 (per tensor or per channel), activations
    quantised on the fly at run time."""
    from onnxruntime.quantization import QuantType
    from onnxruntime.quantization import quantize_dynamic as ort_quantize_dynamic

    logging.getLogger().setLevel(logging.ERROR)  # its advice to pre-process is for static CNN quantisation
    ort_quantize_dynamic(str(src), str(dst), per_channel=per_channel, weight_type=QuantType.QInt8,
                         op_types_to_quantize=list(op_types),
                         # a graph already fused by the transformer optimizer fails type inference without this
                         extra_options={"DefaultTensorType": onnx.TensorProto.FLOAT})
    sort_topologically(dst)
    onnx.checker.check_model(str(dst), full_check=True)


def quantize_static_qdq(src: Path, dst: Path, calibration: list[dict], pad_id: int, per_channel: bool,
                        op_types: list[str], keep_fp32: tuple[str, ...] = ()) -> None:
    """QDQ int8 of `src`: int8 weights, uint8 activations (the pairing ONNX Runtime's CPU kernels are
    fastest with), ranges from the min/max seen on `calibration` (one unpadded text per run). The nodes
    named in `keep_fp32` stay fp32."""
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
                    nodes_to_exclude=list(keep_fp32),
                    extra_options={"DefaultTensorType": onnx.TensorProto.FLOAT})
    sort_topologically(dst)
    onnx.checker.check_model(str(dst), full_check=True)


# ---- what a graph holds ----------------------------------------------------------------------------------


def int8_summary(path: Path, vocab_size: int | None) -> dict:
    """What really became int8, read back from the graph (an op type in the recipe that the graph does
    not have, or that the quantiser skips, changes nothing, silently)."""
    graph = onnx.load(str(path), load_external_data=False).graph
    eight = sum(int(np.prod(i.dims)) for i in graph.initializer if i.data_type in _EIGHT_BIT)
    floats = sum(int(np.prod(i.dims)) * 4 for i in graph.initializer if i.data_type == onnx.TensorProto.FLOAT)
    table = [i for i in graph.initializer if len(i.dims) == 2 and vocab_size and i.dims[0] == vocab_size]
    ops = Counter(n.op_type for n in graph.node)
    return {"embeddings_int8": bool(table) and all(t.data_type in _EIGHT_BIT for t in table),
            "weight_bytes_int8_share": round(eight / max(1, eight + floats), 4),
            "int8_nodes": {k: v for k, v in ops.items() if k in _INT8_OPS}}


def vocab_size_of(folder: Path) -> int | None:
    """The vocabulary size in the folder's config.json; None without one."""
    config = read_json_or_none(folder / CONFIG_FILE)
    return config.get("vocab_size") if isinstance(config, dict) else None


def agreement(fp32_path: Path, int8_path: Path, examples: list[dict], pad_id: int, threads: int, batch_size: int,
              task: ModuleType = classification) -> dict:
    """How close the int8 graph's outputs are to the fp32 graph's on `examples` (the task's figures: how often a
    classifier's label is the same, and the largest logit gap).
    `batch_size` must be the accuracy pass's: dynamic int8 scales each batch's activations by the batch's
    own range, so a text's int8 label can depend on the texts batched with it (seen on BBC News: one test
    text of 58 changed label between batches of 32 and of 64)."""
    fp32_sess, int8_sess = session(fp32_path, threads), session(int8_path, threads)
    fp32 = all_outputs(lambda b: run_outputs(fp32_sess, b), examples, pad_id, None, batch_size)
    int8 = all_outputs(lambda b: run_outputs(int8_sess, b), examples, pad_id, None, batch_size)
    return task.agreement(fp32, int8)
