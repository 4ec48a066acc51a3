"""teacher.trained: a fine-tuned classifier folder used as is — matched to the data by label name,
refused with one line when it cannot be, and measured exactly as the run that made it measured it."""
from __future__ import annotations

import hashlib
import json
import shutil

import pytest
from conftest import keyword_rows, tiny_recipe, write_csv, write_recipe

from shrinkwrap.serve.errors import UserError


def _recipe(folder, base, data, **teacher):
    from shrinkwrap.recipe.schema import load_recipe

    folder.mkdir(parents=True, exist_ok=True)
    raw = tiny_recipe(base, data)
    raw["teacher"] = {"base": str(base), "trained": True, "max_length": raw["teacher"]["max_length"], **teacher}
    return load_recipe(write_recipe(folder / "r.yaml", raw))


def _teacher_only(folder, base, data, **teacher):
    from shrinkwrap.chain.runner import run_chain

    return run_chain(_recipe(folder, base, data, **teacher), folder / "run", quiet=True, until="teacher")


def _own_model(tiny_run, tmp_path):
    """A user's own fine-tuned classifier folder: the teacher another run produced, without our files."""
    own = tmp_path / "own-model"
    shutil.copytree(tiny_run / "teacher", own, ignore=shutil.ignore_patterns("step.json", "bench.json"))
    return own


def test_a_run_s_teacher_used_as_is_gives_exactly_its_accuracy(tmp_path, tiny_run, keyword_csv):
    own = _own_model(tiny_run, tmp_path)
    results = _teacher_only(tmp_path / "b", own, keyword_csv)
    before = json.loads((tiny_run / "results.json").read_text())["steps"][0]
    after = results["steps"][0]
    assert after["metrics"]["accuracy"] == before["metrics"]["accuracy"]
    assert after["predictions"] == before["predictions"]
    info = after["info"]
    assert info["trained"] == "used as is" and info["source"] == str(own)
    # The recorded hash is the weight file's sha256 (hashlib, outside the project), and the copy is byte-exact.
    file_hash = hashlib.sha256((own / "model.safetensors").read_bytes()).hexdigest()
    assert hashlib.sha256(f"model.safetensors {file_hash}\n".encode()).hexdigest() == info["weights_sha256"]
    assert (tmp_path / "b" / "run" / "teacher" / "model.safetensors").read_bytes() == \
        (own / "model.safetensors").read_bytes()
    assert "seeds" not in info  # nothing was fine-tuned


def test_the_data_s_label_order_follows_the_model_s(tmp_path, tiny_run, keyword_csv):
    """The same classifier with its classes listed in another order (rows of the head permuted to match)
    predicts the same names: the run must read the model's order, not the data's sorted one."""
    import torch
    from safetensors.torch import load_file, save_file

    own = _own_model(tiny_run, tmp_path)
    config = json.loads((own / "config.json").read_text())
    names = [config["id2label"][str(i)] for i in range(len(config["id2label"]))]
    order = [2, 0, 1]
    config["id2label"] = {str(k): names[i] for k, i in enumerate(order)}
    config["label2id"] = {names[i]: k for k, i in enumerate(order)}
    (own / "config.json").write_text(json.dumps(config))
    weights = load_file(own / "model.safetensors")
    for key in ("classifier.weight", "classifier.bias"):
        weights[key] = weights[key][torch.tensor(order)].contiguous()
    save_file(weights, own / "model.safetensors", metadata={"format": "pt"})

    results = _teacher_only(tmp_path / "p", own, keyword_csv)
    before = json.loads((tiny_run / "results.json").read_text())
    assert results["data"]["label_names"] == [names[i] for i in order]
    row = results["steps"][0]
    assert row["metrics"]["accuracy"] == before["steps"][0]["metrics"]["accuracy"]
    named = [results["data"]["label_names"][p] for p in row["predictions"]]
    assert named == [before["data"]["label_names"][p] for p in before["steps"][0]["predictions"]]


def test_a_folder_without_a_head_is_refused(tmp_path, tiny_base, keyword_csv):
    with pytest.raises(UserError, match="no classification head.*classifier.weight"):
        _teacher_only(tmp_path, tiny_base, keyword_csv)
    assert not (tmp_path / "run").exists()


def test_labels_must_match_by_name_both_ways(tmp_path, tiny_run):
    own = tmp_path / "own"
    shutil.copytree(tiny_run / "teacher", own)
    rows = keyword_rows(180)
    extra = write_csv(tmp_path / "extra.csv", rows + [(t, "billing") for t, _ in rows[:12]])
    with pytest.raises(UserError, match=r"data labels the model does not know: 'billing' — labels"):
        _teacher_only(tmp_path / "a", own, extra)
    fewer = write_csv(tmp_path / "fewer.csv", [r for r in rows if r[1] != "login"])
    with pytest.raises(UserError, match=r"model labels never in the data: 'login'"):
        _teacher_only(tmp_path / "b", own, fewer)
    assert not (tmp_path / "a" / "run").exists() and not (tmp_path / "b" / "run").exists()


def test_cli_refusal_is_one_line_exit_2(tmp_path, tiny_base, keyword_csv, capsys):
    from shrinkwrap.cli import main

    raw = tiny_recipe(tiny_base, keyword_csv, teacher={"trained": True})
    recipe = write_recipe(tmp_path / "r.yaml", raw)
    assert main(["run", str(recipe), "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err[-1].startswith("error: ") and "no classification head" in err[-1]
    assert "Traceback" not in "\n".join(err)
    assert not (tmp_path / "out").exists()


def test_fine_tuning_keys_set_by_the_user_get_one_notice(tmp_path, tiny_run, keyword_csv):
    from shrinkwrap.chain.preflight import prepare

    own = _own_model(tiny_run, tmp_path)
    with pytest.warns(UserWarning) as caught:
        prepare(_recipe(tmp_path, own, keyword_csv, epochs=5, seeds=[1, 2], learning_rate=1e-3), tmp_path / "o")
    notices = [str(w.message) for w in caught if "no longer apply" in str(w.message)]
    assert len(notices) == 1
    assert "teacher.epochs, teacher.learning_rate, teacher.seeds" in notices[0]
    assert "max_length" not in notices[0]
