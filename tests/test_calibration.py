"""Calibration figures against outside references, temperature scaling, abstention, the class caution rule."""
import numpy as np
import pytest
from sklearn.metrics import brier_score_loss, log_loss

from shrinkwrap.ml.temperature import fit_temperature
from shrinkwrap.serve import calibration


def _data(n=400, k=3, seed=0, scale=4.0):
    rng = np.random.default_rng(seed)
    y = rng.integers(0, k, n)
    logits = rng.normal(size=(n, k))
    logits[np.arange(n), y] += 1.0      # informative, so accuracy is above chance
    return logits * scale, y            # scale > 1: deliberately over-confident


def _ece_independent(probs, y, n_bins=15):
    # Guo et al. 2017, eq. (3): ECE = sum_m |B_m|/n · |acc(B_m) − conf(B_m)|, B_m = confidences in ((m−1)/M, m/M].
    conf, pred = probs.max(1), probs.argmax(1)
    total = 0.0
    edges = np.linspace(0, 1, n_bins + 1)
    for lo, hi in zip(edges[:-1], edges[1:]):
        in_bin = (conf > lo) & (conf <= hi)
        if in_bin.sum():
            total += in_bin.sum() / len(y) * abs((pred[in_bin] == y[in_bin]).mean() - conf[in_bin].mean())
    return total


def test_ece_equals_guo_et_al_formula_computed_independently():
    logits, y = _data()
    p = calibration.softmax(logits)
    assert calibration.ece(p, y) == pytest.approx(_ece_independent(p, y), abs=1e-12)
    assert calibration.ece(p, y) > 0.05  # the over-confident model is measurably miscalibrated


def test_nll_equals_sklearn_log_loss_and_brier_matches_sklearn_for_two_classes():
    logits, y = _data(k=3)
    p = calibration.softmax(logits)
    assert calibration.nll(p, y) == pytest.approx(log_loss(y, p, labels=[0, 1, 2]), rel=1e-9)  # scikit-learn
    logits2, y2 = _data(k=2, seed=1)
    p2 = calibration.softmax(logits2)
    # multi-class Brier (Brier 1950) sums over both classes: twice sklearn's binary brier_score_loss
    assert calibration.brier(p2, y2) == pytest.approx(2 * brier_score_loss(y2, p2[:, 1]), rel=1e-9)


def test_temperature_fit_lowers_nll_of_an_over_confident_model():
    val_logits, val_y = _data(seed=2)
    test_logits, test_y = _data(seed=3)
    t = fit_temperature(val_logits, val_y)
    assert t > 1.5  # over-confident: the fit softens the scores
    before = calibration.nll(calibration.softmax(test_logits), test_y)
    after = calibration.nll(calibration.softmax(test_logits, t), test_y)
    assert after < before - 0.1
    assert calibration.ece(calibration.softmax(test_logits, t), test_y) < calibration.ece(
        calibration.softmax(test_logits), test_y)
    # the minimum: NLL is no lower a little either side of T
    nll = lambda temp: calibration.nll(calibration.softmax(val_logits, temp), val_y)
    assert nll(t) <= nll(t * 1.05) and nll(t) <= nll(t / 1.05)
    # argmax unchanged: accuracy is the same
    assert (calibration.softmax(test_logits, t).argmax(1) == test_logits.argmax(1)).all()


def test_coverage_curve_answers_fewer_texts_more_accurately():
    logits, y = _data()
    curve = calibration.coverage_curve(calibration.softmax(logits), y)
    assert curve[0]["coverage"] == 1.0
    covs = [c["coverage"] for c in curve]
    assert covs == sorted(covs, reverse=True)
    answered = [c for c in curve if c["accuracy"] is not None]
    assert answered[-1]["accuracy"] > answered[0]["accuracy"]


def test_class_caution_names_the_bbc_like_case_and_not_chance_losses():
    from shrinkwrap.outputs.classification import lost_too_many

    # BBC News: one class lost 5 of 102 texts while the average fell 0.9 points — named
    assert lost_too_many(5, 102, 0.9)[0]
    # one text of a class: chance, not named
    assert not lost_too_many(1, 102, 0.9)[0]
    # a class losing at the average rate: not named
    assert not lost_too_many(2, 100, 2.0)[0]
