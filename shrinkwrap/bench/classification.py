"""The classification task in the benchmark: what a step's outputs on the labelled test texts say about it —
accuracy, macro-F1 and per-class figures (scikit-learn), calibration (ECE, Brier, NLL, the reliability bins) of
its scores as it gives them, and its predicted class per text, which the results compare with the teacher's.

Every task answers the same name (shrinkwrap.bench.tasks): measure."""
from __future__ import annotations

import numpy as np

from shrinkwrap.ml.metrics import classification_metrics
from shrinkwrap.serve import calibration

NAME = "classification"


def measure(outputs: np.ndarray, inputs, outputs_of, temperature: float = 1.0) -> tuple[dict, list]:
    """quality() of the test texts' logits against inputs.labels."""
    return quality(outputs, inputs.labels, inputs.n_labels, temperature)


def quality(outputs: np.ndarray, labels: np.ndarray, n_labels: int, temperature: float = 1.0) -> tuple[dict, list]:
    """(metrics, predictions) of the logits `outputs` against the true `labels`. An artifact's scores are its
    calibrated ones (softmax of the logits / `temperature`); its metrics then also say the ECE without it."""
    preds = outputs.argmax(1)
    metrics = classification_metrics(labels, preds, n_labels)
    metrics.update(calibration.figures(outputs, labels, temperature))
    if temperature != 1.0:
        metrics.update(temperature=temperature, ece_raw=calibration.ece(calibration.softmax(outputs), labels))
    return metrics, preds.tolist()
