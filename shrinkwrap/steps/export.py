"""Student ONNX: export the fp32 student, fuse the transformer graph when the fused one passes parity.

The export, the fusion and the parity check are shrinkwrap.onnx_ops's (shared with `shrinkwrap package`).
"""
from __future__ import annotations

from pathlib import Path

from shrinkwrap.batches import collate, encode
from shrinkwrap.models import load_classifier
from shrinkwrap.onnx_ops import GRAPH_RULE, export_checked

__all__ = ["GRAPH_RULE", "run"]  # GRAPH_RULE: part of this step's fingerprint (the chain reads it here)


def run(ctx, src: Path, out: Path) -> dict:
    cfg, bench = ctx.recipe.export, ctx.recipe.bench
    model = load_classifier(str(src))
    tokens = ctx.student_tokens(src)  # the student's own tokenizer (a trimmed one when the vocabulary was cut)
    length = min(bench.sequence_length, ctx.student_length)  # the student never reads more
    timing_batch = collate(encode(tokens.tokenizer, ctx.data.test, length, truncation=ctx.recipe.data.truncation)[: bench.batch_size],
                           tokens.pad_id, length=length)

    info = export_checked(model, tokens.encoded["test"], tokens.pad_id, timing_batch, cfg, bench.threads, out)

    model.config.save_pretrained(out)
    tokens.tokenizer.save_pretrained(out)
    return info
