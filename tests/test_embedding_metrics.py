"""The embedding task's figures against outside references: scikit-learn's NearestNeighbors, KNeighborsClassifier
and LogisticRegression, scipy's spearmanr, and a worked example by hand; and the ONNX graph's pooling against the
PyTorch model's, for every pooling."""
from __future__ import annotations

import numpy as np
import pytest

from shrinkwrap.bench import embedding as metrics


def _vectors(n=60, d=8, seed=0):
    rng = np.random.default_rng(seed)
    return rng.normal(size=(n, d)), rng


def test_nearest_neighbours_are_scikit_learn_s_by_cosine():
    from sklearn.neighbors import NearestNeighbors

    x, _ = _vectors()
    ours = metrics.nearest(x, x, 10)
    nn = NearestNeighbors(n_neighbors=11, metric="cosine").fit(x)
    _, idx = nn.kneighbors(x)                     # each text's own row first (distance 0), then its 10 nearest
    assert [set(r) for r in ours] == [set(r[1:]) for r in idx]


def test_neighbour_recall_by_hand():
    # 4 texts on a line; under the teacher text 0's nearest is 1, under the step it is 3: recall at 1 of text 0 = 0
    teacher = np.array([[1.0, 0.0], [0.9, 0.1], [0.0, 1.0], [0.1, 0.9]])
    step = np.array([[0.1, 0.9], [0.9, 0.1], [0.0, 1.0], [0.2, 0.8]])
    ref, found = metrics.nearest(teacher, teacher, 1), metrics.nearest(step, step, 1)
    assert ref[:, 0].tolist() == [1, 0, 3, 2] and metrics.recall_at(ref, found)[0] == 0.0
    assert metrics.recall_at(ref, ref).mean() == 1.0


def test_knn_accuracy_is_a_leave_one_out_scikit_learn_vote():
    from sklearn.neighbors import KNeighborsClassifier

    x, rng = _vectors(n=50)
    y = rng.integers(0, 3, size=50)
    right = 0
    for i in range(len(x)):                       # leave-one-out by hand with scikit-learn's classifier
        keep = np.arange(len(x)) != i
        clf = KNeighborsClassifier(n_neighbors=5, metric="cosine", algorithm="brute").fit(x[keep], y[keep])
        right += int(clf.predict(x[i:i + 1])[0] == y[i])
    assert metrics.knn_accuracy(x, y) == pytest.approx(right / len(x))


def test_probe_and_spearman_are_the_libraries_own():
    from scipy.stats import spearmanr
    from sklearn.linear_model import LogisticRegression

    x, rng = _vectors(n=80)
    y = (x[:, 0] > 0).astype(int)
    expected = LogisticRegression(max_iter=2000).fit(x[:60], y[:60]).score(x[60:], y[60:])
    assert metrics.probe_accuracy(x[:60], y[:60], x[60:], y[60:]) == pytest.approx(expected)
    a, b = x[:40], x[40:] + 0.3 * x[:40]
    scores = rng.normal(size=40)
    cos = [float(u @ v / np.linalg.norm(u) / np.linalg.norm(v)) for u, v in zip(a, b)]
    assert metrics.spearman(a, b, scores) == pytest.approx(spearmanr(cos, scores).statistic)


def test_the_teacher_against_itself_and_a_copy_of_it():
    x, _ = _vectors()
    m, _ = metrics.quality(x, None, None)
    assert m["cosine_to_teacher"] == pytest.approx(1.0) and m["neighbour_recall_at_10"] == 1.0
    assert m["cross_recall_at_10"] == 1.0
    noisy, _ = metrics.quality(x + np.random.default_rng(1).normal(scale=0.5, size=x.shape), None, x)
    assert noisy["cosine_to_teacher"] < 1.0 and noisy["neighbour_recall_at_10"] < 1.0


@pytest.mark.parametrize("how", ["mean", "cls", "max"])
def test_the_graph_s_pooled_vector_is_the_model_s(how, tiny_base, tmp_path):
    import warnings

    import onnxruntime as ort
    import torch
    from optimum.exporters.onnx import onnx_export_from_model

    from shrinkwrap.ml import embedding
    from shrinkwrap.ml.models import load_tokenizer

    model = embedding.load(str(tiny_base), pooling={"pooling": how, "normalize": how != "max"})
    tok = load_tokenizer(str(tiny_base), "test")
    enc = tok(["the router is down", "refund the charge on my invoice please", "hi"], padding=True, return_tensors="pt")
    with torch.no_grad():
        want = model(**enc).vectors.numpy()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        onnx_export_from_model(model.encoder, str(tmp_path), task="feature-extraction", opset=18, do_validation=False)
    embedding.finish_graph(tmp_path / "model.onnx", model)   # onnx.checker runs inside
    sess = ort.InferenceSession(str(tmp_path / "model.onnx"))
    got = sess.run(None, {i.name: enc[i.name].numpy() for i in sess.get_inputs()})[0]
    assert [o.name for o in sess.get_outputs()] == ["sentence_embedding"]
    assert np.abs(got - want).max() < 1e-5
