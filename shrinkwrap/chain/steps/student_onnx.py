"""Student ONNX: export the fp32 student, fuse the transformer graph when the fused one passes parity.

The export, the fusion and the parity check are shrinkwrap.ml.convert's (shared with `shrinkwrap package`).
"""
from __future__ import annotations

from pathlib import Path

from shrinkwrap.bench.latency import graph_p50_ms
from shrinkwrap.ml.convert import GRAPH_RULE, export_checked

__all__ = ["GRAPH_RULE", "run"]  # GRAPH_RULE: part of this step's fingerprint (the chain reads it here)


def run(ctx, src: Path, out: Path) -> dict:
    cfg, threads = ctx.recipe.export, ctx.recipe.bench.threads
    model = ctx.task.load(str(src))
    tokens = ctx.student_tokens(src)  # the student's own tokenizer (a trimmed one when the vocabulary was cut)
    batch = ctx.timing_batch(src, ctx.student_length)  # each graph considered is timed on what the step is

    info = export_checked(model, tokens.encoded["test"], tokens.pad_id, lambda path: graph_p50_ms(path, batch, threads),
                          cfg, threads, out, ctx.task)

    ctx.task.save_config(model, out)
    tokens.tokenizer.save_pretrained(out)
    return info
