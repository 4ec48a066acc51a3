"""data.truncation: which tokens of a long text are kept — the same cut in the chain and in predict."""
from __future__ import annotations

import json
import random
import shutil
import subprocess
import sys

import pytest
from conftest import bundled_path, keyword_rows, tiny_recipe, write_csv, write_recipe

from shrinkwrap.serve.errors import UserError


def test_the_three_rules_keep_the_start_the_end_or_both():
    """Reference: the tokenizer's own untruncated ids, sliced by hand ([CLS] text [SEP] of BERT's template)."""
    from transformers import AutoTokenizer

    from shrinkwrap.ml.data import Split
    from shrinkwrap.serve.batches import encode, head_tokens

    tok = AutoTokenizer.from_pretrained(bundled_path())
    texts = [" ".join(f"w{i}" for i in range(40)), "short text"]
    full = [tok(t)["input_ids"] for t in texts]
    n, budget = 12, 10
    split = Split(texts=texts, labels=None)
    body = full[0][1:-1]
    cls, sep = full[0][0], full[0][-1]
    assert encode(tok, split, n, truncation="head")[0]["input_ids"] == [cls] + body[:budget] + [sep]
    assert encode(tok, split, n, truncation="tail")[0]["input_ids"] == [cls] + body[-budget:] + [sep]
    k = head_tokens(budget)
    both = encode(tok, split, n, truncation="head_tail")
    assert both[0]["input_ids"] == [cls] + body[:k] + body[-(budget - k):] + [sep]
    assert set(both[0]) == {"input_ids", "attention_mask", "token_type_ids"} and both[0]["attention_mask"] == [1] * n
    for rule in ("head", "tail", "head_tail"):  # a text within the limit is never cut
        assert encode(tok, split, n, truncation=rule)[1]["input_ids"] == full[1]
    assert tok.truncation_side == "right"  # the shared tokenizer is left as it was


def test_head_tail_with_pairs_is_refused_in_the_recipe(tmp_path, tiny_base, keyword_csv):
    from shrinkwrap.recipe.schema import load_recipe

    raw = tiny_recipe(tiny_base, keyword_csv)
    raw["data"].update(text_pair="text", truncation="head_tail")
    with pytest.raises(UserError, match=r"data — truncation = head_tail with text_pair = 'text' — head_tail cuts "
                                        r"single texts"):
        load_recipe(write_recipe(tmp_path / "r.yaml", raw))


def _long_rows(seed: int = 0):
    """The keyword task with the class's words at the end of a long run of shared filler words."""
    rng = random.Random(seed)
    filler = ["please", "help", "my", "the", "today", "again", "since", "morning", "is", "not", "working"]
    return [(" ".join(rng.choice(filler) for _ in range(30)) + " " + text, label) for text, label in keyword_rows(90)]


@pytest.mark.parametrize("rule", ["tail", "head_tail"])
def test_predict_cuts_long_texts_as_the_chain_did(rule, tmp_path, tiny_run):
    from shrinkwrap.chain.pipeline import run_recipe
    from shrinkwrap.ml.data import load_dataset
    from shrinkwrap.recipe.schema import load_recipe

    own = tmp_path / "own"
    shutil.copytree(tiny_run / "teacher", own, ignore=shutil.ignore_patterns("step.json", "bench.json"))
    data = write_csv(tmp_path / "long.csv", _long_rows())
    raw = tiny_recipe(own, data, student={"epochs": 1}, quantize={"enabled": False},
                      bench={"repeats": 3, "warmup": 0, "warm_seconds": 0, "timed_seconds": 0, "sequence_length": 16})
    raw["data"]["truncation"] = rule
    raw["teacher"] = {"base": str(own), "trained": True, "max_length": 16}
    recipe = load_recipe(write_recipe(tmp_path / "r.yaml", raw))
    results = run_recipe(recipe, tmp_path / "run", quiet=True)
    artifact = tmp_path / "run" / "artifact"
    assert json.loads((artifact / "manifest.json").read_text())["tokenizer"]["truncation"] == rule
    test = load_dataset(recipe.data, recipe.resolve(recipe.data.path), "test").test
    file = tmp_path / "texts.txt"
    file.write_text("\n".join(test.texts) + "\n")
    proc = subprocess.run([sys.executable, "-m", "shrinkwrap", "predict", str(artifact), "--file", str(file)],
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    names = results["data"]["label_names"]
    assert [json.loads(x)["label"] for x in proc.stdout.splitlines()] == \
        [names[i] for i in results["steps"][-1]["predictions"]]
