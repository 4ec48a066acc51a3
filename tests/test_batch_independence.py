"""Same text, same answer: the shipped int8 gives a text the same label and scores whatever it is batched with —
alone, inside a file, inside a shuffled file of other texts — and the accuracy a run records is the accuracy of
each test text classified alone. The reference of every check is the text classified on its own (a batch of one,
no padding); ONNX Runtime's dynamic int8 of the same graph is run beside it to show the checks can fail."""
import io
import json
import random
import shutil

import numpy as np
import onnx
import pytest
from conftest import keyword_rows
from onnx import TensorProto, helper, numpy_helper

SCORE_TOLERANCE = 1e-5   # the bound on a score's change between batchings


def _test_split(run_dir):
    from shrinkwrap.ml.data import load_dataset
    from shrinkwrap.recipe.schema import load_recipe

    recipe = load_recipe(run_dir.parent / "recipe.yaml")
    return load_dataset(recipe.data, recipe.resolve(recipe.data.path), "test").test


def _predict(artifact, texts=(), file=None, batch_size=32) -> list[dict]:
    from shrinkwrap.serve.predict import run_predict

    out = io.StringIO()
    assert run_predict(str(artifact), list(texts), file and str(file), batch_size, 1, stdout=out) == 0
    return [json.loads(line) for line in out.getvalue().splitlines()]


def _others(n: int) -> list[str]:
    """Texts of other lengths to batch the test texts with: short ones, and long ones the model cuts."""
    rows = [t for t, _ in keyword_rows(n, seed=11)]
    return [" ".join([t] * (1 + i % 6)) for i, t in enumerate(rows)]


def _same(rows: list[dict], alone: list[dict]) -> float:
    """The largest score change against `alone`, after checking that every label is the same."""
    assert [r["label"] for r in rows] == [a["label"] for a in alone]
    return max(abs(r["scores"][k] - a["scores"][k]) for r, a in zip(rows, alone) for k in a["scores"])


def test_predict_gives_each_text_the_same_answer_alone_in_its_file_and_in_a_shuffled_file(tiny_run, tmp_path):
    texts = _test_split(tiny_run).texts
    art = tiny_run / "artifact"
    alone = [_predict(art, [t])[0] for t in texts]
    file = tmp_path / "texts.txt"
    file.write_text("\n".join(texts) + "\n", encoding="utf-8")
    mixed = texts + _others(60)
    random.Random(0).shuffle(mixed)
    shuffled = tmp_path / "shuffled.txt"
    shuffled.write_text("\n".join(mixed) + "\n", encoding="utf-8")
    in_mixed = {r["text"]: r for r in _predict(art, file=shuffled, batch_size=16)}

    assert _same(_predict(art, file=file), alone) <= SCORE_TOLERANCE
    assert _same(_predict(art, file=file, batch_size=7), alone) <= SCORE_TOLERANCE
    assert _same([in_mixed[t] for t in texts], alone) <= SCORE_TOLERANCE


def test_the_shipped_logits_hold_in_a_batch_and_dynamic_int8_ones_do_not(tiny_run, tmp_path):
    """The tiny model's scores sit near 0 and 1, where predict's six decimals hide small moves: its logits are
    compared here. The shipped graph's stay put in a padded batch of mixed lengths; ONNX Runtime's dynamic int8
    (activation scales over the whole batch) of the same fp32 graph moves them, so the checks above can fail."""
    from shrinkwrap.ml.convert import quantize_dynamic
    from shrinkwrap.serve.artifact import load
    from shrinkwrap.serve.sessions import session

    texts, others = _test_split(tiny_run).texts, _others(30)
    art = load(tiny_run / "artifact", threads=1)

    def change() -> float:
        alone = np.concatenate([art.outputs([t]) for t in texts])
        together = art.outputs(texts + others, batch_size=len(texts) + len(others))[:len(texts)]
        return float(np.abs(together - alone).max())

    assert change() <= SCORE_TOLERANCE
    dynamic = tmp_path / "dynamic.onnx"
    quantize_dynamic(tiny_run / "student-onnx" / "model.onnx", dynamic, True, ["MatMul", "Attention", "Gather",
                                                                             "EmbedLayerNormalization"])
    art.session = session(dynamic, 1)
    assert change() > 1e-3


def test_recorded_accuracy_is_each_test_text_classified_alone(tiny_run):
    results = json.loads((tiny_run / "results.json").read_text())
    final = results["steps"][-1]
    split = _test_split(tiny_run)
    names = results["data"]["label_names"]
    alone = [names.index(_predict(tiny_run / "artifact", [t])[0]["label"]) for t in split.texts]
    assert final["predictions"] == alone
    # accuracy recomputed here from the labels (numpy), not read from the run
    assert final["metrics"]["accuracy"] == pytest.approx(float(np.mean(np.array(alone) == np.array(split.labels))),
                                                         abs=1e-12)
    manifest = json.loads((tiny_run / "artifact" / "manifest.json").read_text())
    quantization = manifest["model"]["quantization"]
    assert quantization["batch_independent"] is True and quantization["activation_scales"].startswith("one per row")
    assert quantization["matmuls_per_row"] > 0


def _matmul_graph(w: np.ndarray, bias: np.ndarray) -> onnx.ModelProto:
    """y = x·W (MatMul) and z = x·W + b (Gemm, W stored transposed), x of shape [rows, K]."""
    k, n = w.shape
    nodes = [helper.make_node("MatMul", ["x", "W"], ["y"]),
             helper.make_node("Gemm", ["x", "Wt", "b"], ["z"], transB=1)]
    graph = helper.make_graph(nodes, "g", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["rows", k])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["rows", n]),
                               helper.make_tensor_value_info("z", TensorProto.FLOAT, ["rows", n])],
                              [numpy_helper.from_array(w, "W"), numpy_helper.from_array(np.ascontiguousarray(w.T), "Wt"),
                               numpy_helper.from_array(bias, "b")])
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 18)])


@pytest.mark.parametrize("per_channel", [True, False])
def test_per_row_int8_is_the_documented_arithmetic_and_rows_never_mix(per_channel, tmp_path):
    from shrinkwrap.ml.int8_rows import quantize_rows
    from shrinkwrap.serve.sessions import session

    rng = np.random.default_rng(0)
    w = rng.normal(0, 0.1, (48, 24)).astype(np.float32)
    bias = rng.normal(0, 0.1, 24).astype(np.float32)
    onnx.save(_matmul_graph(w, bias), str(tmp_path / "fp32.onnx"))
    info = quantize_rows(tmp_path / "fp32.onnx", tmp_path / "int8.onnx", per_channel, ["MatMul", "Gemm"])
    assert info["matmuls_per_row"] == 2
    onnx.checker.check_model(str(tmp_path / "int8.onnx"), full_check=True)
    sess = session(tmp_path / "int8.onnx", 1)
    x = rng.normal(0, 1, (5, 48)).astype(np.float32)
    x[3] = 0.0   # an all-zero row must not divide by zero
    y, z = sess.run(None, {"x": x})

    # numpy: symmetric codes round(x / s) (half to even, as QuantizeLinear rounds) with s = max|row| / 127 in
    # float32 as the graph computes it, weights likewise per column (or per tensor), the integer product rescaled
    s = np.maximum(np.abs(x).max(1, keepdims=True), np.float32(1e-30)) * np.float32(1 / 127)
    ws = (np.abs(w).max(0) if per_channel else np.abs(w).max()) / np.float32(127)
    qx, qw = np.round(x / s), np.clip(np.round(w / ws), -127, 127)
    expected = (qx.astype(np.float64) @ qw) * s * ws
    assert np.abs(y - expected).max() <= 1e-5 * max(1.0, np.abs(expected).max())
    assert np.abs(z - (expected + bias)).max() <= 1e-5 * max(1.0, np.abs(expected).max())
    assert np.all(y[3] == 0)
    # int8 stays close to the float product: within the rounding of both operands (common practice: a few %)
    assert np.abs(y - x @ w).max() <= 0.05 * np.abs(x @ w).max()

    # Rows never mix: another row a hundred times larger, or a batch of one, leaves a row's outputs bit-identical.
    louder = x.copy()
    louder[0] *= 100
    assert np.array_equal(sess.run(None, {"x": louder})[0][1:], y[1:])
    assert np.array_equal(np.concatenate([sess.run(None, {"x": x[i:i + 1]})[0] for i in range(5)]), y)


def test_a_batch_dependent_artifact_gets_one_note_line_from_predict_and_bench(tiny_run, tmp_path, capsys):
    from shrinkwrap.cli import main
    from shrinkwrap.ml.convert import quantize_dynamic

    folder = tmp_path / "foreign"
    shutil.copytree(tiny_run / "student-onnx", folder)
    for name in ("step.json", "bench.json", "timing.json"):
        (folder / name).unlink(missing_ok=True)
    quantize_dynamic(tiny_run / "student-onnx" / "model.onnx", folder / "model.onnx", True, ["MatMul", "Attention"])
    assert main(["package", str(folder), "--out", str(tmp_path / "art")]) == 0   # packaged as it is
    capsys.readouterr()

    assert main(["predict", str(tmp_path / "art"), "my router is offline"]) == 0
    notes = [line for line in capsys.readouterr().err.splitlines() if line.startswith("note:")]
    assert len(notes) == 1 and "batch-dependent" in notes[0] and "DynamicQuantizeLinear" in notes[0]
    assert main(["bench", str(tmp_path / "art"), "--json", "--repeats", "3", "--timed-seconds", "0",
                 "--warmup", "0", "--warm-seconds", "0", "--sequence-length", "8"]) == 0
    out = capsys.readouterr()
    assert json.loads(out.out)["batch_dependent"] and sum(x.startswith("note:") for x in out.err.splitlines()) == 1

    assert main(["predict", str(tiny_run / "artifact"), "my router is offline"]) == 0
    assert not [line for line in capsys.readouterr().err.splitlines() if line.startswith("note:")]
