"""Accuracy, macro-F1 and per-class figures (shrinkwrap/metrics.py): the numbers every gate and report reads.

Three references, each independent of the others:
- a hand-worked example (numbers worked out on paper below, from the definitions in Manning, Raghavan &
  Schütze, "Introduction to Information Retrieval", 2008, §8.3: precision = TP/(TP+FP), recall = TP/(TP+FN),
  F1 = 2PR/(P+R); macro average = unweighted mean over classes);
- a plain numpy computation of the same definitions, written here without sklearn;
- scikit-learn's accuracy_score / f1_score / precision_recall_fscore_support (metrics.py calls sklearn
  internally, so this one alone would not be independent; the first two are).
"""
import numpy as np
import pytest
from sklearn.metrics import accuracy_score, f1_score, precision_recall_fscore_support

from shrinkwrap.ml.metrics import classification_metrics, confusion


def _numpy_reference(y, p, k):
    """The textbook definitions in numpy only; 0 where a denominator is 0 (sklearn's zero_division=0)."""
    y, p = np.asarray(y), np.asarray(p)
    prec, rec, f1, sup = [], [], [], []
    for c in range(k):
        tp = np.sum((y == c) & (p == c))
        fp = np.sum((y != c) & (p == c))
        fn = np.sum((y == c) & (p != c))
        pc = tp / (tp + fp) if tp + fp else 0.0
        rc = tp / (tp + fn) if tp + fn else 0.0
        prec.append(pc), rec.append(rc), sup.append(int(np.sum(y == c)))
        f1.append(2 * pc * rc / (pc + rc) if pc + rc else 0.0)
    return {"accuracy": float(np.mean(y == p)) if len(y) else 0.0, "macro_f1": float(np.mean(f1)),
            "precision": prec, "recall": rec, "f1": f1, "support": sup}


def test_hand_worked_example_with_a_class_never_predicted():
    # 3 classes, 6 items. True:  0 0 0 1 1 2 ; predicted: 0 0 1 1 1 1 — class 2 is never predicted.
    # class 0: TP=2 FP=0 FN=1 -> P=1,   R=2/3, F1=2*(1*2/3)/(1+2/3)=0.8
    # class 1: TP=2 FP=2 FN=0 -> P=1/2, R=1,   F1=2*(1/2)/(3/2)=2/3
    # class 2: TP=0 FP=0 FN=1 -> P=0 (0/0, zero_division=0), R=0, F1=0
    # accuracy = 4/6; macro-F1 = (0.8 + 2/3 + 0)/3 = 22/45 ≈ 0.4889   (worked by hand, definitions above)
    m = classification_metrics(np.array([0, 0, 0, 1, 1, 2]), np.array([0, 0, 1, 1, 1, 1]), 3)
    assert m["accuracy"] == pytest.approx(4 / 6)
    assert m["macro_f1"] == pytest.approx(22 / 45)
    assert m["per_class"]["precision"] == pytest.approx([1.0, 0.5, 0.0])
    assert m["per_class"]["recall"] == pytest.approx([2 / 3, 1.0, 0.0])
    assert m["per_class"]["f1"] == pytest.approx([0.8, 2 / 3, 0.0])
    assert m["per_class"]["support"] == [3, 2, 1]
    assert m["confusion"] == [[2, 1, 0], [0, 2, 0], [0, 1, 0]]   # rows true, columns predicted (by hand)


def test_hand_worked_example_with_a_class_absent_from_the_test_split():
    # 3 classes, class 2 neither in the labels nor predicted: it still counts in the macro mean with F1 0.
    # class 0: TP=1 FP=1 FN=1 -> P=R=F1=1/2 ; class 1: TP=1 FP=1 FN=1 -> 1/2 ; class 2: 0
    # macro-F1 = (1/2 + 1/2 + 0)/3 = 1/3 ; accuracy = 2/4   (by hand)
    m = classification_metrics(np.array([0, 0, 1, 1]), np.array([0, 1, 1, 0]), 3)
    assert m["accuracy"] == pytest.approx(0.5)
    assert m["macro_f1"] == pytest.approx(1 / 3)
    assert m["per_class"]["support"] == [2, 2, 0]
    assert np.asarray(m["confusion"]).shape == (3, 3)


@pytest.mark.parametrize("seed", range(8))
def test_random_labels_agree_with_numpy_and_sklearn(seed):
    rng = np.random.default_rng(seed)
    k = int(rng.integers(2, 7))
    n = int(rng.integers(1, 60))
    y = rng.integers(0, k, n)
    p = rng.integers(0, k, n)
    if seed % 2:                       # edge cases: one class never predicted, another absent from the split
        p[p == 0] = 1
        y[y == k - 1] = 0
    m = classification_metrics(y, p, k)
    ref = _numpy_reference(y, p, k)                       # source: numpy, the textbook definitions
    assert m["accuracy"] == pytest.approx(ref["accuracy"])
    assert m["macro_f1"] == pytest.approx(ref["macro_f1"])
    for key in ("precision", "recall", "f1"):
        assert m["per_class"][key] == pytest.approx(ref[key])
    assert m["per_class"]["support"] == ref["support"]
    # source: scikit-learn
    assert m["accuracy"] == pytest.approx(accuracy_score(y, p))
    assert m["macro_f1"] == pytest.approx(f1_score(y, p, labels=np.arange(k), average="macro", zero_division=0))
    P, R, F, S = precision_recall_fscore_support(y, p, labels=np.arange(k), zero_division=0)
    assert m["per_class"]["f1"] == pytest.approx(F.tolist())
    # the confusion matrix against numpy's bincount of (true, predicted) pairs
    assert (confusion(y, p, k) == np.bincount(y * k + p, minlength=k * k).reshape(k, k)).all()

