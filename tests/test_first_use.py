"""What a new user meets first: the report opening with what shipped, notices as `note:` lines, a misspelt key
answered with the key meant and its line, `predict --id` joining results back to rows, and folders that say the
length they were trained at."""
from __future__ import annotations

import copy
import html
import json
import subprocess
import sys
from pathlib import Path


from conftest import keyword_rows, tiny_recipe, write_csv, write_recipe

from shrinkwrap.cli import main

ROOT = Path(__file__).resolve().parents[1]


def _cli(*args, **kw):
    return subprocess.run([sys.executable, "-m", "shrinkwrap", *map(str, args)], capture_output=True, text=True,
                          cwd=ROOT, **kw)


def test_the_report_opens_with_what_shipped_and_its_budget_verdict(tiny_run):
    from shrinkwrap.outputs.gate import evaluate
    from shrinkwrap.outputs.report import markdown_report
    from shrinkwrap.outputs.results import set_verdict
    from shrinkwrap.recipe.budget import BudgetConfig

    results = json.loads((tiny_run / "results.json").read_text())
    md = markdown_report(results)
    title, first = md.splitlines()[0], next(line for line in md.splitlines()[1:] if line.startswith("## "))
    assert title.startswith("# shrinkwrap report") and first == "## What shipped"
    shipped = md.split("## What shipped")[1].split("## Steps")[0]
    assert "Step `student-onnx-int8` ships as" in shipped and "No budget" in shipped

    step = results["steps"][-1]
    for s in results["steps"]:
        s["latency_ms"]["unstable"] = False
    budget = BudgetConfig(size_mb=step["size_bytes"] / 1e6 / 2, min_accuracy=0.1)  # one fails, one passes
    set_verdict(results, evaluate(results, budget, budget_source="recipe budget").as_dict())
    shipped = markdown_report(results).split("## What shipped")[1].split("## Steps")[0]
    assert "**a limit failed**" in shipped
    assert "| size_mb |" in shipped and "| pass |" in shipped and "| min_accuracy |" in shipped and "| fail |" in shipped


def test_a_caution_on_a_measured_only_step_stands_under_it_and_says_rose_when_accuracy_rose(tiny_run):
    from shrinkwrap.outputs.report import html_report, markdown_report

    results = json.loads((tiny_run / "results.json").read_text())
    side = next(s for s in results["steps"] if s["name"] == "student-int8")
    # A class that lost every one of its texts on the measured-only PyTorch int8 step, while its accuracy rose.
    names = results["data"]["label_names"]
    support = results["steps"][0]["metrics"]["per_class"]["support"]
    side["metrics"] = copy.deepcopy(side["metrics"])
    side["metrics"]["per_class"]["recall"] = [0.0] + side["metrics"]["per_class"]["recall"][1:]
    side["accuracy_drop"] = -1.0
    assert support[0] >= 2  # enough texts lost for the class rule to name it
    md = markdown_report(results)
    shipped, rest = md.split("## Steps")[0], md.split("## Cautions about steps only measured")[1]
    line = f"student-int8: class '{names[0]}' lost"
    assert line not in shipped and line in rest and "`student-int8` (measured only" in rest
    assert "while accuracy rose 1.00 points" in rest and "fell -" not in md
    page = html_report(results)
    assert "What shipped" in page and "Calibration" in page and "Per-class change" in page
    assert html.escape(line) in page  # the page carries what the Markdown carries


def test_notices_are_note_lines_and_a_misspelt_key_says_what_was_meant(tiny_base, tmp_path):
    rows = keyword_rows(120)
    data = write_csv(tmp_path / "d.csv", rows + rows[:30])  # the same texts in train and test: a notice
    recipe = tiny_recipe(tiny_base, data)
    good = write_recipe(tmp_path / "r.yaml", recipe)
    r = _cli("run", good, "--out", tmp_path / "run", "--until", "teacher")
    assert r.returncode == 0, r.stderr[-2000:]
    notes = [line for line in r.stderr.splitlines() if "test rows also appear in train" in line]
    assert notes and all(line.startswith("note: ") for line in notes) and "UserWarning" not in r.stderr

    recipe["student"]["temprature"] = 3
    bad = write_recipe(tmp_path / "bad.yaml", recipe)
    line_no = next(i for i, line in enumerate(bad.read_text().splitlines(), 1) if "temprature" in line)
    r = _cli("run", bad, "--out", tmp_path / "run2")
    err = r.stderr.strip().splitlines()
    assert r.returncode == 2 and len(err) == 1
    assert f"unknown key student.temprature (line {line_no}) — did you mean student.temperature?" in err[0]


def test_predict_passes_an_id_through_from_csv_and_json_lines(tiny_run, tmp_path, capsys):
    art = tiny_run / "artifact"
    csv_file = write_csv(tmp_path / "t.csv", [("T-7", "refund my invoice"), ("T-9", "router offline")],
                         header=("ticket", "text"))
    jsonl = tmp_path / "t.jsonl"
    jsonl.write_text('{"text": "password locked", "n": 41}\n{"text": "refund charge", "n": 42}\n', encoding="utf-8")
    capsys.readouterr()
    assert main(["predict", str(art), "--file", str(csv_file), "--id", "ticket"]) == 0
    rows = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
    assert [r["ticket"] for r in rows] == ["T-7", "T-9"] and list(rows[0])[0] == "ticket"
    assert [r["text"] for r in rows] == ["refund my invoice", "router offline"]
    assert main(["predict", str(art), "--file", str(jsonl), "--id", "n"]) == 0
    assert [json.loads(x)["n"] for x in capsys.readouterr().out.splitlines()] == [41, 42]

    for args, says in ((["--file", str(csv_file), "--id", "nope"], "--id 'nope' is not a column"),
                       (["some text", "--id", "ticket"], "ids come from a column of --file"),
                       (["--file", str(csv_file), "--id", "label"], "a field predict prints has that name")):
        assert main(["predict", str(art), *args]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and says in err[0], err


def test_a_run_s_folders_say_the_length_they_were_trained_at(tiny_run, tmp_path):
    # tiny runs train at 32 tokens (teacher.max_length) while the tiny model takes 128
    from shrinkwrap.serve.rundir import trained_length

    assert trained_length(tiny_run / "teacher") == 32 and trained_length(tiny_run / "student-onnx") == 32
    data = write_csv(tmp_path / "d.csv", [("refund my invoice", "refund"), ("router offline", "outage")])
    r = _cli("bench", tiny_run / "teacher", "--data", data, "--repeats", "3", "--timed-seconds", "0",
             "--warm-seconds", "0", "--json")
    assert r.returncode == 0, r.stderr[-2000:]
    assert json.loads(r.stdout)["data"]["max_length"] == 32 and "does not record" not in r.stderr

    plain = tmp_path / "user-folder"  # a folder made elsewhere: today's rule, said in a note
    plain.mkdir()
    for f in (tiny_run / "teacher").iterdir():
        if f.is_file() and f.name != "tokenizer_config.json":
            (plain / f.name).write_bytes(f.read_bytes())
    r = _cli("bench", plain, "--data", data, "--repeats", "3", "--timed-seconds", "0", "--warm-seconds", "0", "--json")
    assert r.returncode == 0, r.stderr[-2000:]
    assert json.loads(r.stdout)["data"]["max_length"] == 128
    assert any(line.startswith("note: ") and "does not record the length" in line for line in r.stderr.splitlines())


def test_version(capsys):
    import shrinkwrap

    assert main(["--version"]) == 0 and capsys.readouterr().out.strip() == f"shrinkwrap {shrinkwrap.__version__}"
