"""How far to trust a score: calibration figures, temperature scaling, abstention.

numpy only: the predict path reads `softmax` from here. Fitting the temperature needs scipy and is the
training side's (shrinkwrap.ml.temperature).

Figures (Guo et al. 2017, "On Calibration of Modern Neural Networks"):
  ece    expected calibration error: the test texts binned by their top-label confidence into
         N_BINS equal-width bins over [0, 1]; sum over bins of (bin share) × |accuracy − mean confidence|
  brier  multi-class Brier score (Brier 1950): mean over texts of sum over classes of (p_k − [y = k])²;
         0 is perfect, 2 the worst (for two classes it is twice scikit-learn's binary brier_score_loss)
  nll    mean negative log-likelihood of the true class (natural log; scikit-learn's log_loss)
Temperature scaling divides the logits by one scalar T > 0 fitted on the validation split to minimise
its NLL: the argmax, hence accuracy, is unchanged; only how sure the scores say they are changes.
"""
from __future__ import annotations

import numpy as np

N_BINS = 15  # Guo et al. 2017 use 15 equal-width bins
# Smallest probability taken in a log: a wrong answer at probability 0 costs -log(1e-15) ≈ 34.5, as log_loss clips.
_EPS = 1e-15
# The temperature is searched over [1/20, 20] (log scale): wider than any sensible model needs.
T_BOUNDS = (0.05, 20.0)
# Abstention thresholds the report plots accuracy against coverage at.
THRESHOLDS = tuple(round(x, 2) for x in np.arange(0.0, 1.0, 0.05))


def softmax(logits, temperature: float = 1.0) -> np.ndarray:
    z = np.asarray(logits, dtype=np.float64) / float(temperature)
    z = z - z.max(axis=1, keepdims=True)
    e = np.exp(z)
    return e / e.sum(axis=1, keepdims=True)


def ece(probs, labels, n_bins: int = N_BINS) -> float:
    return float(sum(b["count"] * abs(b["accuracy"] - b["confidence"]) for b in reliability(probs, labels, n_bins))
                 / max(1, len(labels)))


def reliability(probs, labels, n_bins: int = N_BINS) -> list[dict]:
    """The non-empty bins of top-label confidence: {lo, hi, count, confidence (mean), accuracy}.
    Bin i holds confidences in (i/n, (i+1)/n]; a confidence of exactly 0 goes to the first."""
    probs, labels = np.asarray(probs, dtype=np.float64), np.asarray(labels)
    conf, right = probs.max(1), (probs.argmax(1) == labels)
    index = np.clip(np.ceil(conf * n_bins).astype(np.int64) - 1, 0, n_bins - 1)
    out = []
    for i in range(n_bins):
        mask = index == i
        if mask.any():
            out.append({"lo": i / n_bins, "hi": (i + 1) / n_bins, "count": int(mask.sum()),
                        "confidence": float(conf[mask].mean()), "accuracy": float(right[mask].mean())})
    return out


def brier(probs, labels) -> float:
    probs = np.asarray(probs, dtype=np.float64)
    onehot = np.eye(probs.shape[1])[np.asarray(labels)]
    return float(np.mean(np.sum((probs - onehot) ** 2, axis=1)))


def nll(probs, labels) -> float:
    probs = np.asarray(probs, dtype=np.float64)
    p = probs[np.arange(len(probs)), np.asarray(labels)]
    return float(-np.mean(np.log(np.clip(p, _EPS, 1.0))))


def figures(logits, labels, temperature: float = 1.0) -> dict:
    """ece, brier, nll and the reliability bins of logits / temperature against labels."""
    p = softmax(logits, temperature)
    return {"ece": ece(p, labels), "brier": brier(p, labels), "nll": nll(p, labels), "reliability": reliability(p, labels)}


def coverage_curve(probs, labels, thresholds=THRESHOLDS) -> list[dict]:
    """For each threshold P: the share of texts whose top score is >= P (answered), and the accuracy on those."""
    probs, labels = np.asarray(probs, dtype=np.float64), np.asarray(labels)
    conf, right = probs.max(1), probs.argmax(1) == labels
    out = []
    for t in thresholds:
        kept = conf >= t
        out.append({"threshold": float(t), "coverage": float(kept.mean()) if len(kept) else 0.0,
                    "answered": int(kept.sum()), "accuracy": float(right[kept].mean()) if kept.any() else None})
    return out
