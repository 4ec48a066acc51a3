"""`shrinkwrap predict`: the chain's own predictions, no torch, and a refusal of any modified artifact."""
import json
import shutil
import subprocess
import sys

import pytest
from conftest import ROOT


def _predict(*args, stdin=None):
    return subprocess.run([sys.executable, "-m", "shrinkwrap", "predict", *map(str, args)], capture_output=True,
                          text=True, input=stdin)


def _test_texts(run_dir):
    """The run's test split, rebuilt from its recipe exactly as the chain built it."""
    from shrinkwrap.ml.data import load_dataset
    from shrinkwrap.recipe.schema import load_recipe

    recipe = load_recipe(run_dir.parent / "recipe.yaml")
    return load_dataset(recipe.data, recipe.resolve(recipe.data.path), "test").test.texts


def test_predict_equals_the_chains_recorded_predictions(tiny_run, tmp_path):
    results = json.loads((tiny_run / "results.json").read_text())
    texts = _test_texts(tiny_run)
    assert len(texts) == len(results["test_labels"])
    file = tmp_path / "texts.txt"
    file.write_text("\n".join(texts) + "\n", encoding="utf-8")
    proc = _predict(tiny_run / "artifact", "--file", file)
    assert proc.returncode == 0, proc.stderr
    rows = [json.loads(line) for line in proc.stdout.splitlines()]
    names = results["data"]["label_names"]
    assert [r["text"] for r in rows] == texts
    assert [r["label"] for r in rows] == [names[i] for i in results["steps"][-1]["predictions"]]
    for r in rows:
        assert set(r["scores"]) == set(names) and abs(sum(r["scores"].values()) - 1) < 1e-4
        assert r["label"] == max(r["scores"], key=r["scores"].get)


def test_arguments_stdin_and_file_give_the_same_lines(tiny_run, tmp_path):
    texts = ["my router is offline again", "please refund the double charge", "locked out of my account"]
    by_args = _predict(tiny_run / "artifact", *texts)
    by_stdin = _predict(tiny_run / "artifact", stdin="\n".join(texts))
    (tmp_path / "t.txt").write_text("\n".join(texts) + "\n")
    by_file = _predict(tiny_run / "artifact", "--file", tmp_path / "t.txt", "--batch-size", "2")
    assert by_args.returncode == by_stdin.returncode == by_file.returncode == 0
    assert len(by_args.stdout.splitlines()) == 3
    assert by_args.stdout == by_stdin.stdout
    assert [json.loads(x)["label"] for x in by_file.stdout.splitlines()] == \
           [json.loads(x)["label"] for x in by_args.stdout.splitlines()]


# Run in a fresh interpreter: torch and transformers are made unimportable (a None entry in
# sys.modules makes `import` raise), then the imported third-party packages are listed.
_PROBE = """
import json, sys
for name in ("torch", "transformers", "optimum", "onnx", "pydantic", "pandas", "sklearn", "scipy"):
    sys.modules[name] = None
from shrinkwrap.serve.predict import run_predict
code = run_predict(sys.argv[1], ["my router is offline"], None, 32, 1, stdout=sys.stderr)
third_party = sorted({m.split(".")[0] for m, v in sys.modules.items() if v is not None}
                     - set(sys.stdlib_module_names) - {"__main__"})
print(json.dumps({"code": code, "modules": third_party}))
"""


def test_predict_path_imports_only_onnxruntime_tokenizers_numpy(tiny_run):
    proc = subprocess.run([sys.executable, "-c", _PROBE, str(tiny_run / "artifact")], capture_output=True, text=True,
                          cwd=ROOT)
    assert proc.returncode == 0, proc.stderr
    out = json.loads(proc.stdout)
    assert out["code"] == 0 and json.loads(proc.stderr.splitlines()[-1])["label"]
    # Whatever the packaging machinery (editable-install finder, setuptools' shim) adds is not a dependency.
    allowed = {"numpy", "onnxruntime", "tokenizers", "shrinkwrap"}
    assert {m for m in out["modules"] if not m.startswith("_")} <= allowed, out["modules"]


def test_cli_predict_never_imports_torch(tiny_run):
    code = ("import sys\nfrom shrinkwrap.cli import main\nrc = main(['predict', sys.argv[1], 'hello'])\n"
            "print('TORCH' if 'torch' in sys.modules or 'transformers' in sys.modules else 'CLEAN', rc, file=sys.stderr)")
    proc = subprocess.run([sys.executable, "-c", code, str(tiny_run / "artifact")], capture_output=True, text=True)
    assert proc.stderr.strip().splitlines()[-1] == "CLEAN 0", proc.stderr


def _flip_one_byte(path, offset):
    data = bytearray(path.read_bytes())
    data[offset] ^= 0x01
    path.write_bytes(bytes(data))


@pytest.mark.parametrize("tamper", ["model-byte", "tokenizer-byte", "missing-file", "missing-manifest",
                                    "unlisted-model"])
def test_modified_or_incomplete_artifact_is_refused(tamper, tiny_run, tmp_path):
    art = tmp_path / "art"
    shutil.copytree(tiny_run / "artifact", art)
    if tamper == "model-byte":
        _flip_one_byte(art / "model.onnx", (art / "model.onnx").stat().st_size // 2)
        where = "model.onnx"
    elif tamper == "tokenizer-byte":
        text = (art / "tokenizer.json").read_bytes()
        _flip_one_byte(art / "tokenizer.json", text.index(b'"[UNK]"') + 2)  # same size, one letter changed
        where = "tokenizer.json"
    elif tamper == "missing-file":
        (art / "tokenizer.json").unlink()
        where = "tokenizer.json"
    elif tamper == "missing-manifest":
        (art / "manifest.json").unlink()
        where = "manifest.json"
    else:
        manifest = json.loads((art / "manifest.json").read_text())
        del manifest["files"]["model.onnx"]
        (art / "manifest.json").write_text(json.dumps(manifest))
        where = "model.onnx"
    proc = _predict(art, "my router is offline")
    assert proc.returncode == 2
    assert proc.stdout == ""
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error:") and where in lines[0], proc.stderr


@pytest.mark.parametrize("case", ["empty-line", "no-such-file", "args-and-file", "empty-argument", "not-utf8"])
def test_bad_text_input_exits_2_with_one_line(case, tiny_run, tmp_path):
    args = []
    if case == "empty-line":
        (tmp_path / "t.txt").write_text("first\n\nthird\n")
        args = ["--file", tmp_path / "t.txt"]
    elif case == "no-such-file":
        args = ["--file", tmp_path / "nope.txt"]
    elif case == "not-utf8":
        (tmp_path / "t.txt").write_bytes(b"first\n" * 5000 + b"caf\xe9\n")
        args = ["--file", tmp_path / "t.txt"]
    elif case == "args-and-file":
        (tmp_path / "t.txt").write_text("first\n")
        args = ["a text", "--file", tmp_path / "t.txt"]
    else:
        args = ["fine", "  "]
    proc = _predict(tiny_run / "artifact", *args)
    assert proc.returncode == 2 and proc.stdout == ""
    assert len(proc.stderr.strip().splitlines()) == 1, proc.stderr
    if case == "empty-line":
        assert "line 2" in proc.stderr
    if case == "not-utf8":
        assert "not UTF-8 text — line 5001" in proc.stderr


def test_more_lines_than_one_chunk_come_back_all_in_order(tiny_run, tmp_path):
    from shrinkwrap.serve.predict import CHUNK

    texts = [f"router {i} offline" if i % 2 else f"refund {i} please" for i in range(CHUNK * 2 + 7)]
    (tmp_path / "t.txt").write_bytes(("\r\n".join(texts) + "\r\n").encode())   # Windows line ends too
    by_file = _predict(tiny_run / "artifact", "--file", tmp_path / "t.txt")
    by_stdin = _predict(tiny_run / "artifact", stdin="\n".join(texts) + "\n")
    assert by_file.returncode == by_stdin.returncode == 0, by_file.stderr + by_stdin.stderr
    assert [json.loads(x)["text"] for x in by_file.stdout.splitlines()] == texts
    assert by_file.stdout == by_stdin.stdout


def test_temperature_in_manifest_and_min_confidence_abstains(tiny_run, tmp_path):
    from shrinkwrap.serve.artifact import load

    results = json.loads((tiny_run / "results.json").read_text())
    manifest = json.loads((tiny_run / "artifact" / "manifest.json").read_text())
    t = manifest["calibration"]["temperature"]
    assert t == results["artifact"]["temperature"] == results["steps"][-1]["calibration"]["temperature"]
    assert {"ece", "ece_raw"} <= set(results["artifact"])
    cal = results["steps"][-1]["calibration"]
    assert cal["validation_nll"] <= cal["validation_nll_raw"] + 1e-9  # the fit never raises validation NLL
    art = load(tiny_run / "artifact")
    # Texts mixing two classes' keywords, or none, so the model is not certain about them all.
    pool = ["refund invoice please", "router offline login", "refund password signal", "hello",
            "charge account outage today", "the morning is not working", "payment locked router"]
    by_top = {}
    for text, row in zip(pool, art.predict(pool)):
        by_top.setdefault(max(row["scores"].values()), text)
    texts = [by_top[k] for k in sorted(by_top)][:3]
    assert len(texts) >= 2, by_top
    rows = art.predict(texts)
    tops = [max(r["scores"].values()) for r in rows]
    # scores are softmax(logits / T)
    import numpy as np
    z = art.outputs(texts) / t
    p = np.exp(z - z.max(1, keepdims=True)); p /= p.sum(1, keepdims=True)
    assert np.allclose(tops, p.max(1), atol=1e-5)
    exact = sorted(p.max(1))                  # unrounded: the printed scores carry 6 decimals only
    assert exact[1] - exact[0] > 1e-6, exact  # the texts must differ in confidence for the check to mean anything
    cut = float((exact[0] + exact[1]) / 2)    # the least confident text abstains, the others answer
    out = subprocess.run([sys.executable, "-m", "shrinkwrap", "predict", str(tiny_run / "artifact"), *texts,
                          "--min-confidence", str(cut)], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    got = [json.loads(l) for l in out.stdout.splitlines()]
    assert [g["label"] is None for g in got] == [bool(top < cut) for top in p.max(1)]
    assert sum(g["label"] is None for g in got) == 1
    assert all(g["scores"] for g in got)
    bad = subprocess.run([sys.executable, "-m", "shrinkwrap", "predict", str(tiny_run / "artifact"), "x",
                          "--min-confidence", "1.5"], capture_output=True, text=True)
    assert bad.returncode == 2 and "from 0 to 1" in bad.stderr


def test_hostile_texts_are_classified_and_long_ones_noted(tiny_run, tmp_path):
    """A 10 MB line, NUL bytes, control characters, mixed scripts and emoji: every line gets its row, in
    order; the long one says it was truncated (the memory this takes is in benchmarks/predict_hostile.py)."""
    words = ["refund", "router", "login", "please", "the", "offline", "invoice"]
    huge = " ".join(words[i % len(words)] for i in range(1_500_000))[:10_000_000]
    lines = [huge, "refund\x00\x00 invoice", "\x01\x02\x1b[31m router offline \x7f", "пароль 登录 كلمة 🔐🚀 login",
             "\u200b\u202e reversed \ufeff", "🙂" * 5000]
    path = tmp_path / "hostile.txt"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    out = _predict(tiny_run / "artifact", "--file", path)
    assert out.returncode == 0, out.stderr
    rows = [json.loads(x) for x in out.stdout.splitlines()]
    assert [r["text"] for r in rows] == lines
    assert all(r["label"] in {"refund", "outage", "login"} for r in rows)
    assert rows[0].get("truncated") is True and "truncated" not in rows[1]


def test_a_long_text_keeps_exactly_the_tokens_of_the_whole_text(tiny_run):
    """The prefix the artifact tokenises a very long text from gives the same kept tokens as tokenising all of
    it (the tokenizers library run on the whole text is the reference)."""
    from shrinkwrap.serve.artifact import load

    art = load(tiny_run / "artifact")
    rng = __import__("random").Random(0)
    vocab = ["refund", "router", "unbelievably", "logins", "x", "ünïcödé", "登录", "🚀", "can't", "3.14"]
    for n in (3000, 20000):
        text = " ".join(rng.choice(vocab) for _ in range(n))
        examples, cut = art.encode([text])
        whole = art.tokenizer.encode(text)
        assert examples[0]["input_ids"] == whole.ids and len(whole.ids) == art.max_length
        assert cut == [True] and whole.overflowing
