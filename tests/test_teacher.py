"""Teacher fine-tuning: degenerate seeds are caught and skipped, tokenizers never mix, pairs encode right."""
import json

import numpy as np
import pytest
import torch
from conftest import keyword_rows, tiny_recipe, write_csv, write_recipe

from shrinkwrap.serve.errors import StepFailed, UserError


def _recipe(tmp_path, base, data, **teacher):
    from shrinkwrap.recipe.schema import load_recipe

    tmp_path.mkdir(parents=True, exist_ok=True)
    return load_recipe(write_recipe(tmp_path / "r.yaml", tiny_recipe(base, data, teacher=teacher)))


def _teacher_only(tmp_path, base, data, **teacher):
    from shrinkwrap.chain.runner import run_chain

    return run_chain(_recipe(tmp_path, base, data, **teacher), tmp_path / "run", quiet=True, until="teacher")


def test_a_broken_seed_is_declared_degenerate_and_the_next_seed_kept(tmp_path, tiny_base, keyword_csv, monkeypatch):
    # Seed 0's model gets NaN weights (a broken initialisation); seed 1 is normal.
    import shrinkwrap.ml.classification as classification

    real = classification.load
    calls = []

    def broken_first(*args, **kwargs):
        model = real(*args, **kwargs)
        if not calls:
            with torch.no_grad():
                model.classifier.weight.fill_(float("nan"))
        calls.append(1)
        return model

    monkeypatch.setattr(classification, "load", broken_first)
    results = _teacher_only(tmp_path, tiny_base, keyword_csv, seeds=[0, 1])
    seeds = results["steps"][0]["info"]["seeds"]
    assert [s["seed"] for s in seeds] == [0, 1]
    assert seeds[0]["outcome"] == "degenerate" and "loss is nan" in seeds[0]["reason"]
    assert seeds[0]["steps"] == 1  # stopped at once, not trained to the end
    assert seeds[1]["outcome"] == "kept" and results["steps"][0]["info"]["kept_seed"] == 1
    assert all("seconds" in s and "curve" in s for s in seeds)


def test_shuffled_labels_are_caught_as_no_better_than_the_majority(tmp_path, tiny_base):
    # Labels independent of the texts: nothing is learnable, so validation accuracy sits at (or below)
    # the majority-class baseline and every seed must be refused, loudly.
    rows = keyword_rows(180)
    rng = np.random.default_rng(0)
    labels = [r[1] for r in rows]
    rng.shuffle(labels)
    data = write_csv(tmp_path / "shuffled.csv", [(t, y) for (t, _), y in zip(rows, labels)])
    with pytest.raises(StepFailed, match="every seed degenerated"):
        _teacher_only(tmp_path, tiny_base, data, seeds=[0, 1], epochs=2)
    assert not (tmp_path / "run" / "teacher").exists()  # no silent bad teacher on disk


def test_absurd_learning_rate_collapses_or_stalls(tmp_path, tiny_base, keyword_csv):
    with pytest.raises(StepFailed) as err:
        _teacher_only(tmp_path, tiny_base, keyword_csv, seeds=[3], learning_rate=0.5, collapse_share=0.9,
                      stall_steps=8, epochs=3)
    assert "seed 3:" in str(err.value)


def test_stalled_loss_is_degenerate(tmp_path, tiny_base, keyword_csv):
    # A learning rate too small to move anything: the loss cannot fall by 10 % within 8 steps.
    with pytest.raises(StepFailed, match="training loss stalled"):
        _teacher_only(tmp_path, tiny_base, keyword_csv, seeds=[0], learning_rate=1e-9, stall_steps=8)


def test_same_recipe_and_seed_give_the_same_metrics(tmp_path, tiny_base, keyword_csv):
    a = _teacher_only(tmp_path / "a", tiny_base, keyword_csv, epochs=3)
    b = _teacher_only(tmp_path / "b", tiny_base, keyword_csv, epochs=3)
    assert a["steps"][0]["info"]["seeds"][0]["curve"] == b["steps"][0]["info"]["seeds"][0]["curve"]
    assert a["steps"][0]["predictions"] == b["steps"][0]["predictions"]


def test_tokenizer_fingerprint_is_stable_and_sensitive(tmp_path, tiny_base):
    from transformers import AutoTokenizer

    from shrinkwrap.serve.fingerprint import tokenizer_fingerprint_of, tokenizer_fingerprint_of_file

    tok = AutoTokenizer.from_pretrained(tiny_base)
    fp = tokenizer_fingerprint_of(tok)
    assert fp == tokenizer_fingerprint_of_file(tiny_base / "tokenizer.json")
    tok.save_pretrained(tmp_path / "saved")
    assert tokenizer_fingerprint_of_file(tmp_path / "saved" / "tokenizer.json") == fp
    tok.add_tokens(["zzqx"])
    assert tokenizer_fingerprint_of(tok) != fp
    lower = json.loads((tiny_base / "tokenizer.json").read_text())
    lower["normalizer"]["lowercase"] = not lower["normalizer"]["lowercase"]
    from shrinkwrap.serve.fingerprint import tokenizer_fingerprint

    assert tokenizer_fingerprint(lower) != fp  # normalisation settings count too


def test_a_finished_step_with_another_tokenizer_is_refused(tiny_run_copy, tmp_path, tiny_base, keyword_csv):
    from transformers import AutoTokenizer

    from shrinkwrap.chain.runner import run_chain

    tok = AutoTokenizer.from_pretrained(tiny_run_copy / "student")
    tok.add_tokens(["zzqx"])
    tok.save_pretrained(tiny_run_copy / "student")
    with pytest.raises(UserError, match=r"student: the tokenizer in .* differs from the teacher's tokenizer"):
        run_chain(_recipe(tmp_path, tiny_base, keyword_csv), tiny_run_copy, quiet=True)


def test_pair_encoding_matches_the_tokenizers_own_pair_output(tiny_base):
    from transformers import AutoTokenizer

    from shrinkwrap.ml.data import Split
    from shrinkwrap.serve.batches import encode

    tok = AutoTokenizer.from_pretrained(tiny_base)
    split = Split(texts=["my router is offline", "refund please"], pairs=["since monday", "charged twice"],
                  labels=np.array([0, 1]))
    enc = encode(tok, split, max_length=32)
    for i, (a, b) in enumerate(zip(split.texts, split.pairs)):
        ref = tok(a, b, truncation=True, max_length=32)
        assert enc[i]["input_ids"] == ref["input_ids"]
        assert enc[i]["token_type_ids"] == ref["token_type_ids"]
        ids = enc[i]["input_ids"]
        # [CLS] a [SEP] b [SEP], segment 1 on the second text and its [SEP]
        assert ids[0] == tok.cls_token_id and ids.count(tok.sep_token_id) == 2 and ids[-1] == tok.sep_token_id
        first_sep = ids.index(tok.sep_token_id)
        assert enc[i]["token_type_ids"] == [0] * (first_sep + 1) + [1] * (len(ids) - first_sep - 1)
    # a model without segment ids: its tokenizer does not produce them, and neither do we
    tok.model_input_names = ["input_ids", "attention_mask"]
    assert "token_type_ids" not in encode(tok, split, max_length=32)[0]


def test_text_pairs_train_end_to_end(tmp_path, tiny_base):
    from shrinkwrap.chain.runner import run_chain
    from shrinkwrap.recipe.schema import load_recipe

    rows = [(t.split()[0], " ".join(t.split()[1:]), y) for t, y in keyword_rows(120)]
    data = write_csv(tmp_path / "pairs.csv", rows, header=("subject", "body", "label"))
    recipe = tiny_recipe(tiny_base, data)
    recipe["data"].update(text="subject", text_pair="body")
    results = run_chain(load_recipe(write_recipe(tmp_path / "r.yaml", recipe)), tmp_path / "run", quiet=True,
                        until="teacher")
    assert results["recipe"]["data"]["text_pair"] == "body"
    assert results["steps"][0]["metrics"]["accuracy"] > 0.5  # 3 classes: chance is 1/3


def test_schedule_is_transformers_linear_warmup_shifted_by_one_step():
    """Reference: transformers.get_linear_schedule_with_warmup. Ours equals its factor one step later during
    warm-up (no optimizer step at learning rate 0) and exactly its factor during the decay."""
    import torch
    from transformers import get_linear_schedule_with_warmup

    from shrinkwrap.ml.train import linear_schedule

    warmup, total = 7, 40
    ours, ref = [], []
    for make, out in ((linear_schedule, ours), (get_linear_schedule_with_warmup, ref)):
        opt = torch.optim.SGD([torch.nn.Parameter(torch.zeros(1))], lr=1.0)
        sched = make(opt, warmup, total)
        for _ in range(total):
            out.append(opt.param_groups[0]["lr"])
            opt.step()
            sched.step()
    assert ref[0] == 0.0 and ours[0] == 1 / warmup
    for step in range(warmup):
        assert abs(ours[step] - ref[step + 1]) < 1e-12 if step + 1 < warmup else abs(ours[step] - 1.0) < 1e-12
    for step in range(warmup, total):
        assert abs(ours[step] - ref[step]) < 1e-12
    assert max(ours) == 1.0 and ours[-1] == 1 / (total - warmup)
