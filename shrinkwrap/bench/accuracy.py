"""Accuracy figures computed locally (the hub-hosted metric scripts are unavailable offline)."""
from __future__ import annotations

import numpy as np


def confusion(labels: np.ndarray, preds: np.ndarray, n_classes: int) -> np.ndarray:
    """Rows are true classes, columns predicted classes."""
    m = np.zeros((n_classes, n_classes), dtype=np.int64)
    np.add.at(m, (np.asarray(labels), np.asarray(preds)), 1)
    return m


def classification_metrics(labels: np.ndarray, preds: np.ndarray, n_classes: int) -> dict:
    """Accuracy, macro-F1 and per-class precision / recall / F1 / support (F1 of a class never predicted
    nor present is 0, as in scikit-learn with zero_division=0)."""
    m = confusion(labels, preds, n_classes)
    tp = np.diag(m).astype(float)
    support = m.sum(1)
    predicted = m.sum(0)
    with np.errstate(divide="ignore", invalid="ignore"):
        recall = np.where(support > 0, tp / support, 0.0)
        precision = np.where(predicted > 0, tp / predicted, 0.0)
        f1 = np.where(precision + recall > 0, 2 * precision * recall / (precision + recall), 0.0)
    return {
        "accuracy": float(tp.sum() / max(1, m.sum())),
        "macro_f1": float(f1.mean()),
        "per_class": {"precision": precision.tolist(), "recall": recall.tolist(), "f1": f1.tolist(),
                      "support": support.tolist()},
        "confusion": m.tolist(),
    }
