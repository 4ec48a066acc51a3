"""A teacher the user fine-tuned already (`teacher.trained: true`): checked, matched to the data, used as is.

The folder must hold a sequence classifier with its head; its label names (id2label) are matched to the
data's by name, and the data's label ids follow the model's order, so that the model's logit k is the
data's class k. The teacher step copies the folder's weights and records where they came from.
"""
from __future__ import annotations

import hashlib
import shutil
from pathlib import Path

from shrinkwrap.serve.classification import labels_of_config
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.fingerprint import sha256_file
from shrinkwrap.serve.rundir import CONFIG_FILE

WEIGHTS_INDEX = "model.safetensors.index.json"


def weight_files(folder: Path) -> list[Path]:
    """The folder's safetensors weights (every shard, and the shard index when there is one)."""
    files = sorted(folder.glob("*.safetensors"))
    return files + ([folder / WEIGHTS_INDEX] if (folder / WEIGHTS_INDEX).exists() else [])


def weights_fingerprint(folder: Path) -> str:
    """sha256 over the names and sha256 of the weight files, in name order."""
    h = hashlib.sha256()
    for f in weight_files(folder):
        h.update(f"{f.name} {sha256_file(f)}\n".encode())
    return h.hexdigest()


def _stored_keys(folder: Path) -> set[str]:
    from safetensors import safe_open

    keys: set[str] = set()
    for f in sorted(folder.glob("*.safetensors")):
        with safe_open(str(f), framework="pt") as st:
            keys.update(st.keys())
    return keys


def check_head(folder: Path, config, where: str) -> None:
    """Refuses a folder whose weights hold no classification head: the parameters a sequence classifier of
    this config has outside its encoder (built on the meta device: no memory, no weights) must be stored."""
    from shrinkwrap.ml import classification

    what = f"{where}: teacher.base = {str(folder)!r} with teacher.trained: true"
    try:
        model = classification.empty(config)  # a head is a classifier's
    except ValueError as e:
        raise UserError(f"{what} — transformers has no sequence classifier for model type "
                        f"{getattr(config, 'model_type', '?')!r} ({str(e).splitlines()[0][:120]})") from None
    prefix = model.base_model_prefix + "."
    head = {k for k in model.state_dict() if not k.startswith(prefix)}
    stored = _stored_keys(folder)
    if not head or not head <= stored:
        missing = sorted(head - stored) or ["(no head parameters)"]
        raise UserError(f"{what} — the folder has no classification head (its weights lack {', '.join(missing[:3])}"
                        f"{' …' if len(missing) > 3 else ''}): give a fine-tuned sequence-classification folder, "
                        f"or set teacher.trained: false to fine-tune a new head")


def model_labels(config) -> list[str]:
    """The model's class names by id (its id2label), read as every other config is (serve.classification.labels_of_config)."""
    return labels_of_config(config.to_dict()) or []


def match_labels(names: list[str], data_labels: list[str], where: str) -> list[str]:
    """The model's label names when they are exactly the data's (as a set); otherwise one line naming
    the labels on either side that the other lacks."""
    known, seen = set(names), set(data_labels)
    if len(known) != len(names):
        dup = next(n for n in names if names.count(n) > 1)
        raise UserError(f"{where}: teacher.base's id2label names {dup!r} twice — each class needs its own name")
    unknown, unseen = sorted(seen - known), sorted(known - seen)
    if unknown or unseen:
        parts = []
        if unknown:
            parts.append(f"data labels the model does not know: {', '.join(map(repr, unknown[:8]))}")
        if unseen:
            parts.append(f"model labels never in the data: {', '.join(map(repr, unseen[:8]))}")
        raise UserError(f"{where}: teacher.trained: true — the model's labels (id2label) are not the data's; "
                        + "; ".join(parts) + " — labels are matched by name")
    return list(names)


def unused_keys(teacher_cfg, keys: tuple[str, ...]) -> list[str]:
    """The fine-tuning keys the recipe (or --set) gave, which a teacher used as is ignores."""
    return [k for k in keys if k in teacher_cfg.model_fields_set]


def copy_teacher(folder: Path, tokenizer, out: Path) -> dict:
    """out/: the folder's config and weights, byte for byte, and the chain's tokenizer."""
    for f in weight_files(folder) + [folder / CONFIG_FILE]:
        shutil.copyfile(f, out / f.name)
    tokenizer.save_pretrained(out)
    return {"weights_sha256": weights_fingerprint(out),
            "weight_files": [f.name for f in weight_files(out)]}
