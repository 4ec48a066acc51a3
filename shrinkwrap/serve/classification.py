"""The classification task on the serving side. Its graph's first output holds one score per class (logits);
its artifact carries labels.json (class names by id: the manifest cannot hash itself, so names kept there could
be edited unnoticed, while labels.json is covered by its hash) and the calibration temperature in its manifest;
predict gives each text its label and calibrated scores, or no label below a confidence.

Every task answers the same few names (shrinkwrap.serve.tasks): NAME, FILES, read, width, rows."""
from __future__ import annotations

from pathlib import Path
from typing import Optional

import numpy as np

from shrinkwrap.serve.calibration import softmax
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.rundir import LABELS_FILE, MANIFEST_FILE, read_json

NAME = "classification"
FILES = (LABELS_FILE,)   # what the artifact carries for this task, beside the graph and the tokenizer
LABELLED = True          # predict gives each text a label, so it can abstain below --min-confidence


def read(folder: Path, manifest: dict) -> dict:
    """What predict needs beyond the graph: the class names and the calibration temperature."""
    return {"labels": read_labels(folder), "temperature": temperature_of(manifest)}


def width(info: dict) -> int:
    """How many numbers the graph gives per text: one per class."""
    return len(info["labels"])


def width_error(folder: Path, info: dict, got: int) -> UserError:
    return UserError(f"{folder / LABELS_FILE}: {len(info['labels'])} labels but the model outputs {got} scores")


def rows(outputs: np.ndarray, info: dict, min_confidence: float = 0.0) -> list[dict]:
    """{"label", "scores": {label: probability}} per text: the softmax of the logits divided by the temperature;
    a text whose top score is below `min_confidence` gets label None (abstains), its scores still given."""
    labels = info["labels"]
    probs = softmax(outputs, info["temperature"])
    return [{"label": labels[int(p.argmax())] if p.max() >= min_confidence else None,
             "scores": {name: round(float(v), 6) for name, v in zip(labels, p)}} for p in probs]


def read_labels(folder: Path) -> list[str]:
    path = folder / LABELS_FILE
    labels = read_json(path, "label list")
    if not isinstance(labels, list) or not labels or not all(isinstance(x, str) for x in labels):
        raise UserError(f"{path}: expected a non-empty list of label names")
    return labels


def labels_of_config(config: dict) -> Optional[list[str]]:
    """Class names by id from a transformers config's id2label (keys are strings once saved as JSON);
    None when it has none."""
    id2label = config.get("id2label")
    if not id2label:
        return None
    return [str(id2label.get(str(i), id2label.get(i))) for i in range(len(id2label))]


def temperature_of(manifest: dict) -> float:
    """The calibration temperature the manifest records (1.0 for an artifact packaged without one)."""
    t = (manifest.get("calibration") or {}).get("temperature", 1.0)
    if isinstance(t, bool) or not isinstance(t, (int, float)) or not np.isfinite(t) or t <= 0:
        raise UserError(f"{MANIFEST_FILE}: calibration.temperature = {t!r} — expected a positive number")
    return float(t)
