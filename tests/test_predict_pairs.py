"""Sentence pairs end to end: a pair artifact predicts JSON lines and CSV/TSV pairs exactly as the chain
recorded, and single texts and pairs are refused where they do not fit, naming the line."""
from __future__ import annotations

import csv
import json
import subprocess
import sys

import pytest
from conftest import keyword_rows, tiny_recipe, write_csv, write_recipe


def _predict(*args, stdin=None):
    return subprocess.run([sys.executable, "-m", "shrinkwrap", "predict", *map(str, args)], capture_output=True,
                          text=True, input=stdin)


@pytest.fixture(scope="module")
def pair_run(tmp_path_factory, tiny_base):
    """A whole chain on pairs (first word, rest of the message): its artifact and the test pairs."""
    from shrinkwrap.chain.pipeline import run_recipe
    from shrinkwrap.ml.data import load_dataset
    from shrinkwrap.recipe.schema import load_recipe

    folder = tmp_path_factory.mktemp("pairs")
    rows = [(t.split()[0], " ".join(t.split()[1:]), y) for t, y in keyword_rows(150)]
    data = write_csv(folder / "pairs.csv", rows, header=("subject", "body", "label"))
    raw = tiny_recipe(tiny_base, data, student={"epochs": 1}, teacher={"epochs": 6})
    raw["data"].update(text="subject", text_pair="body")
    recipe = load_recipe(write_recipe(folder / "r.yaml", raw))
    run_recipe(recipe, folder / "run", quiet=True)
    test = load_dataset(recipe.data, recipe.resolve(recipe.data.path), "test").test
    return folder / "run", test


def test_pair_predictions_equal_the_chain_s_by_json_lines_and_csv(pair_run, tmp_path):
    run, test = pair_run
    results = json.loads((run / "results.json").read_text())
    manifest = json.loads((run / "artifact" / "manifest.json").read_text())
    assert manifest["tokenizer"]["text_pair"] is True
    names = results["data"]["label_names"]
    want = [names[i] for i in results["steps"][-1]["predictions"]]

    jsonl = tmp_path / "pairs.jsonl"
    jsonl.write_text("".join(json.dumps({"text": a, "text_pair": b}) + "\n" for a, b in zip(test.texts, test.pairs)))
    proc = _predict(run / "artifact", "--file", jsonl)
    assert proc.returncode == 0, proc.stderr
    rows = [json.loads(x) for x in proc.stdout.splitlines()]
    assert [(r["text"], r["text_pair"]) for r in rows] == list(zip(test.texts, test.pairs))
    assert [r["label"] for r in rows] == want

    tsv = tmp_path / "pairs.tsv"
    with open(tsv, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f, delimiter="\t")
        w.writerow(["id", "subject", "body"])
        w.writerows([i, a, b] for i, (a, b) in enumerate(zip(test.texts, test.pairs)))
    proc = _predict(run / "artifact", "--file", tsv, "--text", "subject", "--text-pair", "body")
    assert proc.returncode == 0, proc.stderr
    assert [json.loads(x)["label"] for x in proc.stdout.splitlines()] == want


def test_single_texts_to_a_pair_artifact_are_refused_naming_the_line(pair_run, tmp_path):
    run, test = pair_run
    jsonl = tmp_path / "mixed.jsonl"
    jsonl.write_text(json.dumps({"text": "a", "text_pair": "b"}) + "\n" + json.dumps({"text": "only one"}) + "\n")
    for args in (["--file", jsonl], ["my router is offline"]):
        proc = _predict(run / "artifact", *args)
        assert proc.returncode == 2 and proc.stdout == ""
        line = proc.stderr.strip()
        assert len(line.splitlines()) == 1 and "classifies pairs of texts" in line
    assert "line 2 is a single text" in _predict(run / "artifact", "--file", jsonl).stderr
    assert "stdin: line 1 is not a JSON object" in _predict(run / "artifact", stdin="just text\n").stderr


def test_pairs_to_a_single_text_artifact_are_refused_naming_the_line(tiny_run, tmp_path):
    jsonl = tmp_path / "p.jsonl"
    jsonl.write_text(json.dumps({"text": "refund please"}) + "\n" + json.dumps({"text": "x", "text_pair": "y"}) + "\n")
    proc = _predict(tiny_run / "artifact", "--file", jsonl)
    assert proc.returncode == 2 and proc.stdout == ""
    assert proc.stderr.strip().endswith("line 2 gives a text_pair, but this model classifies single texts")
    single = tmp_path / "s.jsonl"
    single.write_text(json.dumps({"text": "refund please"}) + "\n")
    assert _predict(tiny_run / "artifact", "--file", single).returncode == 0
    assert _predict(tiny_run / "artifact", "--file", single, "--text-pair", "b").returncode == 2


def test_serve_answers_pairs_as_predict_does_and_refuses_single_texts(pair_run):
    """A pair artifact over real HTTP on 127.0.0.1: texts with text_pairs get predict's rows; texts alone a 400."""
    import http.client

    from shrinkwrap.bench.capacity import Server

    run, test = pair_run
    want = [json.loads(x) for x in _predict(run / "artifact", "--file", _jsonl(run.parent, test)).stdout.splitlines()]
    server = Server(str(run / "artifact"), ["--workers", "1"])
    try:
        def post(body):
            conn = http.client.HTTPConnection("127.0.0.1", server.port, timeout=60)
            conn.request("POST", "/predict", body=json.dumps(body).encode())
            r = conn.getresponse()
            return r.status, json.loads(r.read())

        got = []
        for start in range(0, len(test.texts), 16):   # --max-batch texts per request at most
            status, body = post({"texts": test.texts[start:start + 16], "text_pairs": test.pairs[start:start + 16]})
            assert status == 200
            got += body["predictions"]
        assert [(r["text"], r["text_pair"], r["label"]) for r in got] == \
               [(r["text"], r["text_pair"], r["label"]) for r in want]
        assert max(abs(g["scores"][k] - w["scores"][k]) for g, w in zip(got, want) for k in w["scores"]) <= 1e-5
        status, body = post({"texts": test.texts[:2]})
        assert status == 400 and "text_pairs" in body["error"]
    finally:
        assert server.stop() == 0


def _jsonl(folder, test):
    path = folder / "serve-pairs.jsonl"
    path.write_text("".join(json.dumps({"text": a, "text_pair": b}) + "\n" for a, b in zip(test.texts, test.pairs)))
    return path
