"""What the command line does beyond the happy path of each command: `run --json`, a step failing (exit 3), a bug
(exit 4), an interrupt (exit 130), `bench --text-pair`, and `package`'s options each changing what it writes."""
from __future__ import annotations

import json
import os
import select
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import onnx
import pytest
from conftest import keyword_rows, tiny_recipe, write_csv, write_recipe

from shrinkwrap.cli import main


def _cli(*args, **kw):
    return subprocess.run([sys.executable, "-m", "shrinkwrap", *map(str, args)], capture_output=True, text=True,
                          env=os.environ | {"OMP_NUM_THREADS": "1"}, **kw)


def test_run_json_prints_exactly_results_json(tiny_run, tiny_run_copy, capsys):
    capsys.readouterr()
    assert main(["run", str(tiny_run.parent / "recipe.yaml"), "--out", str(tiny_run_copy), "--json"]) == 0
    out, err = capsys.readouterr()
    assert json.loads(out) == json.loads((tiny_run_copy / "results.json").read_text())
    assert not [line for line in err.splitlines() if line.startswith("[")]   # no progress lines with --json


def test_a_failing_step_is_exit_3_and_leaves_no_half_step(tmp_path, tiny_base, keyword_csv):
    # The loss cannot fall by 99 % in 3 steps: every seed is degenerate and the teacher step fails.
    recipe = tiny_recipe(tiny_base, keyword_csv, teacher={"stall_steps": 3, "stall_fraction": 0.99, "seeds": [0, 1]})
    out = tmp_path / "run"
    r = _cli("run", write_recipe(tmp_path / "r.yaml", recipe), "--out", out)
    assert r.returncode == 3, r.stderr[-2000:]
    last = r.stderr.strip().splitlines()[-1]
    assert last.startswith("step failed: teacher: every seed degenerated") and "seed 0" in last and "seed 1" in last
    assert "Traceback" not in r.stderr
    assert not (out / "teacher" / "step.json").exists() and not (out / "results.json").exists()


def test_a_bug_is_exit_4_with_one_line_and_the_traceback_in_a_file(tiny_run, tmp_path, monkeypatch, capsys):
    import tempfile

    import shrinkwrap.outputs.report as report

    def broken(*args, **kwargs):
        return 1 / 0

    monkeypatch.setattr(report, "report_from_file", broken)
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    capsys.readouterr()
    assert main(["report", str(tiny_run / "results.json"), "--out", str(tmp_path / "r")]) == 4
    out, err = capsys.readouterr()
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err, err
    assert lines[0].startswith("internal error: ZeroDivisionError: division by zero (at ")
    written = Path(lines[0].split("traceback written to ")[1].split(";")[0])
    assert written.parent == tmp_path and "Traceback (most recent call last)" in written.read_text()
    assert "in broken" in written.read_text()


def test_an_interrupt_is_exit_130_and_the_rerun_resumes(tmp_path, tiny_base, keyword_csv):
    recipe = write_recipe(tmp_path / "r.yaml", tiny_recipe(tiny_base, keyword_csv, teacher={"epochs": 400, "patience": 400}))
    out = tmp_path / "run"
    p = subprocess.Popen([sys.executable, "-m", "shrinkwrap", "run", str(recipe), "--out", str(out)],
                         stderr=subprocess.PIPE, env=os.environ | {"OMP_NUM_THREADS": "1"})
    seen, deadline = b"", time.time() + 120
    while b"teacher seed 0" not in seen and time.time() < deadline:   # training has started
        if select.select([p.stderr], [], [], 1)[0]:
            seen += os.read(p.stderr.fileno(), 65536)
    assert b"teacher seed 0" in seen, seen[-2000:]
    p.send_signal(signal.SIGINT)
    rest = p.stderr.read()
    assert p.wait(60) == 130
    assert b"interrupted: finished steps are kept" in rest and b"Traceback" not in rest
    assert not (out / "teacher" / "step.json").exists()


def test_bench_text_pair_reads_both_columns(tmp_path, tiny_base):
    """Accuracy of a pair model benched with --text-pair, against the model run by the test itself (transformers'
    tokenizer on (subject, body), torch forward, sklearn's accuracy_score)."""
    import torch
    from sklearn.metrics import accuracy_score
    from transformers import AutoModelForSequenceClassification, AutoTokenizer

    from shrinkwrap.chain.runner import run_chain
    from shrinkwrap.recipe.schema import load_recipe

    rows = [(t.split()[0], " ".join(t.split()[1:]), y) for t, y in keyword_rows(120)]
    data = write_csv(tmp_path / "pairs.csv", rows, header=("subject", "body", "label"))
    recipe = tiny_recipe(tiny_base, data)
    recipe["data"].update(text="subject", text_pair="body")
    run_chain(load_recipe(write_recipe(tmp_path / "r.yaml", recipe)), tmp_path / "run", quiet=True, until="teacher")
    teacher = tmp_path / "run" / "teacher"
    r = _cli("bench", teacher, "--data", data, "--text", "subject", "--text-pair", "body", "--max-length", 32,
             "--repeats", 3, "--sequence-length", 16, "--json")
    assert r.returncode == 0, r.stderr[-2000:]
    got = json.loads(r.stdout)["metrics"]["accuracy"]
    tok = AutoTokenizer.from_pretrained(teacher)
    model = AutoModelForSequenceClassification.from_pretrained(teacher).eval()
    enc = tok([s for s, _, _ in rows], [b for _, b, _ in rows], truncation=True, max_length=32, padding=True,
              return_tensors="pt")
    with torch.no_grad():
        pred = model(**enc).logits.argmax(-1).tolist()
    names = [model.config.id2label[i] for i in pred]
    assert got == pytest.approx(accuracy_score([y for _, _, y in rows], names), abs=1e-4)
    # Without --text-pair the body is not read: the same model sees only the one-word subjects.
    r1 = _cli("bench", teacher, "--data", data, "--text", "subject", "--max-length", 32, "--repeats", 3,
              "--sequence-length", 16, "--json")
    assert r1.returncode == 0 and json.loads(r1.stdout)["metrics"]["accuracy"] != got


def _ops(path: Path) -> set[str]:
    return {n.op_type for n in onnx.load(str(path)).graph.node}


INT8_PRODUCTS = {"MatMulInteger", "MatMulIntegerToFloat"}   # ONNX's integer product and ONNX Runtime's fused one


def test_package_options_change_what_is_written(tiny_run, tmp_path, capsys):
    # Columns of our own naming, so --text and --label must be read to measure anything.
    rows = keyword_rows(60, seed=3)
    data = write_csv(tmp_path / "d.csv", rows, header=("message", "queue"))
    out = tmp_path / "a"
    capsys.readouterr()
    code = main(["package", str(tiny_run / "student"), "--out", str(out), "--data", str(data), "--text", "message",
                 "--label", "queue", "--max-length", "16", "--opset", "17", "--json"])
    stdout, stderr = capsys.readouterr()
    assert code == 0, stderr
    manifest = json.loads(stdout)
    assert manifest == json.loads((out / "manifest.json").read_text())       # --json prints the manifest
    model = onnx.load(str(out / "model.onnx"))
    assert {o.version for o in model.opset_import if o.domain in ("", "ai.onnx")} == {17}   # --opset (onnx)
    assert manifest["tokenizer"]["max_length"] == 16 and manifest["metrics"]["texts"] == len(rows)
    # per-channel by default: the int8 weights carry one scale per output column (onnx initialisers read
    # directly); --no-per-channel gives one scale per tensor
    def weight_scales(model):
        init = {i.name: i for i in model.graph.initializer}
        return [init[n.input[1].removesuffix("_quantized") + "_scale"] for n in model.graph.node
                if n.op_type in INT8_PRODUCTS and n.input[1].removesuffix("_quantized") + "_scale" in init]
    assert weight_scales(model) and all(len(s.dims) == 1 and s.dims[0] > 1 for s in weight_scales(model))
    assert manifest["model"]["quantization"]["per_channel"] is True
    per_tensor = tmp_path / "per-tensor"
    assert main(["package", str(tiny_run / "student"), "--out", str(per_tensor), "--no-per-channel"]) == 0
    scales = weight_scales(onnx.load(str(per_tensor / "model.onnx")))
    assert scales and all(np.prod(s.dims, dtype=int) == 1 for s in scales)
    # --max-length 16: a long text is cut at 16 tokens (the tokenizer saved in the artifact, run by the test)
    from tokenizers import Tokenizer

    long_text = " ".join(["refund"] * 50)
    pred = _cli("predict", out, long_text)
    assert pred.returncode == 0 and json.loads(pred.stdout)["truncated"] is True
    tok = Tokenizer.from_file(str(out / "tokenizer.json"))
    tok.no_truncation()
    per_word = len(tok.encode("refund", add_special_tokens=False).ids)
    assert len(tok.encode(long_text).ids) == 2 + 50 * per_word > 16     # [CLS] + the pieces + [SEP]: the cut is real
    # --no-int8 keeps fp32 matrix products; the default quantises them
    fp32 = tmp_path / "fp32"
    assert main(["package", str(tiny_run / "student"), "--out", str(fp32), "--no-int8"]) == 0
    assert not INT8_PRODUCTS & _ops(fp32 / "model.onnx") and INT8_PRODUCTS & _ops(out / "model.onnx")
    accuracy = np.mean([json.loads(line)["label"] == y for line, (_, y) in zip(
        _cli("predict", out, "--file", _lines(tmp_path, rows)).stdout.splitlines(), rows)])
    assert manifest["metrics"]["accuracy"] == pytest.approx(accuracy, abs=1e-4)


def _lines(folder: Path, rows) -> Path:
    path = folder / "texts.txt"
    path.write_text("\n".join(t for t, _ in rows) + "\n", encoding="utf-8")
    return path
