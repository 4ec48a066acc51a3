"""Bad input: every case gives exit 2 and one line on stderr naming the file, the place and the problem —
no traceback, and nothing written to the run folder.

Each case runs `shrinkwrap run RECIPE --out DIR` in a process of its own. Most are forked from one warm
worker process that has already imported torch and transformers (a cold `python -m shrinkwrap` costs
~10 s of imports per case on this 2-core machine); a few go through a cold `python -m shrinkwrap` too,
so the true entry point is covered.
"""
from __future__ import annotations

import json
import math
import os
import select
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import ROOT, keyword_rows, tiny_recipe, write_csv, write_recipe

ENV = os.environ | {"OMP_NUM_THREADS": "1", "TOKENIZERS_PARALLELISM": "false"}

# Reads one case per line, forks, runs the command line's main() in the child with stdout/stderr sent to
# files, and answers with the child's exit code.
WORKER = r"""
import json, os, sys, traceback
import shrinkwrap.cli, shrinkwrap.ml.data, shrinkwrap.ml.models, shrinkwrap.chain.runner
import datasets, pandas, sklearn.model_selection, transformers
shrinkwrap.chain.runner.chain()  # imports every step
print("ready", flush=True)
for line in sys.stdin:
    case = json.loads(line)
    sys.stdout.flush(); sys.stderr.flush()
    pid = os.fork()
    if pid == 0:
        code = 70
        try:
            os.chdir(case["cwd"])
            for fd, name in ((1, "stdout"), (2, "stderr")):
                os.dup2(os.open(case[name], os.O_WRONLY | os.O_CREAT | os.O_TRUNC), fd)
            code = shrinkwrap.cli.main(case["argv"])
        except SystemExit as e:
            code = e.code if isinstance(e.code, int) else 2
        except BaseException:
            traceback.print_exc()
        finally:
            sys.stdout.flush(); sys.stderr.flush()
            os._exit(code)
    _, status = os.waitpid(pid, 0)
    print(json.dumps({"code": os.waitstatus_to_exitcode(status)}), flush=True)
"""


class Worker:
    def __init__(self):
        self.proc = subprocess.Popen([sys.executable, "-c", WORKER], cwd=ROOT, env=ENV, text=True,
                                     stdin=subprocess.PIPE, stdout=subprocess.PIPE)
        assert self._line(300) == "ready"

    def _line(self, timeout: float) -> str:
        ready, _, _ = select.select([self.proc.stdout], [], [], timeout)
        assert ready, "the CLI worker did not answer in time"
        return self.proc.stdout.readline().strip()

    def run(self, argv: list[str], cwd: Path, folder: Path) -> tuple[int, str]:
        out, err = folder / "cli.stdout", folder / "cli.stderr"
        self.proc.stdin.write(json.dumps({"argv": argv, "cwd": str(cwd), "stdout": str(out), "stderr": str(err)}) + "\n")
        self.proc.stdin.flush()
        code = json.loads(self._line(120))["code"]
        return code, err.read_text()

    def close(self):
        self.proc.stdin.close()
        self.proc.wait(timeout=30)


@pytest.fixture(scope="module")
def worker():
    w = Worker()
    yield w
    w.close()


# ---- the cases: each builds its files in `tmp` and returns (recipe path, extra args, what the line must say) ----

def _recipe(tmp: Path, base: Path, data_path: Path, edit=None, sections: dict | None = None) -> Path:
    recipe = tiny_recipe(base, data_path)
    for key, value in (sections or {}).items():
        recipe.setdefault(key, {}).update(value)
    if edit:
        edit(recipe)
    return write_recipe(tmp / "recipe.yaml", recipe)


def _with(tmp, base, data_path, section, key, value):
    return _recipe(tmp, base, data_path, sections={section: {key: value}})


def _data_file(tmp: Path, name: str, content: bytes) -> Path:
    path = tmp / name
    path.write_bytes(content)
    return path


def _csv_rows(rows) -> bytes:
    import csv
    import io

    buf = io.StringIO()
    w = csv.writer(buf)
    w.writerow(["text", "label"])
    w.writerows(rows)
    return buf.getvalue().encode()


def _splits_folder(tmp: Path, **splits) -> Path:
    import datasets

    folder = tmp / "splits"
    datasets.DatasetDict({
        name: datasets.Dataset.from_dict({"text": [r[0] for r in rows], "label": [r[1] for r in rows]})
        for name, rows in splits.items()
    }).save_to_disk(str(folder))
    return folder


ROWS = keyword_rows(60)


def case_missing_key(tmp, base, data):
    return _recipe(tmp, base, data, edit=lambda r: r.pop("data")), [], ["data is missing"]


def case_missing_name(tmp, base, data):
    return _recipe(tmp, base, data, edit=lambda r: r.pop("name")), [], ["name is missing"]


def case_unknown_key(tmp, base, data):
    return _with(tmp, base, data, "teacher", "epoch", 3), [], ["unknown key teacher.epoch", "allowed keys"]


def case_unknown_section(tmp, base, data):
    return (_recipe(tmp, base, data, edit=lambda r: r.update(teachr={})), [],
            ["unknown key teachr", "allowed keys in the top level: name, task, data, teacher"])


def case_wrong_type(tmp, base, data):
    return _with(tmp, base, data, "teacher", "epochs", "three"), [], ['teacher.epochs = "three"', "integer"]


def case_wrong_type_section(tmp, base, data):
    return _recipe(tmp, base, data, edit=lambda r: r.update(student=[1, 2])), [], ["student = [1, 2]", "dictionary"]


def case_zero_epochs(tmp, base, data):
    return _with(tmp, base, data, "teacher", "epochs", 0), [], ["teacher.epochs = 0", "greater than or equal to 1"]


def case_negative_epochs(tmp, base, data):
    return _with(tmp, base, data, "student", "epochs", -2), [], ["student.epochs = -2", "greater than or equal to 0"]


def case_zero_temperature(tmp, base, data):
    return _with(tmp, base, data, "student", "temperature", 0), [], ["student.temperature = 0", "greater than 0"]


def case_negative_temperature(tmp, base, data):
    return _with(tmp, base, data, "student", "temperature", -1.5), [], ["student.temperature = -1.5", "greater than 0"]


def case_alpha_above_one(tmp, base, data):
    return _with(tmp, base, data, "student", "alpha", 1.5), [], ["student.alpha = 1.5", "less than or equal to 1"]


def case_alpha_below_zero(tmp, base, data):
    return _with(tmp, base, data, "student", "alpha", -0.1), [], ["student.alpha = -0.1", "greater than or equal to 0"]


def case_layer_out_of_range(tmp, base, data):
    # The tiny base has 4 layers.
    return (_with(tmp, base, data, "student", "layers", [0, 7]), [],
            ["student.layers[1] = 7", "the teacher has 4 layers (0–3)"])


def case_layer_repeated(tmp, base, data):
    return _with(tmp, base, data, "student", "layers", [1, 1]), [], ["student.layers = [1, 1]", "layer 1 is repeated"]


def case_shares_too_large(tmp, base, data):
    return (_recipe(tmp, base, data, sections={"data": {"test_size": 0.6, "validation_size": 0.5}}), [],
            ["data", "test_size + validation_size = 1.1", "must be below 1"])


def case_name_escapes_run_folder(tmp, base, data):
    return _recipe(tmp, base, data, edit=lambda r: r.update(name="../../escape")), [], ['name = "../../escape"', "pattern"]


def case_yaml_python_tag(tmp, base, data):
    marker = tmp / "marker"
    path = tmp / "recipe.yaml"
    path.write_text(f"name: evil\ndata: !!python/object/apply:os.system [\"touch {marker}\"]\n")
    return path, [], ["line 2 is not valid YAML", "python/object/apply:os.system"]


def case_yaml_syntax(tmp, base, data):
    path = tmp / "recipe.yaml"
    path.write_text("name: tiny\nteacher:\n  epochs: [3\n")
    return path, [], ["is not valid YAML"]


def case_recipe_not_utf8(tmp, base, data):
    path = tmp / "recipe.yaml"
    path.write_bytes(b"name: tiny\n# caf\xe9\ndata: {path: x.csv}\n")
    return path, [], ["not UTF-8 text — line 2"]


def case_recipe_missing(tmp, base, data):
    return tmp / "no-such-recipe.yaml", [], ["no such recipe file"]


def case_unknown_teacher_base_path(tmp, base, data):
    return (_with(tmp, base, data, "teacher", "base", "./no-such-model"), [],
            ["teacher.base = './no-such-model'", "no such folder"])


def case_unknown_teacher_base_hub_id(tmp, base, data):
    # Answered at once from the local cache: never a half-minute of network retries.
    return (_with(tmp, base, data, "teacher", "base", "no-such-org/no-such-model"), [],
            ["teacher.base = 'no-such-org/no-such-model'", "in the local Hugging Face cache", "never downloads"])


def case_teacher_base_not_a_model(tmp, base, data):
    (tmp / "empty-model").mkdir()
    return (_with(tmp, base, data, "teacher", "base", str(tmp / "empty-model")), [],
            ["teacher.base", "no config.json"])


def case_missing_data_file(tmp, base, data):
    return (_with(tmp, base, data, "data", "path", "no-such.csv"), [],
            ["data.path = 'no-such.csv'", "no such file or folder", str(tmp / "no-such.csv")])


def case_data_not_utf8(tmp, base, data):
    path = _data_file(tmp, "t.csv", _csv_rows(ROWS[:3]) + "caf\xe9 outage router,outage\n".encode("latin-1"))
    return _with(tmp, base, path, "data", "path", str(path)), [], [str(path), "not UTF-8 text — line 5"]


def case_data_not_utf8_far_down(tmp, base, data):
    # Far past pandas' first read chunk, whose byte offsets are not the file's.
    rows = _csv_rows(keyword_rows(30_000))
    path = _data_file(tmp, "t.csv", rows + b"bad \xff byte,outage\n")
    return _with(tmp, base, path, "data", "path", str(path)), [], [str(path), "not UTF-8 text — line 30002"]


def case_data_unreadable_folder(tmp, base, data):
    folder = tmp / "t.csv"
    folder.mkdir()
    return _with(tmp, base, folder, "data", "path", str(folder)), [], [str(folder), "not a datasets folder"]


def case_data_corrupt_parquet(tmp, base, data):
    path = _data_file(tmp, "t.parquet", b"PAR1 this is not really parquet PAR1")
    return _with(tmp, base, path, "data", "path", str(path)), [], [str(path), "cannot parse"]


def case_data_bad_jsonl_line(tmp, base, data):
    lines = [json.dumps({"text": t, "label": y}) for t, y in ROWS[:2]] + ['{"text": "router down", "label": outage}']
    path = _data_file(tmp, "t.jsonl", "\n".join(lines).encode() + b"\n")
    return _with(tmp, base, path, "data", "path", str(path)), [], [str(path), "line 3 is not a JSON object"]


def case_transfer_missing(tmp, base, data):
    return (_with(tmp, base, data, "student", "transfer_path", "more.txt"), [], [str(tmp / "more.txt"), "no such file"])


def case_transfer_not_utf8(tmp, base, data):
    path = _data_file(tmp, "more.txt", b"router offline\n" * 20_000 + b"caf\xe9 refund\n")
    return (_with(tmp, base, data, "student", "transfer_path", str(path)), [],
            [str(path), "not UTF-8 text — line 20001"])


def case_transfer_blank(tmp, base, data):
    path = _data_file(tmp, "more.txt", b"\n  \n\n")
    return (_with(tmp, base, data, "student", "transfer_path", str(path)), [], [str(path), "no non-empty transfer texts"])


def case_transfer_column_missing(tmp, base, data):
    path = _data_file(tmp, "more.csv", b"body\nrouter offline\n")
    return (_with(tmp, base, data, "student", "transfer_path", str(path)), [],
            [str(path), "student.transfer_column = 'text' is not a column", "columns: body"])


def case_transfer_jsonl_row_without_the_field(tmp, base, data):
    path = _data_file(tmp, "more.jsonl", b'{"text": "router offline"}\n{"body": "locked out"}\n')
    return (_with(tmp, base, data, "student", "transfer_path", str(path)), [], [str(path), "line 2 has no 'text' field"])


def case_transfer_unsupported_type(tmp, base, data):
    path = _data_file(tmp, "more.xlsx", b"not a table")
    return (_with(tmp, base, data, "student", "transfer_path", str(path)), [], [str(path), "unsupported file type '.xlsx'"])


def case_text_column_missing(tmp, base, data):
    return (_with(tmp, base, data, "data", "text", "body"), [],
            [str(data), "data.text = 'body' is not a column", "columns: text, label"])


def case_label_column_missing(tmp, base, data):
    return (_with(tmp, base, data, "data", "label", "queue"), [],
            [str(data), "data.label = 'queue' is not a column"])


def case_empty_dataset(tmp, base, data):
    path = _data_file(tmp, "t.csv", b"text,label\n")
    return _with(tmp, base, path, "data", "path", str(path)), [], [str(path), "the dataset is empty"]


def case_empty_file(tmp, base, data):
    path = _data_file(tmp, "t.csv", b"")
    return _with(tmp, base, path, "data", "path", str(path)), [], [str(path), "the file is empty"]


def case_single_class(tmp, base, data):
    path = _data_file(tmp, "t.csv", _csv_rows([(t, "refund") for t, _ in ROWS]))
    return _with(tmp, base, path, "data", "path", str(path)), [], [str(path), "only one class ('refund')"]


def case_test_label_unseen_in_train(tmp, base, data):
    folder = _splits_folder(tmp, train=ROWS[:40], test=ROWS[40:50] + [("my parcel never came", "delivery")])
    return (_with(tmp, base, folder, "data", "path", str(folder)), [],
            [str(folder), "label 'delivery' appears in the test split but never in train", "1 test row with"])


def case_empty_texts(tmp, base, data):
    rows = list(ROWS)
    rows[2], rows[6] = ("", rows[2][1]), ("", rows[6][1])
    path = _data_file(tmp, "t.csv", _csv_rows(rows))
    return (_with(tmp, base, path, "data", "path", str(path)), [],
            [str(path), "2 rows have an empty or whitespace-only 'text' (data rows 3, 7)", "data.drop_empty"])


def case_whitespace_texts(tmp, base, data):
    rows = list(ROWS)
    rows[0] = ("   \t ", rows[0][1])
    path = _data_file(tmp, "t.csv", _csv_rows(rows))
    return (_with(tmp, base, path, "data", "path", str(path)), [],
            [str(path), "1 row has an empty or whitespace-only 'text' (data rows 1)"])


def case_nan_labels(tmp, base, data):
    import pandas as pd

    path = tmp / "t.parquet"
    labels = [float(i % 3) for i in range(len(ROWS))]
    labels[4] = math.nan
    pd.DataFrame({"text": [t for t, _ in ROWS], "label": labels}).to_parquet(path)
    return (_with(tmp, base, path, "data", "path", str(path)), [],
            [str(path), "1 row has no label (empty, null or NaN) in column 'label' (data rows 5"])


def case_null_labels_jsonl(tmp, base, data):
    lines = [json.dumps({"text": t, "label": None if i in (1, 3) else y}) for i, (t, y) in enumerate(ROWS)]
    path = _data_file(tmp, "t.jsonl", "\n".join(lines).encode() + b"\n")
    return (_with(tmp, base, path, "data", "path", str(path)), [],
            [str(path), "2 rows have no label", "data rows 2, 4"])


def case_out_under_a_file(tmp, base, data):
    (tmp / "a-file").write_text("not a folder")
    return _recipe(tmp, base, data), ["--out", str(tmp / "a-file" / "run")], ["--out", "a-file is a file, not a folder"]


def case_out_in_proc(tmp, base, data):
    return _recipe(tmp, base, data), ["--out", "/proc/shrinkwrap-test/run"], ["--out /proc/shrinkwrap-test/run",
                                                                              "cannot create the run folder"]


def case_set_without_value(tmp, base, data):
    return _recipe(tmp, base, data), ["--set", "teacher.epochs"], ["--set teacher.epochs", "expected key.path=value"]


def case_set_bad_yaml(tmp, base, data):
    return _recipe(tmp, base, data), ["--set", "teacher.seeds=[0"], ["--set teacher.seeds=[0", "not valid YAML"]


def case_set_into_a_value(tmp, base, data):
    return _recipe(tmp, base, data), ["--set", "name.x=1"], ["--set name.x=1", "name is not a section"]


def case_set_bad_value(tmp, base, data):
    return (_recipe(tmp, base, data), ["--set", "student.alpha=2"],
            ["(--set student.alpha=2): student.alpha = 2", "less than or equal to 1"])


# ---- task: embedding ----

def _embedding(tmp, base, data_path, data: dict | None = None, budget: dict | None = None, pooling: bool = True):
    """An embedding recipe on the tiny encoder: the teacher used as is (no fine-tuning keys), pooled as said."""
    def edit(r):
        r["task"] = "embedding"
        r["teacher"] = {"base": str(base), "max_length": 32, **({"pooling": "mean", "normalize": True} if pooling else {})}
        r["data"].pop("label")   # optional for an encoder: read when the default column is there
        r["data"].update(data or {})
        if budget:
            r["budget"] = budget
    return _recipe(tmp, base, data_path, edit=edit)


def _pair_rows(score=lambda i: str(i % 5)) -> bytes:
    import csv
    import io

    buf = io.StringIO()
    w = csv.writer(buf)
    w.writerow(["text", "text_pair", "score"])
    w.writerows([(t, ROWS[(i + 1) % len(ROWS)][0], score(i)) for i, (t, _) in enumerate(ROWS)])
    return buf.getvalue().encode()


def case_embedding_knn_limit_without_labels(tmp, base, data):
    path = _data_file(tmp, "t.csv", b"text\n" + b"\n".join(t.encode() for t, _ in ROWS) + b"\n")
    return (_embedding(tmp, base, path, budget={"max_knn_accuracy_drop_points": 1}), [],
            ["budget.max_knn_accuracy_drop_points needs labels", "no 'label' column"])


def case_embedding_score_not_numeric(tmp, base, data):
    path = _data_file(tmp, "t.csv", _pair_rows(lambda i: "high" if i == 3 else str(i % 5)))
    return (_embedding(tmp, base, path, {"label": None, "text_pair": "text_pair", "score": "score"}), [],
            [str(path), "1 row has a score that is not a number in column 'score' (data rows 4", "'high'"])


def case_embedding_pairs_without_scores(tmp, base, data):
    path = _data_file(tmp, "t.csv", _pair_rows())
    return (_embedding(tmp, base, path, {"label": None, "text_pair": "text_pair"}), [],
            ["data.text_pair = 'text_pair' without data.score with task: embedding"])


def case_embedding_with_a_classification_limit(tmp, base, data):
    return (_embedding(tmp, base, data, budget={"accuracy_drop_points": 1}), [],
            ["budget.accuracy_drop_points is not a limit of task: embedding", "min_neighbour_recall"])


def case_embedding_teacher_that_does_not_pool(tmp, base, data):
    return (_embedding(tmp, base, data, pooling=False), [],
            ["does not say how it pools", "set teacher.pooling"])


def case_classification_with_an_embedding_key(tmp, base, data):
    return (_with(tmp, base, data, "teacher", "pooling", "mean"), [],
            ["teacher.pooling = mean but task is classification", "task: embedding"])


CASES = {name.removeprefix("case_"): fn for name, fn in sorted(globals().items()) if name.startswith("case_")}
# These also go through a cold `python -m shrinkwrap`: one per kind of check.
COLD = ["zero_epochs", "yaml_python_tag", "empty_texts", "set_bad_yaml", "out_under_a_file"]


def _check(code: int, stderr: str, recipe: Path, expected: list[str], out: Path, before) -> None:
    lines = stderr.strip().splitlines()
    assert code == 2, stderr
    assert len(lines) == 1, stderr
    line = lines[0]
    assert line.startswith("error: ") and "Traceback" not in stderr
    # The file named: the recipe, or the data file / argument the case lists among what the line must say.
    named = [str(recipe)] + [e for e in expected if e.startswith(("/", "--"))]
    assert any(n in line for n in named), f"the line names no file: {line}"
    for part in expected:
        assert part in line, f"{part!r} not in {line!r}"
    if before is None:
        assert not out.exists(), f"{out} was created"
    else:
        assert _tree(out) == before


def _tree(folder: Path) -> dict:
    return {str(p.relative_to(folder)): (p.stat().st_size, p.stat().st_mtime_ns) for p in sorted(folder.rglob("*"))}


def _build(name, tmp_path, tiny_base, keyword_csv):
    tmp = tmp_path / "case"
    tmp.mkdir()
    recipe, args, expected = CASES[name](tmp, tiny_base, keyword_csv)
    if "--out" not in args:
        args = ["--out", str(tmp_path / "run")] + args
    return recipe, args, expected, Path(args[args.index("--out") + 1])


@pytest.mark.parametrize("name", list(CASES))
def test_bad_input(name, worker, tmp_path, tiny_base, keyword_csv):
    recipe, args, expected, out = _build(name, tmp_path, tiny_base, keyword_csv)
    code, stderr = worker.run(["run", str(recipe)] + args, tmp_path, tmp_path)
    _check(code, stderr, recipe, expected, out, None)
    assert not (tmp_path / "case" / "marker").exists()  # nothing in the recipe ran as code


def test_the_matrix_is_large_enough():
    assert len(CASES) >= 25


@pytest.mark.parametrize("name", COLD)
def test_bad_input_through_a_cold_command_line(name, tmp_path, tiny_base, keyword_csv):
    recipe, args, expected, out = _build(name, tmp_path, tiny_base, keyword_csv)
    proc = subprocess.run([sys.executable, "-m", "shrinkwrap", "run", str(recipe)] + args, cwd=tmp_path, env=ENV,
                          capture_output=True, text=True, timeout=300)
    _check(proc.returncode, proc.stderr, recipe, expected, out, None)


@pytest.mark.parametrize("name", ["zero_epochs", "empty_texts", "set_bad_value", "missing_data_file"])
def test_bad_input_leaves_an_existing_run_folder_unchanged(name, worker, tiny_run_copy, tmp_path, tiny_base,
                                                           keyword_csv):
    recipe, args, expected, _ = _build(name, tmp_path, tiny_base, keyword_csv)
    args[args.index("--out") + 1] = str(tiny_run_copy)
    before = _tree(tiny_run_copy)
    code, stderr = worker.run(["run", str(recipe)] + args, tmp_path, tmp_path)
    _check(code, stderr, recipe, expected, tiny_run_copy, before)


# ---- not errors: dropped empty texts, duplicates across splits, a 1 MB text ----

def test_drop_empty_drops_and_notes_instead_of_failing(tmp_path, tiny_base):
    from shrinkwrap.chain.preflight import prepare
    from shrinkwrap.recipe.schema import load_recipe

    rows = list(ROWS)
    rows[2], rows[6] = ("", rows[2][1]), ("  ", rows[6][1])
    data = write_csv(tmp_path / "t.csv", rows)
    raw = tiny_recipe(tiny_base, data)
    raw["data"]["drop_empty"] = True
    recipe = load_recipe(write_recipe(tmp_path / "r.yaml", raw))
    ctx = prepare(recipe, tmp_path / "run", quiet=True)
    assert sum(len(getattr(ctx.data, s)) for s in ("train", "validation", "test")) == len(rows) - 2
    assert "dropped 2 rows with an empty 'text' (data rows 3, 7)" in ctx.data.notes
    assert not (tmp_path / "run").exists()  # prepare writes nothing


def test_duplicates_across_splits_and_a_1mb_text_are_warnings_in_a_real_run(tmp_path, tiny_base):
    rows = list(dict.fromkeys(keyword_rows(400, seed=3)))[:150]  # unique texts
    train, validation, test = rows[:100], rows[100:120], rows[120:]
    test[:3] = train[:3]  # exactly 3 test rows that also appear in train
    huge = ("router offline " * 70_000)[:1_000_000]  # a 1 MB text
    train[10] = (huge, "outage")
    folder = _splits_folder(tmp_path, train=train, validation=validation, test=test)
    recipe = write_recipe(tmp_path / "r.yaml", tiny_recipe(tiny_base, folder,
                                                           student={"epochs": 1}, bench={"threads": 1}))
    out = tmp_path / "run"
    proc = subprocess.run([sys.executable, "-m", "shrinkwrap", "run", str(recipe), "--out", str(out), "--until",
                           "student"], cwd=ROOT, env=ENV, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr[-3000:]
    dup = "3 test rows also appear in train (same text): test accuracy is optimistic"
    cut = "1 texts in 'text' longer than 100,000 characters were cut to that length"
    assert f"{folder} [train]: {cut}" in proc.stderr and f"{folder}: {dup}" in proc.stderr
    notes = json.loads((out / "results.json").read_text())["data"]["notes"]
    assert dup in notes and cut in notes
