"""`shrinkwrap bench` on every kind of target the tiny run leaves, on a bare encoder, and on bad input."""
import csv
import json
import shutil
import subprocess
import sys
import warnings
from pathlib import Path

import pytest
from conftest import ROOT

from shrinkwrap.cli import main

FAST = ["--warmup", "1", "--warm-seconds", "0", "--repeats", "5", "--timed-seconds", "0", "--threads", "1"]
STEPS = ["teacher", "student", "student-int8", "student-onnx", "student-onnx-int8"]


def bench_json(capsys, *args) -> dict:
    assert main(["bench", *map(str, args), *FAST, "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def run_cli(*args):
    return subprocess.run([sys.executable, "-m", "shrinkwrap", "bench", *map(str, args), *FAST],
                          capture_output=True, text=True, cwd=ROOT, timeout=120)


@pytest.fixture(scope="module")
def bare_encoder(tiny_base, tmp_path_factory) -> Path:
    """tiny_base exported as a feature extractor (no head), then copied alone: no tokenizer, no config."""
    from optimum.exporters.onnx import onnx_export_from_model
    from transformers import AutoModel

    export = tmp_path_factory.mktemp("encoder-export")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        onnx_export_from_model(AutoModel.from_pretrained(tiny_base), str(export), task="feature-extraction",
                               opset=17, do_validation=False)
    bare = tmp_path_factory.mktemp("bare") / "encoder.onnx"
    shutil.copy(export / "model.onnx", bare)
    return bare


@pytest.fixture(scope="module")
def test_csv(tiny_run, tmp_path_factory) -> Path:
    """The tiny run's own test split, written as a table."""
    from shrinkwrap.ml.data import load_dataset
    from shrinkwrap.recipe.schema import load_recipe

    recipe = load_recipe(tiny_run.parent / "recipe.yaml")
    data = load_dataset(recipe.data, recipe.resolve(recipe.data.path), "data")
    path = tmp_path_factory.mktemp("bench-data") / "test.csv"
    with open(path, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(["text", "label"])
        w.writerows((t, data.label_names[i]) for t, i in zip(data.test.texts, data.test.labels))
    return path


def check_row(row: dict, batch: int, length) -> None:
    assert (row["batch_size"], row["sequence_length"]) == (batch, length)
    assert 0 < row["min"] <= row["p50"] <= row["p90"] <= row["p95"] <= row["p99"] <= row["max"]
    assert row["mean_ci95"][0] <= row["mean"] <= row["mean_ci95"][1] and row["n"] >= 5
    assert row["throughput_per_s"] == pytest.approx(batch * 1000 / row["mean"])
    assert row["reference_ms"] > 0
    assert row["p95_over_reference"] == pytest.approx(row["p95"] / row["reference_ms"])
    assert row["p50_over_reference"] == pytest.approx(row["p50"] / row["reference_ms"])


def check_common(r: dict) -> None:
    assert r["size_bytes"] == sum(Path(f).stat().st_size for f in r["files"]) > 0
    assert r["load_seconds"] > 0
    m = r["memory"]
    assert m["peak_rss_bytes"] >= m["rss_before_load_bytes"] > 0 and m["method"]
    assert r["machine"]["cpu"] and r["machine"]["versions"]["onnxruntime"]
    assert r["protocol"]["threads"] == 1 and r["reference"]["workload"]


def test_transformers_folder_grid(tiny_run, capsys):
    r = bench_json(capsys, tiny_run / "teacher", "--batch-size", 1, 4, "--sequence-length", 16, 64)
    assert r["format"] == "pytorch"
    check_common(r)
    assert len(r["latency"]) == 4   # one row per (batch, length)
    for row, (b, n) in zip(r["latency"], [(1, 16), (1, 64), (4, 16), (4, 64)]):
        check_row(row, b, n)
    assert "metrics" not in r


def test_bare_onnx_with_head(tiny_run, capsys):
    path = tiny_run / "student-onnx-int8" / "model.onnx"
    r = bench_json(capsys, path, "--sequence-length", 32)
    assert r["format"] == "onnx" and r["size_bytes"] == path.stat().st_size
    check_common(r)
    check_row(r["latency"][0], 1, 32)


def test_bare_encoder_without_head_or_tokenizer(bare_encoder, capsys):
    r = bench_json(capsys, bare_encoder, "--batch-size", 2, "--sequence-length", 8, 32)
    check_common(r)
    assert r["input_names"] == ["input_ids", "attention_mask", "token_type_ids"]
    assert [(x["batch_size"], x["sequence_length"]) for x in r["latency"]] == [(2, 8), (2, 32)]
    for row in r["latency"]:
        check_row(row, row["batch_size"], row["sequence_length"])


def test_vocabulary_read_from_the_graph(bare_encoder, tiny_base, tiny_run):
    from shrinkwrap.bench.targets import onnx_embedding_rows

    vocab = json.loads((tiny_base / "config.json").read_text())["vocab_size"]
    assert onnx_embedding_rows(bare_encoder) == (vocab, None)                  # plain Gather
    fused = onnx_embedding_rows(tiny_run / "student-onnx" / "model.onnx")     # EmbedLayerNormalization
    assert fused == (vocab, 128)
    # the shipped int8 graph is fused without attention, so its lookups stay Gathers (no positions read), of
    # int8 tables reached through their dequantisation
    assert onnx_embedding_rows(tiny_run / "student-onnx-int8" / "model.onnx") == (vocab, None)


@pytest.mark.parametrize("step", STEPS)
def test_data_accuracy_equals_the_runs(step, tiny_run, test_csv, capsys):
    results = json.loads((tiny_run / "results.json").read_text())
    recorded = next(s for s in results["steps"] if s["name"] == step)
    r = bench_json(capsys, tiny_run / step, "--data", test_csv, "--max-length", 32, "--sequence-length", 32, "real")
    assert r["metrics"]["accuracy"] == recorded["metrics"]["accuracy"]
    assert r["metrics"]["confusion"] == recorded["metrics"]["confusion"]
    assert r["data"]["rows"] == len(results["test_labels"])
    real = r["latency"][1]
    assert real["sequence_length"] == "real" and 2 < real["mean_tokens"] <= 32


def test_runner_steps_carry_the_same_figures(tiny_run):
    # The per-step benchmark goes through the same code: a measured reference and memory on every step (the
    # ratio itself is checked hand-worked in test_latency.test_normalised_keys).
    for s in json.loads((tiny_run / "results.json").read_text())["steps"]:
        lat = s["latency_ms"]
        assert lat["reference_ms"] > 0 and 0 < lat["p50"] <= lat["p95"]
        assert {"p50_over_reference", "p95_over_reference"} <= set(lat)


def test_out_file_matches_stdout(tiny_run, tmp_path, capsys):
    out = tmp_path / "bench.json"
    r = bench_json(capsys, tiny_run / "student-onnx", "--sequence-length", 16, "--out", out)
    assert json.loads(out.read_text()) == r


def test_table_output(tiny_run, capsys):
    assert main(["bench", str(tiny_run / "student-onnx"), *FAST, "--batch-size", "1", "2",
                 "--sequence-length", "16"]) == 0
    out = capsys.readouterr().out
    rows = [line for line in out.splitlines() if line.startswith("| ") and "batch" not in line]
    assert [line.split("|")[1].strip() for line in rows] == ["1", "2"]
    assert "reference:" in out and "machine:" in out


def one_line_exit_2(proc) -> str:
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), proc.stderr
    assert proc.stdout == ""
    return lines[0]


def test_missing_target(tmp_path):
    assert "no such file or folder" in one_line_exit_2(run_cli(tmp_path / "nothing"))


def test_text_file_is_not_a_target(tmp_path):
    path = tmp_path / "model.txt"
    path.write_text("hello")
    assert "not a benchmark target" in one_line_exit_2(run_cli(path))


def test_data_without_label_column(tiny_run, tmp_path):
    path = tmp_path / "texts.csv"
    path.write_text("text\nmy router is offline\n")
    line = one_line_exit_2(run_cli(tiny_run / "student-onnx", "--data", path))
    assert "--label 'label' is not a column" in line and "columns: text" in line


def test_unknown_label(tiny_run, tmp_path):
    path = tmp_path / "t.csv"
    path.write_text("text,label\nmy router is offline,outage\nwhere is my parcel,shipping\n")
    out = tmp_path / "r.json"
    line = one_line_exit_2(run_cli(tiny_run / "student-onnx-int8", "--data", path, "--out", out))
    assert "'shipping' (data row 2)" in line and "login, outage, refund" in line
    assert not out.exists()


def in_process_exit_2(capsys, *args) -> str:
    # Same checks as one_line_exit_2, in this process: the subprocess start is the slow part.
    assert main(["bench", *map(str, args), *FAST]) == 2
    captured = capsys.readouterr()
    lines = captured.err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and captured.out == "", captured.err
    return lines[0]


def test_encoder_without_labels_refuses_data(bare_encoder, test_csv, capsys):
    assert "no label names" in in_process_exit_2(capsys, bare_encoder, "--data", test_csv)


def test_real_lengths_need_data(tiny_run, capsys):
    assert "needs --data" in in_process_exit_2(capsys, tiny_run / "student-onnx", "--sequence-length", "real")


def test_length_beyond_the_model(tiny_run, capsys):
    line = in_process_exit_2(capsys, tiny_run / "student-onnx", "--sequence-length", "32", "512")
    assert "takes at most 128 tokens" in line


def test_bad_out_path_fails_before_measuring(tiny_run, tmp_path, capsys):
    line = in_process_exit_2(capsys, tiny_run / "student-onnx", "--out", tmp_path / "missing" / "r.json")
    assert "--out" in line and not (tmp_path / "missing").exists()
