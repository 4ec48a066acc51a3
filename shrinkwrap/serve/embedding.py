"""The embedding task on the serving side. Its graph's output is one sentence vector per text (pooled, and
L2-normalised when the encoder is used so, inside the graph); its manifest records the vector's size, the pooling
and the normalisation; predict gives each text its vector.

Every task answers the same names (shrinkwrap.serve.tasks): NAME, FILES, read, width, width_error, rows."""
from __future__ import annotations

import json
from pathlib import Path
from typing import Optional

import numpy as np

from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.rundir import MANIFEST_FILE, read_json

NAME = "embedding"
FILES: tuple[str, ...] = ()   # the graph and the tokenizer are all it needs
LABELLED = False              # vectors, no label to abstain from
POOLING_FILE = "pooling.json"  # beside a step's weights or graph: {"pooling": "mean", "normalize": true}
SENTENCE_OUTPUT = "sentence_embedding"   # the graph's output: one pooled vector per text
POOLINGS = ("mean", "cls", "max")   # the token vectors' mean, the first token's, the largest of each dimension


def read_pooling(folder: Path) -> Optional[dict]:
    """How the encoder in `folder` pools and whether it normalises: its pooling.json (written by every step), else
    the sentence-transformers configuration it ships with (modules.json and the pooling module's config.json), else
    None. A file that says something else than one of POOLINGS is a one-line UserError."""
    folder = Path(folder)
    own = folder / POOLING_FILE
    if own.is_file():
        how = read_json(own, "pooling file")
        if not isinstance(how, dict) or how.get("pooling") not in POOLINGS or not isinstance(how.get("normalize"), bool):
            raise UserError(f"{own}: expected {{\"pooling\": one of {', '.join(POOLINGS)}, \"normalize\": true or false}}")
        return {"pooling": how["pooling"], "normalize": how["normalize"]}
    modules = folder / "modules.json"
    if not modules.is_file():
        return None
    listed = read_json(modules, "sentence-transformers module list")
    listed = [m for m in listed if isinstance(m, dict)] if isinstance(listed, list) else []
    pooled = next((m for m in listed if str(m.get("type", "")).endswith(".Pooling")), None)
    if pooled is None or not (folder / str(pooled.get("path", "")) / "config.json").is_file():
        return None
    config = read_json(folder / pooled["path"] / "config.json", "pooling module config")
    kinds = [k for k, key in (("mean", "pooling_mode_mean_tokens"), ("cls", "pooling_mode_cls_token"),
                              ("max", "pooling_mode_max_tokens")) if isinstance(config, dict) and config.get(key)]
    if len(kinds) != 1:
        return None  # a combination (or mean_sqrt_len) this tool does not reproduce: the recipe must say
    normalize = any(str(m.get("type", "")).endswith(".Normalize") for m in listed)
    return {"pooling": kinds[0], "normalize": normalize}


def is_encoder_folder(folder: Path) -> bool:
    """Whether a model folder holds a sentence encoder: it says how it pools (a step's pooling.json, or a
    sentence-transformers configuration) and has no classification head."""
    folder = Path(folder)
    if (folder / POOLING_FILE).is_file():
        return True
    try:
        archs = json.loads((folder / "config.json").read_text(encoding="utf-8")).get("architectures") or []
    except (OSError, ValueError):
        archs = []
    return (folder / "modules.json").is_file() and not any(a.endswith("ForSequenceClassification") for a in archs)


def read(folder: Path, manifest: dict) -> dict:
    """The vector's size, pooling and normalisation, as the manifest records them."""
    vector = manifest.get("vector") or {}
    size = vector.get("size")
    if isinstance(size, bool) or not isinstance(size, int) or size < 1:
        raise UserError(f"{folder / MANIFEST_FILE}: vector.size = {size!r} — expected the sentence vector's length")
    return {"size": size, "pooling": vector.get("pooling"), "normalize": bool(vector.get("normalize"))}


def width(info: dict) -> int:
    return info["size"]


def width_error(folder: Path, info: dict, got: int) -> UserError:
    return UserError(f"{folder / MANIFEST_FILE}: vector.size = {info['size']} but the model outputs {got} numbers "
                     f"per text")


def rows(outputs: np.ndarray, info: dict, min_confidence: float = 0.0) -> list[dict]:
    """{"embedding": [...]} per text (float32 values, as the graph gives them)."""
    return [{"embedding": [float(x) for x in v]} for v in np.asarray(outputs, dtype=np.float32)]
