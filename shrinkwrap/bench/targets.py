"""Anything the benchmark can measure, behind one interface: `logits(batch) -> array`.

A target is a transformers classification folder (fp32 safetensors or a shrinkwrap int8 folder),
a folder holding model.onnx, or a bare .onnx file.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Optional

import numpy as np

from shrinkwrap.errors import UserError

ONNX_FILE = "model.onnx"


@dataclass
class Target:
    format: str                          # "pytorch" or "onnx"
    path: Path
    weight_files: list[Path]
    logits: Callable[[dict[str, np.ndarray]], np.ndarray]
    input_names: list[str]
    tokenizer_dir: Optional[Path] = None
    extra: dict = field(default_factory=dict)

    @property
    def size_bytes(self) -> int:
        return sum(f.stat().st_size for f in self.weight_files)


def _pytorch(folder: Path, threads: int) -> Target:
    import torch

    from shrinkwrap.models import INT8_WEIGHTS, load_classifier, load_int8
    from shrinkwrap.train import to_torch

    torch.set_num_threads(threads)
    if (folder / INT8_WEIGHTS).exists():
        model, files = load_int8(folder), [folder / INT8_WEIGHTS]
    else:
        model, files = load_classifier(str(folder)), sorted(folder.glob("*.safetensors"))

    @torch.inference_mode()
    def logits(batch):
        return model(**to_torch(batch)).logits.float().numpy()

    names = ["input_ids", "attention_mask"] + (["token_type_ids"] if getattr(model.config, "type_vocab_size", 0) else [])
    return Target("pytorch", folder, files, logits, names, tokenizer_dir=folder)


def _onnx(path: Path, threads: int) -> Target:
    from shrinkwrap.onnx_tools import run_logits, session

    sess = session(path, threads)
    files = [path] + [p for p in path.parent.glob(path.name + "*.data")]
    tok = path.parent if (path.parent / "tokenizer.json").exists() else None
    return Target("onnx", path, files, lambda b: run_logits(sess, b), [i.name for i in sess.get_inputs()],
                  tokenizer_dir=tok, extra={"session": sess})


def load_target(path: str | Path, threads: int = 2) -> Target:
    path = Path(path)
    if path.is_file() and path.suffix == ".onnx":
        return _onnx(path, threads)
    if path.is_dir() and (path / ONNX_FILE).exists():
        return _onnx(path / ONNX_FILE, threads)
    if path.is_dir() and (path / "config.json").exists():
        return _pytorch(path, threads)
    raise UserError(f"{path}: not a benchmark target — expected a transformers folder, a folder with {ONNX_FILE}, "
                    f"or a .onnx file")
