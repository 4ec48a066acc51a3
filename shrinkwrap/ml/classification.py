"""The classification task on the training side: a transformers sequence classifier, an encoder with a head
that gives one logit per class. How such a model is loaded, built and read (its outputs are its logits), how a
student learns from a teacher's outputs (the soft-label loss, Hinton, Vinyals & Dean 2015, with the true labels
beside), and the validation figures a training run is judged by each epoch.

Every task answers the same names (shrinkwrap.ml.tasks); the steps, the training loop, the distillation and the
conversions call them and know no task."""
from __future__ import annotations

import warnings
from pathlib import Path
from typing import Optional

import numpy as np
import torch
from torch import nn

from shrinkwrap.ml.metrics import classification_metrics

NAME = "classification"
EXPORT_TASK = "text-classification"   # the exporter's name for the graph: inputs -> logits [batch, classes]
OUTPUTS = "logits"                    # what the outputs are called (the teacher-outputs cache's file name)
FINE_TUNES = True                     # the teacher is fine-tuned (unless teacher.trained gives one)
PARITY_KEY = "max_abs_logit_diff"     # an export's largest gap to PyTorch, which export.parity_tolerance bounds
IMPORTANCE_LOSS = "cross-entropy"     # what pruning's importance is the gradient of


def _auto():
    from transformers import AutoModelForSequenceClassification

    return AutoModelForSequenceClassification


def load(path: str, label_names: Optional[list[str]] = None, trust_remote_code: bool = False,
         pooling: Optional[dict] = None) -> nn.Module:
    """A sequence classifier from a transformers folder (safetensors weights only). With `label_names`, the head
    is made for those classes: a fresh head on an encoder (the library's notice that it is newly initialised is
    expected, so it is not shown)."""
    from shrinkwrap.ml.models import check_model_folder, library_notices_silenced

    if trust_remote_code:
        warnings.warn("trust_remote_code is on: code shipped with the model will run")
    kwargs = {}
    if label_names is not None:
        kwargs = dict(num_labels=len(label_names), id2label=dict(enumerate(label_names)),
                      label2id={n: i for i, n in enumerate(label_names)})
    if Path(path).is_dir():
        check_model_folder(Path(path))
    with warnings.catch_warnings(), library_notices_silenced("newly initialized", "You should probably TRAIN this model"):
        warnings.simplefilter("ignore")
        model = _auto().from_pretrained(path, use_safetensors=True, trust_remote_code=trust_remote_code, **kwargs)
    return model.eval()


def from_config(config, like: Optional[nn.Module] = None) -> nn.Module:
    """A classifier of `config` with random weights."""
    return _auto().from_config(config)


def skeleton(folder: Path, config) -> nn.Module:
    """A model shaped as the one saved in `folder` (random weights, for a state dict to fill)."""
    return from_config(config)


def save_config(model: nn.Module, folder: Path) -> None:
    """What a folder needs beside its weights or graph for the model to be read back: its config."""
    model.config.save_pretrained(folder)


def exportable(model: nn.Module) -> nn.Module:
    """What the ONNX exporter is given: the classifier itself (its graph ends in the logits)."""
    return model


def finish_graph(path: Path, model: nn.Module) -> None:
    """Nothing to add: the exported graph ends in the logits."""


def default_metric(recipe) -> str:
    """The validation figure a student stops on when the recipe leaves it out: the teacher's."""
    return recipe.teacher.metric


def importance_targets(ctx, n: int) -> np.ndarray:
    """What pruning ranks heads and neurons against on the first `n` training texts: their true classes."""
    return ctx.data.train.labels[:n]


def empty(config) -> nn.Module:
    """A classifier of `config` built on the meta device: its structure, without memory or weights. ValueError or
    KeyError when transformers has no sequence classifier for the config's family."""
    with torch.device("meta"), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return _auto().from_config(config)


def outputs(output) -> torch.Tensor:
    """What the model gives for a batch, from its forward's output: the logits, [batch, classes]."""
    return output.logits


def width(config) -> int:
    """Numbers per text in `outputs`: one per class."""
    return config.num_labels


def class_weights(labels: np.ndarray, n_classes: int) -> torch.Tensor:
    """Inverse-frequency weights normalised to mean 1 (the `balanced` rule of scikit-learn)."""
    from sklearn.utils.class_weight import compute_class_weight

    return torch.tensor(compute_class_weight("balanced", classes=np.arange(n_classes), y=labels), dtype=torch.float32)


def fine_tuning_loss(outputs: torch.Tensor, labels: torch.Tensor, weight: Optional[torch.Tensor] = None) -> torch.Tensor:
    """The teacher's loss while it is fine-tuned: cross-entropy on the true labels (`weight`: per class)."""
    from torch.nn import functional as F

    return F.cross_entropy(outputs, labels, weight=weight)


def importance_loss(outputs: torch.Tensor, labels: torch.Tensor) -> torch.Tensor:
    """The loss whose gradients rank heads and neurons for pruning: cross-entropy on the true labels."""
    from torch.nn import functional as F

    return F.cross_entropy(outputs, labels)


def distillation_loss(student: torch.Tensor, teacher: torch.Tensor, labels: torch.Tensor, cfg) -> torch.Tensor:
    """The student's loss on the teacher's outputs: alpha × the soft-label term at cfg.temperature, plus
    (1 − alpha) × cross-entropy on the true labels where a text has one (`cfg`: the recipe's student section)."""
    from shrinkwrap.ml.losses import distillation_loss as loss

    return loss(student, teacher, labels, cfg.temperature, cfg.alpha)


def parity(graph: np.ndarray, torch_outputs: np.ndarray) -> dict:
    """An exported graph's logits against PyTorch's on the same texts: the largest gap, and how many texts get
    another label (the export passes only with none)."""
    return {"max_abs_logit_diff": float(np.abs(graph - torch_outputs).max()),
            "label_mismatches": int((graph.argmax(1) != torch_outputs.argmax(1)).sum())}


def agreement(fp32: np.ndarray, int8: np.ndarray) -> dict:
    """An int8 graph's logits against the fp32 graph's it was made from: the share of texts given the same
    label, and the largest gap."""
    return {"agreement_with_fp32": float((fp32.argmax(1) == int8.argmax(1)).mean()),
            "max_abs_logit_diff_vs_fp32": float(np.abs(fp32 - int8).max())}


def validation(outputs: np.ndarray, labels: np.ndarray, reference: Optional[np.ndarray] = None) -> dict:
    """An epoch's validation figures from the model's `outputs` on the validation texts: accuracy and macro-F1
    against `labels`; with the teacher's classes (`reference`, one per text), `agreement`, the share given the
    teacher's class; with the teacher's logits, also `teacher_kl` (see teacher_kl), the tie-break of early
    stopping: on a validation split of a few hundred texts, agreement or accuracy often stays level for epochs
    while the student still moves toward the teacher, and without a tie-break the first epoch would be kept."""
    preds = outputs.argmax(1)
    m = classification_metrics(labels, preds, outputs.shape[1])
    entry = {"accuracy": m["accuracy"], "macro_f1": m["macro_f1"]}
    if reference is not None:
        teacher = reference.argmax(1) if np.ndim(reference) == 2 else reference
        entry["agreement"] = float(np.mean(preds == teacher)) if len(preds) else 0.0
        if np.ndim(reference) == 2:
            entry["teacher_kl"] = teacher_kl(np.asarray(reference, dtype=np.float32), outputs)
    return entry


def teacher_kl(teacher_logits: np.ndarray, student_logits: np.ndarray) -> float:
    """Mean over examples of KL(teacher || student), the two softmax distributions at temperature 1, in nats:
    the soft-label loss at T = 1, where its T^2 factor is 1."""
    from shrinkwrap.ml.losses import soft_label_loss

    if not len(teacher_logits):
        return 0.0
    return float(soft_label_loss(torch.as_tensor(student_logits, dtype=torch.float64),
                                 torch.as_tensor(teacher_logits, dtype=torch.float64), 1.0))


def collapsed(outputs: np.ndarray, labels: np.ndarray, share: float, epoch: int) -> Optional[str]:
    """Why a run is degenerate when its validation predictions crowd into one class (at least `share` of them,
    where the majority class is rarer than that; share 1 = never), else None."""
    preds, n = outputs.argmax(1), outputs.shape[1]
    top = np.bincount(preds, minlength=n).max() / len(preds)
    majority = np.bincount(labels, minlength=n).max() / len(labels)
    if share < 1 and top >= share and majority < share:
        return (f"validation predictions collapsed: {top:.0%} in one class at epoch {epoch} (majority class is "
                f"{majority:.0%})")
    return None


def no_better_than_chance(best: Optional[dict], labels: np.ndarray) -> Optional[str]:
    """Why a finished run is degenerate when its best epoch's validation accuracy is no better than always
    answering the majority class, else None."""
    majority = np.bincount(labels).max() / len(labels)
    accuracy = best["accuracy"] if best else 0.0
    if accuracy <= majority + 1e-9:
        return (f"best validation accuracy {accuracy:.3f} is no better than always predicting the majority class "
                f"({majority:.3f})")
    return None
