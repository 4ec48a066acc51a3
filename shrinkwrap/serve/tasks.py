"""The tasks an artifact can serve, by the name its manifest records under `task` (an artifact made before
tasks were recorded is a classifier). Each is one module beside this one answering the same names:

    NAME                       the task's name, as the manifest records it
    FILES                      what its artifact carries beside the graph and the tokenizer
    LABELLED                   whether predict gives a label (one it can withhold below --min-confidence)
    read(folder, manifest)     what predict needs beyond the graph (class names, a temperature, ...)
    width(info)                how many numbers the graph gives per text
    width_error(folder, info, got)   the one-line error when the graph gives another number
    rows(outputs, info, ...)   the fields predict prints for each text, beside "text"
"""
from __future__ import annotations

from types import ModuleType

from shrinkwrap.serve import classification, embedding
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.rundir import MANIFEST_FILE

TASKS = {classification.NAME: classification, embedding.NAME: embedding}
DEFAULT = classification.NAME


def of_manifest(manifest: dict) -> ModuleType:
    name = manifest.get("task", DEFAULT)
    if name not in TASKS:
        raise UserError(f"{MANIFEST_FILE}: task = {name!r} — this shrinkwrap serves {', '.join(map(repr, TASKS))}")
    return TASKS[name]


def check_min_confidence(manifest: dict, min_confidence: float, artifact: str) -> None:
    """--min-confidence on an artifact whose task gives no label: a one-line UserError (predict's and serve's)."""
    if min_confidence and not of_manifest(manifest).LABELLED:
        raise UserError(f"--min-confidence: {artifact} is a sentence encoder — it gives vectors, no label to abstain "
                        f"from")
