"""Student ONNX: export the fp32 student, fuse the transformer graph where that is faster, prove parity.

The exporter is optimum's (torch.onnx underneath): it knows the text-classification task's inputs,
outputs and dynamic batch/sequence axes for every BERT-family architecture, so the graph it writes
is the same one we would write by hand with torch.onnx, without per-architecture code here.
"""
from __future__ import annotations

import shutil
import tempfile
import warnings
from pathlib import Path

import numpy as np
import onnx

from shrinkwrap.bench.latency import summarize, time_calls
from shrinkwrap.data import all_logits, collate, encode
from shrinkwrap.errors import StepFailed
from shrinkwrap.models import load_classifier
from shrinkwrap.onnx_tools import run_logits, session
from shrinkwrap.train import predict_logits

MODEL_FILE = "model.onnx"


def export_onnx(model, folder: Path, opset: int) -> Path:
    from optimum.exporters.onnx import onnx_export_from_model

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        onnx_export_from_model(model, str(folder), task="text-classification", opset=opset, do_validation=False)
    path = folder / MODEL_FILE
    onnx.checker.check_model(str(path), full_check=True)
    return path


def fuse(path: Path, config, out_path: Path) -> Path:
    """ONNX Runtime's transformer optimizer: fuses attention, LayerNorm, GELU and the embedding layer."""
    from onnxruntime.transformers.optimizer import optimize_model

    model_type = {"bert": "bert", "roberta": "bert", "distilbert": "bert", "electra": "bert"}.get(config.model_type, "bert")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        opt = optimize_model(str(path), model_type=model_type, num_heads=config.num_attention_heads,
                             hidden_size=config.hidden_size, opt_level=1)
    opt.save_model_to_file(str(out_path))
    onnx.checker.check_model(str(out_path), full_check=True)
    return out_path


def p50_ms(path: Path, batch: dict, threads: int) -> float:
    sess = session(path, threads)
    return summarize(time_calls(lambda: run_logits(sess, batch), warmup=3, repeats=20, min_time_s=0.5))["p50"]


def parity(path: Path, torch_logits: np.ndarray, examples: list[dict], pad_id: int, threads: int) -> dict:
    sess = session(path, threads)
    logits = all_logits(lambda b: run_logits(sess, b), examples, pad_id, torch_logits.shape[1])
    return {"max_abs_logit_diff": float(np.abs(logits - torch_logits).max()),
            "label_mismatches": int((logits.argmax(1) != torch_logits.argmax(1)).sum()),
            "texts": len(examples)}


# Part of the step's fingerprint: a run folder whose export was chosen by an earlier rule is redone.
GRAPH_RULE = "fused when it passes parity, never by timing"


def export_checked(model, examples: list[dict], pad_id: int, timing_batch: dict, cfg, threads: int, out: Path,
                   what: str = "student-onnx") -> dict:
    """Writes out/model.onnx: the fp32 export, fused unless `cfg.optimize` is `never`, proven to give
    PyTorch's logits on `examples`. Raises StepFailed naming `what` when no graph passes (with `always`:
    when the fused one does not).

    The choice never depends on the timings, which are recorded for both graphs: on a busy 2-core machine
    the two are within noise of each other, and a choice by speed made the same recipe ship different
    artefacts (different int8 graphs, different accuracy) from run to run."""
    torch_logits = predict_logits(model, examples, pad_id)
    with tempfile.TemporaryDirectory(dir=out) as tmp:
        tmp = Path(tmp)
        plain = export_onnx(model, tmp, cfg.opset)
        candidates = {"plain": plain}
        if cfg.optimize != "never":
            candidates["fused"] = fuse(plain, model.config, tmp / "fused.onnx")
        report = {}
        for name, path in candidates.items():
            report[name] = parity(path, torch_logits, examples, pad_id, threads)
            report[name]["p50_ms"] = p50_ms(path, timing_batch, threads)
            report[name]["passes"] = (report[name]["max_abs_logit_diff"] <= cfg.parity_tolerance
                                      and report[name]["label_mismatches"] == 0)
        shippable = ["fused"] if cfg.optimize == "always" else list(candidates)
        passing = [n for n in shippable if report[n]["passes"]]
        if not passing:
            worst = min((report[n] for n in shippable), key=lambda r: r["max_abs_logit_diff"])
            raise StepFailed(f"{what}: ONNX logits differ from PyTorch by {worst['max_abs_logit_diff']:.2e} "
                             f"(allowed {cfg.parity_tolerance:g}) with {worst['label_mismatches']} different labels"
                             + (" (export.optimize = always: the fused graph)" if cfg.optimize == "always" else ""))
        chosen = "fused" if "fused" in passing else "plain"
        shutil.move(str(candidates[chosen]), out / MODEL_FILE)
    return {"exporter": "optimum (torch.onnx)", "opset": cfg.opset, "graph": chosen, "candidates": report,
            "parity": report[chosen]}


def run(ctx, src: Path, out: Path) -> dict:
    cfg, bench = ctx.recipe.export, ctx.recipe.bench
    model = load_classifier(str(src))
    tokens = ctx.tokens_of(src)  # the student's own tokenizer (a trimmed one when the vocabulary was cut)
    timing_batch = collate(encode(tokens.tokenizer, ctx.data.test, bench.sequence_length)[: bench.batch_size],
                           tokens.pad_id, length=bench.sequence_length)
    info = export_checked(model, tokens.encoded["test"], tokens.pad_id, timing_batch, cfg, bench.threads, out)
    model.config.save_pretrained(out)
    tokens.tokenizer.save_pretrained(out)
    return info
