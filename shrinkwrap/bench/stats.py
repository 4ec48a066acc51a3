"""How sure is an accuracy drop? A paired bootstrap interval and McNemar's exact test.

Both compare two models on the same test texts, so both are paired: the bootstrap draws the same
resampled items for both models, and McNemar's test looks only at the texts where exactly one of
the two is right.
"""
from __future__ import annotations

from fractions import Fraction

import numpy as np

# 10,000 resamples keep the Monte Carlo error of a 2.5 % percentile well under the spacing of an
# accuracy on a few hundred items (common practice; Efron & Tibshirani 1993 ask for >= 1,000 for
# percentile intervals — from memory).
N_RESAMPLES = 10_000
SEED = 0
CONFIDENCE = 0.95
# Resamples drawn at a time: bounds memory to CHUNK × n_items indices whatever the test-set size.
_CHUNK = 1_000


def paired_bootstrap_drop(labels, ref_preds, preds, n_resamples: int = N_RESAMPLES, seed: int = SEED,
                          confidence: float = CONFIDENCE) -> tuple[float, float]:
    """Percentile interval of accuracy(ref) - accuracy(model), in points (0-100).

    Each resample draws n test items with replacement; the same items score both models.
    """
    labels = np.asarray(labels)
    ref_right = (np.asarray(ref_preds) == labels).astype(np.float64)
    right = (np.asarray(preds) == labels).astype(np.float64)
    # The drop of a resample is the mean of this per-item difference over the drawn items.
    diff = ref_right - right
    n = len(diff)
    if n == 0:
        raise ValueError("no test items to resample")
    rng = np.random.default_rng(seed)
    drops = np.empty(n_resamples)
    for start in range(0, n_resamples, _CHUNK):
        stop = min(start + _CHUNK, n_resamples)
        idx = rng.integers(0, n, size=(stop - start, n))
        drops[start:stop] = diff[idx].mean(axis=1)
    tail = (1 - confidence) / 2 * 100
    lo, hi = np.percentile(drops, [tail, 100 - tail])
    return float(lo * 100), float(hi * 100)


def discordant_pairs(labels, ref_preds, preds) -> tuple[int, int]:
    """(b, c): texts the reference gets right and the model wrong, and the other way round."""
    labels = np.asarray(labels)
    ref_right = np.asarray(ref_preds) == labels
    right = np.asarray(preds) == labels
    return int(np.sum(ref_right & ~right)), int(np.sum(~ref_right & right))


def mcnemar_exact_p(b: int, c: int) -> float:
    """Two-sided exact McNemar p-value: a binomial test of b successes in b + c trials at p = 1/2.

    p = min(1, 2 · sum_{k <= min(b, c)} C(b+c, k) / 2^(b+c))   (McNemar 1947, exact form).
    Computed in exact integers so that large b + c neither underflows nor loses precision.
    """
    if b < 0 or c < 0:
        raise ValueError(f"b = {b}, c = {c} — counts cannot be negative")
    n = b + c
    if n == 0:
        return 1.0
    term = tail = 1  # C(n, 0); each next binomial coefficient follows from the last exactly
    for k in range(1, min(b, c) + 1):
        term = term * (n - k + 1) // k
        tail += term
    return float(min(Fraction(1), Fraction(2 * tail, 2 ** n)))


def compare_to_reference(labels, ref_preds, preds) -> dict:
    """The uncertainty fields results.json stores for a step measured against the reference (the teacher)."""
    lo, hi = paired_bootstrap_drop(labels, ref_preds, preds)
    b, c = discordant_pairs(labels, ref_preds, preds)
    return {
        "accuracy_drop_ci95": [round(lo, 4), round(hi, 4)],
        "bootstrap": {"method": "paired percentile", "n_resamples": N_RESAMPLES, "seed": SEED,
                      "confidence": CONFIDENCE},
        "mcnemar": {"b": b, "c": c, "p_value": mcnemar_exact_p(b, c)},
    }
