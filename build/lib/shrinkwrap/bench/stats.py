"""How sure is an accuracy drop? A paired bootstrap interval and McNemar's exact test.

Both compare two models on the same test texts, so both are paired: the bootstrap draws the same
resampled items for both models, and McNemar's test looks only at the texts where exactly one of
the two is right.
"""
from __future__ import annotations

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
    """Percentile interval of accuracy(ref) - accuracy(model), in points (0-100), by
    scipy.stats.bootstrap(paired=True): each resample draws n test items with replacement, and the
    same items score both models."""
    from scipy.stats import bootstrap

    labels = np.asarray(labels)
    ref_right = (np.asarray(ref_preds) == labels).astype(np.float64)
    right = (np.asarray(preds) == labels).astype(np.float64)
    if len(labels) == 0:
        raise ValueError("no test items to resample")

    def drop(ref, model, axis=-1):
        return ref.mean(axis) - model.mean(axis)

    res = bootstrap((ref_right, right), drop, paired=True, vectorized=True, method="percentile",
                    n_resamples=n_resamples, batch=_CHUNK, confidence_level=confidence,
                    random_state=np.random.default_rng(seed))
    return float(res.confidence_interval.low * 100), float(res.confidence_interval.high * 100)


def discordant_pairs(labels, ref_preds, preds) -> tuple[int, int]:
    """(b, c): texts the reference gets right and the model wrong, and the other way round."""
    labels = np.asarray(labels)
    ref_right = np.asarray(ref_preds) == labels
    right = np.asarray(preds) == labels
    return int(np.sum(ref_right & ~right)), int(np.sum(~ref_right & right))


def mcnemar_exact_p(b: int, c: int) -> float:
    """Two-sided exact McNemar p-value (McNemar 1947, exact form): a binomial test of b successes in
    b + c trials at p = 1/2, by scipy.stats.binomtest."""
    from scipy.stats import binomtest

    if b < 0 or c < 0:
        raise ValueError(f"b = {b}, c = {c} — counts cannot be negative")
    if b + c == 0:
        return 1.0  # no discordant pair: nothing against the null (binomtest needs one trial)
    return float(min(1.0, binomtest(b, b + c, 0.5).pvalue))


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
