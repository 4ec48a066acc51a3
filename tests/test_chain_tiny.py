"""The whole chain on a tiny randomly initialised BERT: every step present, outputs loadable, reuse works."""
import json
import subprocess
import sys

import numpy as np
import onnx
import pytest
from conftest import tiny_recipe, write_recipe

STEPS = ["teacher", "student", "student-int8", "student-onnx", "student-onnx-int8"]


def test_every_step_recorded_in_chain_order(tiny_run):
    results = json.loads((tiny_run / "results.json").read_text())
    assert [s["name"] for s in results["steps"]] == STEPS
    assert [s["format"] for s in results["steps"]] == ["pytorch"] * 3 + ["onnx"] * 2
    for s in results["steps"]:
        assert 0 <= s["metrics"]["accuracy"] <= 1
        assert s["latency_ms"]["p95"] >= s["latency_ms"]["p50"] > 0
        assert s["size_bytes"] > 0
    # accuracy_drop in points against the teacher, checked with the accuracies themselves: (t - s) * 100
    teacher_acc = results["steps"][0]["metrics"]["accuracy"]
    for s in results["steps"][1:]:
        assert s["accuracy_drop"] == pytest.approx((teacher_acc - s["metrics"]["accuracy"]) * 100, abs=1e-4)  # results.json rounds to 4 places
    rows = [line.split("|")[1].strip() for line in (tiny_run / "report.md").read_text().splitlines()
            if line.startswith("| ") and "|---" not in line]
    assert rows[1:6] == STEPS  # the per-step table, after its header row


def test_keyword_task_is_learnt(tiny_run):
    # 3 balanced classes: chance is 1/3; the keywords make the task easy even for a 32-wide model.
    results = json.loads((tiny_run / "results.json").read_text())
    assert results["steps"][0]["metrics"]["accuracy"] >= 0.8


def test_onnx_files_pass_checker_and_int8_is_smaller(tiny_run):
    fp32, int8 = tiny_run / "student-onnx" / "model.onnx", tiny_run / "student-onnx-int8" / "model.onnx"
    onnx.checker.check_model(str(fp32), full_check=True)
    onnx.checker.check_model(str(int8), full_check=True)
    assert int8.stat().st_size < fp32.stat().st_size


def test_onnx_export_matches_pytorch_in_a_session_run_here(tiny_run):
    # Outside reference: an ONNX Runtime session opened by this test, against the PyTorch student's own
    # forward pass on fresh texts (not the step's recorded parity). 1e-4 on logits is common practice for
    # fp32 export parity.
    import onnxruntime as ort
    import torch
    from transformers import AutoModelForSequenceClassification, AutoTokenizer

    tok = AutoTokenizer.from_pretrained(tiny_run / "student")
    model = AutoModelForSequenceClassification.from_pretrained(tiny_run / "student").eval()
    texts = ["refund my invoice please", "router offline since morning", "locked out of my account again today"]
    enc = tok(texts, padding=True, return_tensors="np")
    sess = ort.InferenceSession(str(tiny_run / "student-onnx" / "model.onnx"), providers=["CPUExecutionProvider"])
    feed = {i.name: enc[i.name].astype(np.int64) for i in sess.get_inputs()}
    onnx_logits = sess.run(None, feed)[0]
    with torch.no_grad():
        torch_logits = model(**{k: torch.from_numpy(v) for k, v in enc.items()}).logits.numpy()
    assert np.abs(onnx_logits - torch_logits).max() <= 1e-4
    assert (onnx_logits.argmax(1) == torch_logits.argmax(1)).all()


def test_student_keeps_the_chosen_number_of_layers(tiny_run):
    cfg = json.loads((tiny_run / "student" / "config.json").read_text())
    assert cfg["num_hidden_layers"] == 2


def test_rerun_reuses_finished_steps(tiny_run_copy, tiny_base, keyword_csv, tmp_path):
    from shrinkwrap.chain.runner import run_chain
    from shrinkwrap.recipe.schema import load_recipe

    before = {s: (tiny_run_copy / s / "step.json").stat().st_mtime_ns for s in STEPS}
    recipe = load_recipe(write_recipe(tmp_path / "r.yaml", tiny_recipe(tiny_base, keyword_csv)))
    run_chain(recipe, tiny_run_copy, quiet=True)
    after = {s: (tiny_run_copy / s / "step.json").stat().st_mtime_ns for s in STEPS}
    assert before == after


def test_changed_student_section_reruns_student_and_later_steps_only(tiny_run_copy, tiny_base, keyword_csv, tmp_path):
    from shrinkwrap.chain.runner import run_chain
    from shrinkwrap.recipe.schema import load_recipe

    before = {s: json.loads((tiny_run_copy / s / "step.json").read_text())["fingerprint"] for s in STEPS}
    recipe = load_recipe(write_recipe(tmp_path / "r.yaml", tiny_recipe(tiny_base, keyword_csv)),
                         ["student.temperature=3.0"])
    run_chain(recipe, tiny_run_copy, quiet=True)
    after = {s: json.loads((tiny_run_copy / s / "step.json").read_text())["fingerprint"] for s in STEPS}
    assert before["teacher"] == after["teacher"]
    assert all(before[s] != after[s] for s in STEPS[1:])


def test_cli_bad_recipe_exits_2_with_one_line(tmp_path, tiny_base, keyword_csv):
    recipe = tiny_recipe(tiny_base, keyword_csv)
    recipe["student"]["alpha"] = 1.5
    path = write_recipe(tmp_path / "bad.yaml", recipe)
    out = tmp_path / "out"
    proc = subprocess.run([sys.executable, "-m", "shrinkwrap", "run", str(path), "--out", str(out)],
                          capture_output=True, text=True)
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "student.alpha = 1.5" in lines[0]
    assert not out.exists()
