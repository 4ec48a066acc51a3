"""Classification figures, from scikit-learn: the training loop's validation and the benchmark's
accuracy pass both read them here (the hub-hosted metric scripts are unavailable offline)."""
from __future__ import annotations

import numpy as np


def confusion(labels: np.ndarray, preds: np.ndarray, n_classes: int) -> np.ndarray:
    """Rows are true classes, columns predicted classes; every class 0..n_classes-1 has its row and
    column, present or not."""
    from sklearn.metrics import confusion_matrix

    return confusion_matrix(labels, preds, labels=np.arange(n_classes)).astype(np.int64)


def classification_metrics(labels: np.ndarray, preds: np.ndarray, n_classes: int) -> dict:
    """Accuracy, macro-F1 and per-class precision / recall / F1 / support over all n_classes classes
    (labels=: a class absent from both counts in the macro mean; zero_division=0: its figures are 0)."""
    from sklearn.metrics import precision_recall_fscore_support

    labels, preds = np.asarray(labels), np.asarray(preds)
    classes = np.arange(n_classes)
    m = confusion(labels, preds, n_classes)
    precision, recall, f1, support = precision_recall_fscore_support(
        labels, preds, labels=classes, zero_division=0)
    return {
        # from the confusion matrix rather than accuracy_score, which has no answer for zero items
        "accuracy": float(np.trace(m) / max(1, m.sum())),
        "macro_f1": float(f1.mean()),
        "per_class": {"precision": precision.tolist(), "recall": recall.tolist(), "f1": f1.tolist(),
                      "support": support.astype(np.int64).tolist()},
        "confusion": m.tolist(),
    }
