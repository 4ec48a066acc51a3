"""The tasks the training side knows, each one module beside this one answering the same names:

    NAME, EXPORT_TASK, OUTPUTS         the task's name; the ONNX exporter's name for its graph; its outputs' name
    FINE_TUNES, PARITY_KEY             whether the teacher is fine-tuned; the parity figure export.parity_tolerance bounds
    load(path, label_names, trust_remote_code, pooling)   the model from a transformers folder
    from_config(config, like), empty(config), skeleton(folder, config)   a model of a config: random weights (like
                                       another model); on the meta device; shaped as a saved folder's
    save_config(model, folder)         what a folder needs beside weights or graph to be read back
    exportable(model), finish_graph(path, model)   what the exporter is given, and what is added to its graph
    outputs(forward output), width(config)   what the model gives for a batch, and how many numbers per text
    default_metric(recipe)             the validation figure a student stops on by default
    distillation_loss(student, teacher, labels, cfg)   the student's loss on the teacher's outputs
    importance_targets(ctx, n), importance_loss(outputs, targets)   what pruning ranks heads and neurons against
    validation(outputs, labels, reference)             an epoch's validation figures
    collapsed(outputs, labels, share, epoch), no_better_than_chance(best, labels)   why a run is degenerate, or None
    parity(graph, torch_outputs), agreement(fp32, int8)   an export against PyTorch; int8 against fp32
    class_weights, fine_tuning_loss    (a task whose teacher is fine-tuned) its fine-tuning loss
"""
from __future__ import annotations

from pathlib import Path
from types import ModuleType

from shrinkwrap.ml import classification, embedding

TASKS = {classification.NAME: classification, embedding.NAME: embedding}
DEFAULT = classification.NAME


def of_recipe(recipe) -> ModuleType:
    """The task a recipe runs."""
    return TASKS[getattr(recipe, "task", DEFAULT)]


def of_model(model) -> ModuleType:
    """The task of a loaded model: a sentence encoder (embedding.SentenceEncoder) or a classifier."""
    return embedding if isinstance(model, embedding.SentenceEncoder) else classification


def of_folder(folder: Path) -> ModuleType:
    """The task of a saved model: a sentence encoder when its folder says how it pools (a step's pooling.json, or
    a sentence-transformers configuration without a classification head), else a classifier."""
    from shrinkwrap.serve.embedding import is_encoder_folder

    return embedding if is_encoder_folder(Path(folder)) else classification
