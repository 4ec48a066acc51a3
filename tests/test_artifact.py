"""The artifact folder: what `shrinkwrap run` and `shrinkwrap package` write, and that it is checked."""
import hashlib
import json
import shutil
import subprocess
import sys

import numpy as np
import onnx
import pytest
import yaml
from conftest import keyword_rows, write_csv

FILES = {"model.onnx", "tokenizer.json", "labels.json", "manifest.json", "README.md", "config.json"}


def _cli(*args, stdin=None):
    return subprocess.run([sys.executable, "-m", "shrinkwrap", *map(str, args)], capture_output=True, text=True,
                          input=stdin)


def _package(capsys, *args):
    """`shrinkwrap package` in this process (torch is imported once, not per call): (exit code, stdout, stderr)."""
    from shrinkwrap.cli import main

    capsys.readouterr()
    code = main(["package", *map(str, args)])
    out, err = capsys.readouterr()
    return code, out, err


def test_run_writes_artifact_with_complete_manifest(tiny_run):
    art = tiny_run / "artifact"
    results = json.loads((tiny_run / "results.json").read_text())
    manifest = json.loads((art / "manifest.json").read_text())
    assert FILES <= {p.name for p in art.iterdir()}
    assert results["artifact"]["path"] == str(art)
    # Every file but the manifest is listed, with the sha256 (hashlib) and size it has on disk.
    on_disk = {p.name for p in art.iterdir() if p.is_file()} - {"manifest.json"}
    assert set(manifest["files"]) == on_disk
    for name, entry in manifest["files"].items():
        data = (art / name).read_bytes()
        assert entry == {"sha256": hashlib.sha256(data).hexdigest(), "bytes": len(data)}
    # The model is the final step's, byte for byte, and a valid graph (onnx.checker).
    final = results["steps"][-1]
    assert (art / "model.onnx").read_bytes() == (tiny_run / final["name"] / "model.onnx").read_bytes()
    onnx.checker.check_model(str(art / "model.onnx"), full_check=True)
    graph = onnx.load(str(art / "model.onnx"))
    assert manifest["model"]["opset"] == results["recipe"]["export"]["opset"]
    assert manifest["model"]["inputs"] == [i.name for i in graph.graph.input]
    assert manifest["model"]["outputs"] == [o.name for o in graph.graph.output]
    assert manifest["tokenizer"]["fingerprint"] == results["tokenizer_fingerprint"]
    assert manifest["tokenizer"]["max_length"] == results["recipe"]["teacher"]["max_length"]
    assert manifest["recipe_fingerprint"] == results["recipe_fingerprint"]
    assert manifest["model"]["precision"] == "int8" and manifest["model"]["embeddings_int8"] is True
    assert manifest["model"]["graph"] == final["info"]["graph"] == "plain"  # per-row int8's graph
    assert json.loads((art / "labels.json").read_text()) == results["data"]["label_names"]
    m = manifest["metrics"]
    assert m["step"] == final["name"] and m["accuracy"] == final["metrics"]["accuracy"]
    assert m["per_class"] == final["metrics"]["per_class"]
    assert m["agreement_with_fp32"] == final["info"]["agreement_with_fp32"] == final["agreement_with_fp32"]
    # ...and it is the share of the accuracy pass's own test predictions that the fp32 graph's match.
    fp32 = next(s for s in results["steps"] if s["name"] == "student-onnx")
    same = np.mean(np.array(fp32["predictions"]) == np.array(final["predictions"]))
    assert final["agreement_with_fp32"] == pytest.approx(same, abs=1e-12)
    assert {"onnxruntime", "tokenizers", "numpy", "torch"} <= set(manifest["versions"])
    assert not list(tiny_run.glob(".partial-*")) and not list(tiny_run.glob(".old-*"))


def test_model_card_has_front_matter_per_step_and_per_class_figures(tiny_run):
    card = (tiny_run / "artifact" / "README.md").read_text()
    results = json.loads((tiny_run / "results.json").read_text())
    assert card.startswith("---\n")
    meta = yaml.safe_load(card.split("---\n")[1])
    assert meta["pipeline_tag"] == "text-classification" and meta["library_name"] == "onnxruntime"
    reported = meta["model-index"][0]["results"][0]["metrics"]
    assert reported[0] == {"type": "accuracy", "value": round(results["steps"][-1]["metrics"]["accuracy"], 4)}
    for s in results["steps"]:  # one row per step, as in report.md
        assert f"| {s['name']} |" in card
    for i, name in enumerate(results["data"]["label_names"]):
        recall = results["steps"][-1]["metrics"]["per_class"]["recall"][i]
        assert f"| {name} |" in card and f"{recall:.3f}" in card
    assert "An average can hide a class that got worse" in card
    for section in ("## Intended use", "## Data", "## Limitations", "## How to use"):
        assert section in card


def test_package_transformers_folder_with_data(tiny_run, keyword_csv, tmp_path, capsys):
    out = tmp_path / "art"
    code, stdout, stderr = _package(capsys, tiny_run / "student", "--out", out, "--data", keyword_csv, "--json")
    assert code == 0, stderr
    manifest = json.loads(stdout)
    onnx.checker.check_model(str(out / "model.onnx"), full_check=True)
    model = manifest["model"]
    assert model["converted"] and model["precision"] == "int8" and model["embeddings_int8"]
    # Export parity against PyTorch, as in the chain (1e-4, same labels).
    assert model["parity"]["max_abs_logit_diff"] <= 1e-4 and model["parity"]["label_mismatches"] == 0
    assert 0 <= model["agreement_with_fp32"] <= 1
    assert manifest["recipe_fingerprint"] is None and manifest["source"]["kind"] == "folder"
    # Metrics measured through the artifact on all 180 rows agree with predict on the same texts.
    rows = keyword_rows()
    m = manifest["metrics"]
    assert m["texts"] == len(rows) and sum(m["per_class"]["support"]) == len(rows)
    pred = _cli("predict", out, stdin="\n".join(t for t, _ in rows) + "\n")
    labels = [json.loads(line)["label"] for line in pred.stdout.splitlines()]
    assert np.isclose(m["accuracy"], np.mean([p == y for p, (_, y) in zip(labels, rows)]))
    card = (out / "README.md").read_text()
    assert card.startswith("---\n") and "An average can hide a class that got worse" in card
    # The rows given are not known to be held out: one caution line on stderr, in the manifest and the card.
    caution = manifest["data"]["caution"]
    assert f"on the {len(rows)} rows given with --data" in caution and "not a held-out figure" in caution
    assert [line for line in stderr.splitlines() if line.startswith("caution:")] == [f"caution: {caution}"]
    assert f"**Caution.** The accuracy is measured on the {len(rows)} rows given with --data" in card


def test_package_fp32_and_onnx_folder(tiny_run, tmp_path, capsys):
    fp32 = tmp_path / "fp32"
    code, _, stderr = _package(capsys, tiny_run / "student", "--out", fp32, "--no-int8")
    assert code == 0 and "caution:" not in stderr   # nothing measured, nothing to caution about
    manifest = json.loads((fp32 / "manifest.json").read_text())
    assert manifest["model"]["precision"] == "fp32" and "metrics" not in manifest
    assert "None recorded" in (fp32 / "README.md").read_text()
    # A folder already holding model.onnx is packaged as it is.
    as_is = tmp_path / "as-is"
    assert _package(capsys, tiny_run / "student-onnx-int8", "--out", as_is)[0] == 0
    assert (as_is / "model.onnx").read_bytes() == (tiny_run / "student-onnx-int8" / "model.onnx").read_bytes()
    # Packaging again over an artifact replaces it.
    assert _package(capsys, tiny_run / "student-onnx", "--out", as_is)[0] == 0
    assert (as_is / "model.onnx").read_bytes() == (tiny_run / "student-onnx" / "model.onnx").read_bytes()


@pytest.mark.parametrize("case", ["not-a-model", "busy-out", "bad-opset", "unknown-label"])
def test_package_bad_input_exits_2_with_one_line_and_writes_nothing(case, tiny_run, tmp_path, capsys):
    out = tmp_path / "art"
    model = tiny_run / "student"
    extra = []
    if case == "not-a-model":
        model = tmp_path / "empty"
        model.mkdir()
    elif case == "busy-out":
        out.mkdir()
        (out / "notes.txt").write_text("mine")
    elif case == "bad-opset":
        extra = ["--opset", "9"]
    else:
        extra = ["--data", write_csv(tmp_path / "d.csv", [("my router is offline", "weather")])]
    code, _, stderr = _package(capsys, model, "--out", out, *extra)
    assert code == 2, stderr
    lines = stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error:")
    if case == "busy-out":
        assert [p.name for p in out.iterdir()] == ["notes.txt"]
    else:
        assert not out.exists()
    assert not list(tmp_path.glob(".partial-*"))


def test_bench_target_loads_artifact_and_refuses_a_tampered_one(tiny_run, tmp_path):
    from shrinkwrap.bench.targets import load_target
    from shrinkwrap.serve.errors import UserError

    results = json.loads((tiny_run / "results.json").read_text())
    target = load_target(tiny_run / "artifact", threads=1)
    assert target.format == "onnx" and target.label_names == results["data"]["label_names"]
    assert target.max_length == results["recipe"]["teacher"]["max_length"]
    assert target.tokenizer_dir == tiny_run / "artifact"
    ids = np.array([[101, 2026, 2799, 102]], dtype=np.int64)
    assert target.outputs({"input_ids": ids, "attention_mask": np.ones_like(ids),
                          "token_type_ids": np.zeros_like(ids)}).shape == (1, len(target.label_names))
    target.release()
    art = tmp_path / "art"
    shutil.copytree(tiny_run / "artifact", art)
    labels = art / "labels.json"
    labels.write_text(labels.read_text().replace(results["data"]["label_names"][0], "x"))
    with pytest.raises(UserError, match="labels.json"):
        load_target(art)


def test_model_card_has_per_class_change_with_counts_and_calibration(tiny_run):
    from shrinkwrap.outputs.classification import class_changes

    card = (tiny_run / "artifact" / "README.md").read_text()
    results = json.loads((tiny_run / "results.json").read_text())
    final, teacher = results["steps"][-1], results["steps"][0]
    assert f"## Per-class precision and recall of `{final['name']}` (change vs `{teacher['name']}`, points)" in card
    ref, m = teacher["metrics"]["per_class"], final["metrics"]["per_class"]
    for i, name in enumerate(results["data"]["label_names"]):
        n = ref["support"][i]
        lost = round((ref["recall"][i] - m["recall"][i]) * n)   # texts the teacher got right and the student not, net
        texts = (f"lost {lost} of {n} texts" if lost > 0 else f"gained {-lost} of {n} texts" if lost < 0
                 else f"none of {n} texts lost")
        row = (f"| {name} | {n} | {m['precision'][i]:.3f} ({(m['precision'][i] - ref['precision'][i]) * 100:+.1f}) | "
               f"{m['recall'][i]:.3f} ({(m['recall'][i] - ref['recall'][i]) * 100:+.1f}) | {texts} |")
        assert row in card, row
        assert class_changes(results, final)[i]["lost"] == lost
    cal = final["calibration"]
    manifest = json.loads((tiny_run / "artifact" / "manifest.json").read_text())
    assert manifest["calibration"]["temperature"] == cal["temperature"]
    assert f"Temperature {cal['temperature']:.3f}" in card
    assert f"before → after: {cal['ece_raw']:.4f} → {cal['ece']:.4f}" in card
    assert "not calibrated probabilities" not in card
