"""The embedding task in the benchmark: what a step's sentence vectors on the test texts are worth for what they are
used for — staying in the teacher's vector space (cosine to the teacher's vector of the same text), finding the
same neighbours (search, deduplication, clustering), answering queries against an index the teacher built (which
is not rebuilt when the encoder is replaced), and, with labels, a small downstream classifier; with scored pairs,
ranking pairs as the scores do.

    cosine_to_teacher        mean over test texts of cos(step vector, teacher vector); _p5 its 5th percentile
    neighbour_recall_at_10   per test text, the share of its 10 nearest other test texts under the teacher's
                             vectors that are also among its 10 nearest under the step's; averaged
    cross_recall_at_10       the same with the query embedded by the step and the index by the teacher
    knn_accuracy             5 nearest neighbours by cosine, leave-one-out on the test split (labels)
    probe_accuracy           a logistic regression fitted on the training split's vectors, scored on the test
                             split (labels)
    spearman                 Spearman's rank correlation of cos(text, text_pair) with the pair's score

Every task answers the same name (shrinkwrap.bench.tasks): measure."""
from __future__ import annotations

from typing import Optional

import numpy as np

NAME = "embedding"
K_NEIGHBOURS = 10
K_VOTE = 5


def unit(vectors: np.ndarray) -> np.ndarray:
    v = np.asarray(vectors, dtype=np.float64)
    return v / np.maximum(np.linalg.norm(v, axis=1, keepdims=True), 1e-12)


def cosine_to(step: np.ndarray, teacher: np.ndarray) -> np.ndarray:
    """cos(step_i, teacher_i) for every text i."""
    return (unit(step) * unit(teacher)).sum(1)


def nearest(queries: np.ndarray, index: np.ndarray, k: int) -> np.ndarray:
    """For each query i, the k rows of `index` most cosine-similar to it, row i itself left out (the two arrays
    hold the same texts), nearest first; ties go to the lower row."""
    sims = unit(queries) @ unit(index).T
    np.fill_diagonal(sims, -np.inf)
    k = min(k, len(index) - 1)
    order = np.argsort(-sims, axis=1, kind="stable")
    return order[:, :k]


def recall_at(reference: np.ndarray, found: np.ndarray) -> np.ndarray:
    """Per text: the share of its reference neighbours that are among the neighbours found."""
    return np.array([len(set(r) & set(f)) / max(1, len(r)) for r, f in zip(reference, found)])


def knn_accuracy(vectors: np.ndarray, labels: np.ndarray, k: int = K_VOTE) -> float:
    """Leave-one-out accuracy of a k-nearest-neighbour vote by cosine (uniform weights; a tied vote goes to the
    lowest class id, as scikit-learn's KNeighborsClassifier decides it)."""
    labels = np.asarray(labels)
    votes = labels[nearest(vectors, vectors, k)]
    n_classes = int(labels.max()) + 1
    counts = np.stack([(votes == c).sum(1) for c in range(n_classes)], axis=1)
    return float((counts.argmax(1) == labels).mean())


def probe_accuracy(train: np.ndarray, train_labels: np.ndarray, test: np.ndarray, test_labels: np.ndarray) -> float:
    """A logistic regression (scikit-learn, lbfgs, L2, C = 1) fitted on the training vectors, scored on the test."""
    from sklearn.linear_model import LogisticRegression

    clf = LogisticRegression(max_iter=2000)
    clf.fit(np.asarray(train, dtype=np.float64), train_labels)
    return float(clf.score(np.asarray(test, dtype=np.float64), test_labels))


def spearman(a: np.ndarray, b: np.ndarray, scores: np.ndarray) -> float:
    """Spearman's rank correlation (scipy) of cos(a_i, b_i) with score_i."""
    from scipy.stats import spearmanr

    return float(spearmanr(cosine_to(a, b), scores).statistic)


def measure(outputs: np.ndarray, inputs, outputs_of, temperature: float = 1.0) -> tuple[dict, list]:
    """quality() of the test texts' vectors against inputs.reference (the teacher's), with the labels, the training
    split's vectors and the pairs' second texts' vectors where the inputs have them."""
    labels = inputs.labels if inputs.labels is not None and (inputs.labels >= 0).all() else None
    if inputs.reference is None and not inputs.self_reference:  # nothing to compare with: the label figure alone
        return ({"texts": len(outputs), **({"knn_accuracy": knn_accuracy(outputs, labels)} if labels is not None
                                            else {})}, [])
    train = pairs = None
    if labels is not None and inputs.train is not None:
        train = (outputs_of(inputs.train[0]), inputs.train[1])
    if inputs.pairs is not None:
        pairs = (outputs_of(inputs.pairs[0]), inputs.pairs[1])
    return quality(outputs, labels, inputs.reference, train, pairs)


def quality(outputs: np.ndarray, labels: Optional[np.ndarray], reference: Optional[np.ndarray],
            train: Optional[tuple[np.ndarray, np.ndarray]] = None,
            pairs: Optional[tuple[np.ndarray, np.ndarray]] = None) -> tuple[dict, list]:
    """(metrics, each text's neighbour recall at 10) of a step's test vectors `outputs`: against the teacher's
    (`reference`; without one, the vectors are their own reference: the teacher's row), with `labels`
    (knn_accuracy; and with `train` = (training vectors, their labels), probe_accuracy), and with `pairs` = (the
    pairs' second texts' vectors, their scores), spearman."""
    reference = outputs if reference is None else reference
    if len(reference) != len(outputs):
        raise ValueError(f"{len(outputs)} vectors against {len(reference)} reference vectors")
    cos = cosine_to(outputs, reference)
    teacher_nn = nearest(reference, reference, K_NEIGHBOURS)
    per_text = recall_at(teacher_nn, nearest(outputs, outputs, K_NEIGHBOURS))
    m = {"cosine_to_teacher": float(cos.mean()), "cosine_to_teacher_p5": float(np.percentile(cos, 5)),
         "cosine_deciles": [round(float(x), 6) for x in np.percentile(cos, np.arange(0, 101, 10))],
         "neighbour_recall_at_10": float(per_text.mean()),
         "cross_recall_at_10": float(recall_at(teacher_nn, _cross(outputs, reference)).mean()), "texts": len(cos)}
    if labels is not None:
        m["knn_accuracy"] = knn_accuracy(outputs, labels)
        if train is not None:
            m["probe_accuracy"] = probe_accuracy(train[0], train[1], outputs, labels)
    if pairs is not None:
        m["spearman"] = spearman(outputs, pairs[0], pairs[1])
    return m, [round(float(x), 4) for x in per_text]


def _cross(queries: np.ndarray, index: np.ndarray) -> np.ndarray:
    """For each step-embedded query i, its 10 nearest among the teacher's vectors of the other texts."""
    return nearest(queries, index, K_NEIGHBOURS)
