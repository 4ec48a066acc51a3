"""Accuracy with uncertainty: the paired bootstrap interval of the drop and McNemar's exact test."""
import json

import numpy as np
import pytest
from scipy import stats

from shrinkwrap.bench.stats import (N_RESAMPLES, compare_to_reference, discordant_pairs, mcnemar_exact_p,
                                    paired_bootstrap_drop)


def paired_predictions(n=1000, seed=1, copy=0.93):
    """Labels, a reference right ~90 % of the time, and a model that copies the reference's prediction with
    probability `copy`: paired, as a student and its teacher are."""
    rng = np.random.default_rng(seed)
    labels = rng.integers(0, 4, n)
    ref = np.where(rng.random(n) < 0.9, labels, (labels + 1) % 4)
    model = np.where(rng.random(n) < copy, ref, (ref + 1) % 4)
    return labels, ref, model


def _scipy_interval(labels, ref, model, paired):
    rr, mm = (ref == labels).astype(float), (model == labels).astype(float)

    def drop(a, b, axis=-1):
        return (a.mean(axis) - b.mean(axis)) * 100

    res = stats.bootstrap((rr, mm), drop, paired=paired, vectorized=True, method="percentile",
                          n_resamples=N_RESAMPLES, confidence_level=0.95, random_state=0)
    return res.confidence_interval.low, res.confidence_interval.high


def test_paired_bootstrap_matches_scipy_percentile_interval():
    labels, ref, model = paired_predictions(n=2000, copy=0.8)
    lo, hi = paired_bootstrap_drop(labels, ref, model)
    s_lo, s_hi = _scipy_interval(labels, ref, model, paired=True)
    # Source: scipy.stats.bootstrap(paired=True, method="percentile"), same n_resamples. The two draw different
    # random resamples, so they agree up to Monte Carlo error: here the drop's bootstrap spread is ~1 point and
    # the error of each end ~0.03 point, so 0.15 allows for chance yet would catch a 90 % interval passed off
    # as 95 % (each end ~0.3 point inside).
    assert lo == pytest.approx(s_lo, abs=0.15)
    assert hi == pytest.approx(s_hi, abs=0.15)
    point = ((ref == labels).mean() - (model == labels).mean()) * 100
    assert lo < point < hi


def test_pairing_narrows_the_interval():
    # Resampling the two models independently ignores that they err on the same texts; the paired interval
    # must be clearly narrower than scipy's unpaired one on these strongly paired predictions.
    labels, ref, model = paired_predictions()
    lo, hi = paired_bootstrap_drop(labels, ref, model)
    u_lo, u_hi = _scipy_interval(labels, ref, model, paired=False)
    assert hi - lo < 0.7 * (u_hi - u_lo)


def test_bootstrap_is_reproducible_and_seeded():
    labels, ref, model = paired_predictions(n=300)
    assert paired_bootstrap_drop(labels, ref, model) == paired_bootstrap_drop(labels, ref, model)
    # With few resamples the Monte Carlo noise shows: a different seed gives a different interval.
    few = [paired_bootstrap_drop(labels, ref, model, n_resamples=40, seed=s) for s in range(5)]
    assert len(set(few)) > 1


def test_identical_models_have_a_zero_width_interval():
    labels, ref, _ = paired_predictions(n=200)
    assert paired_bootstrap_drop(labels, ref, ref.copy()) == (0.0, 0.0)


def test_mcnemar_exact_hand_worked_example():
    # McNemar 1947, exact form = two-sided binomial test on the discordant pairs at p = 1/2:
    # b = 1, c = 7, n = 8: p = 2 · (C(8,0) + C(8,1)) / 2^8 = 2 · (1 + 8) / 256 = 18 / 256 = 0.0703125.
    assert mcnemar_exact_p(1, 7) == 0.0703125
    assert mcnemar_exact_p(7, 1) == 0.0703125
    # b = c: the doubled tail exceeds 1 and is capped there; no discordant pair: nothing against the null.
    assert mcnemar_exact_p(4, 4) == 1.0
    assert mcnemar_exact_p(0, 0) == 1.0
    # b = 0, c = 5: p = 2 · 1 / 32 = 0.0625.
    assert mcnemar_exact_p(0, 5) == 0.0625


@pytest.mark.parametrize("b,c", [(1, 7), (0, 12), (3, 40), (25, 31), (60, 90), (700, 820)])
def test_mcnemar_matches_scipy_binomtest(b, c):
    # Source: scipy.stats.binomtest(b, b + c, 0.5) (two-sided, exact).
    assert mcnemar_exact_p(b, c) == pytest.approx(stats.binomtest(b, b + c, 0.5).pvalue, rel=1e-9)


def test_discordant_pairs_count_by_hand():
    labels = np.array([0, 1, 2, 0, 1, 2])
    ref = np.array([0, 1, 2, 1, 1, 0])      # right on items 0, 1, 2, 4
    model = np.array([0, 2, 2, 0, 0, 0])    # right on items 0, 2, 3
    # b: ref right, model wrong = items 1, 4; c: ref wrong, model right = item 3.
    assert discordant_pairs(labels, ref, model) == (2, 1)
    out = compare_to_reference(labels, ref, model)
    assert out["mcnemar"] == {"b": 2, "c": 1, "p_value": 1.0}
    assert out["bootstrap"]["n_resamples"] == N_RESAMPLES


def test_results_carry_interval_and_mcnemar_for_every_step_after_the_teacher(tiny_run):
    results = json.loads((tiny_run / "results.json").read_text())
    labels = np.array(results["test_labels"])
    teacher, *rest = results["steps"]
    assert "accuracy_drop_ci95" not in teacher and "mcnemar" not in teacher
    ref = np.array(teacher["predictions"])
    for s in rest:
        preds = np.array(s["predictions"])
        lo, hi = s["accuracy_drop_ci95"]
        assert lo <= s["accuracy_drop"] <= hi
        assert (s["mcnemar"]["b"], s["mcnemar"]["c"]) == discordant_pairs(labels, ref, preds)
        b, c = s["mcnemar"]["b"], s["mcnemar"]["c"]
        # b - c over the test size is the drop itself (as a fraction).
        assert (b - c) / len(labels) * 100 == pytest.approx(s["accuracy_drop"], abs=1e-3)
        if b + c:
            assert s["mcnemar"]["p_value"] == pytest.approx(stats.binomtest(b, b + c, 0.5).pvalue, rel=1e-9)
        else:
            assert s["mcnemar"]["p_value"] == 1.0
        assert s["bootstrap"]["n_resamples"] == N_RESAMPLES
