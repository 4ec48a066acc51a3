"""The tasks the training side knows, each one module beside this one answering the same names:

    NAME, EXPORT_TASK, OUTPUTS         the task's name; the ONNX exporter's name for its graph; its outputs' name
    load(path, label_names, ...)       the model from a transformers folder
    from_config(config), empty(config) a model of a config: random weights; on the meta device
    outputs(forward output)            what the model gives for a batch (a classifier's logits)
    width(config)                      numbers per text in those outputs
    distillation_loss(student, teacher, labels, cfg)   the student's loss on the teacher's outputs
    validation(outputs, labels, reference)             an epoch's validation figures
    collapsed(outputs, labels, share), no_better_than_chance(best, labels)   why a run is degenerate, or None
"""
from __future__ import annotations

from types import ModuleType

from shrinkwrap.ml import classification

TASKS = {classification.NAME: classification}
DEFAULT = classification.NAME


def of_recipe(recipe) -> ModuleType:
    """The task a recipe runs (every recipe today is a classification one)."""
    return TASKS[getattr(recipe, "task", DEFAULT)]


def of_config(config) -> ModuleType:
    """The task of a saved model, from its config (a classification head today)."""
    return TASKS[DEFAULT]
