"""End to end: the transfer-overlap and vocabulary-trimming cautions reach results.json `cautions`."""
from __future__ import annotations

import json
import shutil

import pytest

from conftest import keyword_rows, tiny_recipe, write_csv, write_recipe


def _load(folder, tiny_base, data, **sections):
    from shrinkwrap.recipe.schema import load_recipe

    return load_recipe(write_recipe(folder / "r.yaml", tiny_recipe(tiny_base, data, **sections)))


def _test_texts(recipe, folder) -> list[str]:
    from shrinkwrap.chain.preflight import prepare

    return list(prepare(recipe, folder / "probe", quiet=True).data.test.texts)


def test_transfer_texts_from_the_test_split_are_cautioned(tiny_run, tiny_base, keyword_csv, tmp_path):
    from shrinkwrap.chain.pipeline import run_recipe

    (tmp_path / "run").mkdir()
    shutil.copytree(tiny_run / "teacher", tmp_path / "run" / "teacher")
    test = _test_texts(_load(tmp_path, tiny_base, keyword_csv), tmp_path)
    transfer = tmp_path / "transfer.txt"
    novel = ["my refund please", "router offline again", "password locked"]
    assert not set(novel) & set(test)
    transfer.write_text("\n".join(novel * 3 + test[:4]) + "\n", encoding="utf-8")
    recipe = _load(tmp_path, tiny_base, keyword_csv, student={"transfer_path": str(transfer)})
    run_recipe(recipe, tmp_path / "run", quiet=True, until="student")
    results = json.loads((tmp_path / "run" / "results.json").read_text())
    assert results["data"]["transfer_in_test"] == 4
    assert [c for c in results["cautions"] if "transfer texts also occur in the test split" in c] == [
        "4 transfer texts also occur in the test split: the student saw the teacher's answers on them, so its "
        "test accuracy is optimistic"]


def test_no_transfer_overlap_no_caution(tiny_run):
    results = json.loads((tiny_run / "results.json").read_text())
    assert not any("transfer" in c for c in results["cautions"])


def test_trimming_that_loses_test_pieces_is_cautioned(tiny_base, tmp_path):
    from shrinkwrap.chain.pipeline import run_recipe

    rows = keyword_rows()
    data = write_csv(tmp_path / "plain.csv", rows)
    # The split depends on the labels and the seed, not the texts: the same rows land in test after the edit.
    test = set(_test_texts(_load(tmp_path, tiny_base, data), tmp_path))
    extra = " banana elephant guitar volcano"   # words no train, validation or transfer text holds
    edited = [(t + extra if t in test else t, y) for t, y in rows]
    data = write_csv(tmp_path / "edited.csv", edited)
    recipe = _load(tmp_path, tiny_base, data, trim_vocab={"enabled": True})
    assert all(t.endswith(extra) for t in _test_texts(recipe, tmp_path))
    run_recipe(recipe, tmp_path / "run", quiet=True, until="student-trimmed")
    results = json.loads((tmp_path / "run" / "results.json").read_text())
    info = next(s for s in results["steps"] if s["name"] == "student-trimmed")["info"]
    assert info["test_oov_rate"] > 0.05   # four lost words per test text
    # Reference: each test text's pieces under the full and the trimmed tokenizer (their own id tables), compared.
    from transformers import AutoTokenizer

    full, small = (AutoTokenizer.from_pretrained(tmp_path / "run" / s) for s in ("student", "student-trimmed"))
    test = _test_texts(recipe, tmp_path)
    differ = [full.convert_ids_to_tokens(full(t)["input_ids"]) != small.convert_ids_to_tokens(small(t)["input_ids"])
              for t in test]
    assert info["test_changed_share"] == pytest.approx(sum(differ) / len(test), abs=1e-6) == 1.0
    # validation texts were not edited: their words are the training texts' words, so none changes
    assert info["test_texts"] == len(test) and info["validation_changed_share"] == 0.0
    found = [c for c in results["cautions"] if c.startswith("student-trimmed:")]
    assert len(found) == 1 and "no longer in the trimmed vocabulary" in found[0]
    assert f"of {info['test_tokens']})" in found[0]
    assert f"splits 100.00 % of the test texts ({len(test)} of {len(test)}) otherwise" in found[0]
