"""Student int8 (PyTorch): dynamic int8 quantisation of every Linear layer's weights.

Activations are quantised on the fly at run time, so no calibration data is needed.
"""
from __future__ import annotations

from pathlib import Path

from shrinkwrap.ml.int8 import save_int8


def run(ctx, src: Path, out: Path) -> dict:
    student = ctx.task.load(str(src))
    save_int8(student, ctx.tokens_of(src).tokenizer, out)
    return {"method": "torch.ao dynamic int8", "modules": ["Linear"]}
