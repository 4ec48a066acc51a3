"""Vocabulary trimming (step student-trimmed), the tokenizer-fingerprint rule of a chain whose tokenizer
changes, and the chain with both optional levers (student-pruned, student-trimmed) enabled."""
import json
import os
import shutil

import numpy as np
import pytest
import torch
from conftest import tiny_recipe, write_recipe

from shrinkwrap.serve.errors import UserError

PRUNE = {"enabled": True, "heads_removed": 1, "neurons_removed_share": 0.25, "epochs": 1}


def _recipe(folder, tiny_base, keyword_csv, **sections):
    from shrinkwrap.recipe.schema import load_recipe

    return load_recipe(write_recipe(folder / "r.yaml", tiny_recipe(tiny_base, keyword_csv, **sections)))


@pytest.fixture
def student_done(tiny_run, tmp_path):
    """A run folder whose teacher and student steps are finished (copied from the tiny run)."""
    for step in ("teacher", "student"):
        shutil.copytree(tiny_run / step, tmp_path / "run" / step)
    return tmp_path


@pytest.fixture
def trimmed(student_done, tiny_base, keyword_csv):
    from shrinkwrap.chain.preflight import prepare
    from shrinkwrap.chain.runner import run_chain

    recipe = _recipe(student_done, tiny_base, keyword_csv, trim_vocab={"enabled": True})
    results = run_chain(recipe, student_done / "run", quiet=True, until="student-trimmed")
    return student_done / "run", results, prepare(recipe, student_done / "run", quiet=True)


def _kept(original, small) -> list[int]:
    """Old id of each piece of the trimmed vocabulary, by new id."""
    old, new = original.get_vocab(), small.get_vocab()
    by_new = sorted(new, key=new.get)
    assert [new[p] for p in by_new] == list(range(len(new)))  # contiguous new ids
    return [old[p] for p in by_new]


def test_trimmed_tokenizer_splits_every_training_text_as_before(trimmed):
    from transformers import AutoTokenizer

    run, results, ctx = trimmed
    original = AutoTokenizer.from_pretrained(run / "student")
    small = AutoTokenizer.from_pretrained(run / "student-trimmed")
    kept = _kept(original, small)
    assert kept == sorted(kept)  # the original order is kept, so [PAD] stays first
    assert len(small) < len(original) / 100
    for text in ctx.data.train.texts:
        a, b = original(text), small(text)
        assert small.convert_ids_to_tokens(b["input_ids"]) == original.convert_ids_to_tokens(a["input_ids"])
        assert [kept[i] for i in b["input_ids"]] == a["input_ids"]
    # every special token is kept, under the id the tokenizer and its post-processor use
    for token in original.all_special_tokens:
        assert token in small.get_vocab()
    ids = small("refund please")["input_ids"]
    assert ids[0] == small.cls_token_id and ids[-1] == small.sep_token_id
    assert small.pad_token_id == small.get_vocab()["[PAD]"] == 0
    spec = json.loads((run / "student-trimmed" / "tokenizer.json").read_text())
    assert spec["post_processor"]["special_tokens"]["[CLS]"]["ids"] == [small.cls_token_id]
    assert {t["content"]: t["id"] for t in spec["added_tokens"]} == {t: small.get_vocab()[t] for t in
                                                                      original.all_special_tokens}


def test_unseen_words_fall_back_as_wordpiece_does_with_the_smaller_vocabulary(trimmed):
    from tokenizers import Tokenizer, models, normalizers, pre_tokenizers
    from transformers import AutoTokenizer

    run, _, _ = trimmed
    original = AutoTokenizer.from_pretrained(run / "student")
    small = AutoTokenizer.from_pretrained(run / "student-trimmed")
    # Reference: the `tokenizers` library's own WordPiece over the kept pieces, built here from scratch with
    # BERT's uncased normaliser and pre-tokenizer.
    reference = Tokenizer(models.WordPiece(vocab=small.get_vocab(), unk_token="[UNK]", continuing_subword_prefix="##",
                                           max_input_chars_per_word=100))
    reference.normalizer = normalizers.BertNormalizer(lowercase=True)
    reference.pre_tokenizer = pre_tokenizers.BertPreTokenizer()
    words = ["outline", "offund", "morningline", "refunds", "xylophone", "Router Outage", "loginhelp"]
    changed_not_unknown = 0
    for w in words:
        got = small.tokenize(w)
        assert got == reference.encode(w, add_special_tokens=False).tokens, w
        if got != original.tokenize(w) and "[UNK]" not in got:
            changed_not_unknown += 1
    assert small.tokenize("outline") == ["out", "##line"] and original.tokenize("outline") == ["outline"]
    assert small.tokenize("xylophone") == ["[UNK]"]
    assert changed_not_unknown >= 1


def test_trimmed_embeddings_are_the_gathered_rows_and_logits_are_unchanged(trimmed):
    from transformers import AutoTokenizer

    from shrinkwrap.ml.classification import load as load_classifier
    from shrinkwrap.ml.train import predict_outputs
    from shrinkwrap.serve.batches import encode

    run, results, ctx = trimmed
    original = AutoTokenizer.from_pretrained(run / "student")
    small = AutoTokenizer.from_pretrained(run / "student-trimmed")
    kept = _kept(original, small)
    before, after = load_classifier(str(run / "student")), load_classifier(str(run / "student-trimmed"))
    w_before, w_after = before.get_input_embeddings().weight, after.get_input_embeddings().weight
    assert after.config.vocab_size == len(kept) == w_after.shape[0]
    assert torch.equal(w_after, w_before[torch.as_tensor(kept)])
    logits_before = predict_outputs(before, encode(original, ctx.data.train, 32), original.pad_token_id)
    logits_after = predict_outputs(after, encode(small, ctx.data.train, 32), small.pad_token_id)
    assert np.abs(logits_before - logits_after).max() <= 1e-5
    # the step's report, recomputed here: test tokens (original ids, specials left out) whose piece was dropped
    info = results["steps"][-1]["info"]
    special = set(original.all_special_ids)
    test_ids = [i for e in ctx.encoded["test"] for i in e["input_ids"] if i not in special]
    assert info["vocab_size"] == len(kept) and info["vocab_size_before"] == len(original)
    assert info["embedding_bytes"] == len(kept) * w_after.shape[1] * 4
    assert info["embedding_bytes_before"] == len(original) * w_after.shape[1] * 4
    assert info["test_oov_rate"] == pytest.approx(np.mean([i not in set(kept) for i in test_ids]), abs=1e-6)
    # the row's accuracy is measured with the trimmed tokenizer: the same predictions as the student's
    rows = {s["name"]: s for s in results["steps"]}
    assert rows["student-trimmed"]["tokenizer_fingerprint"] != results["tokenizer_fingerprint"]
    student_on_test = predict_outputs(before, ctx.encoded["test"], original.pad_token_id).argmax(1)
    assert rows["student-trimmed"]["predictions"] == student_on_test.tolist()


def test_a_step_after_the_trimmed_one_must_carry_the_trimmed_tokenizer(trimmed, tiny_base, keyword_csv):
    from shrinkwrap.chain.runner import run_chain
    from shrinkwrap.serve.fingerprint import tokenizer_fingerprint_of_file

    run, results, ctx = trimmed
    record = json.loads((run / "student-trimmed" / "step.json").read_text())
    assert record["tokenizer_derived_from"] == ctx.tokenizer_fp
    assert record["tokenizer_fingerprint"] == tokenizer_fingerprint_of_file(run / "student-trimmed" / "tokenizer.json")
    recipe = _recipe(run.parent, tiny_base, keyword_csv, trim_vocab={"enabled": True}, quantize={"enabled": True})
    run_chain(recipe, run, quiet=True, until="student-int8")
    # the int8 step read the trimmed student: the teacher's tokenizer there is refused on reuse
    shutil.copy(run / "student" / "tokenizer.json", run / "student-int8" / "tokenizer.json")
    with pytest.raises(UserError, match=r"student-int8: the tokenizer in .* differs from the student-trimmed's"):
        run_chain(recipe, run, quiet=True, until="student-int8")
    # and the trimmed step's own output must still hold the tokenizer its step.json records
    shutil.copy(run / "student" / "tokenizer.json", run / "student-trimmed" / "tokenizer.json")
    with pytest.raises(UserError, match=r"student-trimmed: the tokenizer in .* is not the one the step wrote"):
        run_chain(recipe, run, quiet=True, until="student-trimmed")


def test_chain_with_both_levers(student_done, tiny_base, keyword_csv):
    from shrinkwrap.chain.pipeline import run_recipe
    from shrinkwrap.serve.artifact import load

    run = student_done / "run"
    recipe = _recipe(student_done, tiny_base, keyword_csv, prune=PRUNE, trim_vocab={"enabled": True})
    results = run_recipe(recipe, run, quiet=True)
    names = [s["name"] for s in results["steps"]]
    assert names == ["teacher", "student", "student-pruned", "student-trimmed", "student-int8", "student-onnx",
                     "student-onnx-int8"]
    after = {n: json.loads((run / n / "step.json").read_text())["after"] for n in names}
    assert after["student-trimmed"] == "student-pruned" and after["student-pruned"] == "student"
    assert after["student-int8"] == after["student-onnx"] == "student-trimmed"
    # the ONNX graph is the pruned and trimmed student: its embedding table has the trimmed vocabulary
    trimmed_fp = results["steps"][3]["tokenizer_fingerprint"]
    assert all(s["tokenizer_fingerprint"] == trimmed_fp for s in results["steps"][3:])
    onnx_config = json.loads((run / "student-onnx" / "config.json").read_text())
    assert onnx_config["vocab_size"] == results["steps"][3]["info"]["vocab_size"]
    assert onnx_config["intermediate_size"] == 48 and onnx_config["pruned_heads"] == {
        k: v for k, v in results["steps"][2]["info"]["heads_removed"].items()}
    # the artifact carries the trimmed tokenizer, and predicts what the final step recorded
    art = load(run / "artifact")
    assert art.manifest["tokenizer"]["fingerprint"] == trimmed_fp
    from shrinkwrap.chain.preflight import prepare

    ctx = prepare(recipe, run, quiet=True)
    preds = art.outputs(ctx.data.test.texts).argmax(1)
    assert np.mean(preds == np.array(results["steps"][-1]["predictions"])) == 1.0
    # a rerun reuses every step
    stamps = {n: os.stat(run / n / "step.json").st_mtime_ns for n in names}
    again = run_recipe(recipe, run, quiet=True)
    assert {n: os.stat(run / n / "step.json").st_mtime_ns for n in names} == stamps
    assert [s["metrics"] for s in again["steps"]] == [s["metrics"] for s in results["steps"]]


def test_trimming_a_word_level_tokenizer_is_refused_before_anything_runs(tmp_path, tiny_base, keyword_csv):
    from tokenizers import Tokenizer, models, pre_tokenizers
    from transformers import PreTrainedTokenizerFast

    from shrinkwrap.chain.preflight import prepare

    base = tmp_path / "base"
    shutil.copytree(tiny_base, base)
    for f in base.glob("*"):
        if f.name.startswith(("tokenizer", "vocab", "special_tokens")):
            f.unlink()
    words = Tokenizer(models.WordLevel(vocab={"[UNK]": 0, "[PAD]": 1, "refund": 2}, unk_token="[UNK]"))
    words.pre_tokenizer = pre_tokenizers.Whitespace()
    PreTrainedTokenizerFast(tokenizer_object=words, unk_token="[UNK]", pad_token="[PAD]").save_pretrained(base)
    recipe = _recipe(tmp_path, base, keyword_csv, trim_vocab={"enabled": True})
    with pytest.raises(UserError, match=r"trim_vocab.enabled — the tokenizer of the 'bert' teacher is WordLevel; step student-trimmed"):
        prepare(recipe, tmp_path / "run")
    assert not (tmp_path / "run").exists()


def test_transfer_texts_keep_their_pieces_too(tmp_path, tiny_base, keyword_csv):
    """The transfer texts are read from their table on disk, a batch at a time, and their pieces kept."""
    from transformers import AutoTokenizer

    from shrinkwrap.chain.runner import run_chain

    extra = ["the zeppelin hangar flooded", "quokka sightings near the router"] * 700   # more than one batch
    (tmp_path / "more.txt").write_text("\n".join(extra) + "\n")
    recipe = _recipe(tmp_path, tiny_base, keyword_csv, trim_vocab={"enabled": True},
                     student={"transfer_path": str(tmp_path / "more.txt"), "epochs": 1})
    results = run_chain(recipe, tmp_path / "run", quiet=True, until="student-trimmed")
    original = AutoTokenizer.from_pretrained(tmp_path / "run" / "student")
    small = AutoTokenizer.from_pretrained(tmp_path / "run" / "student-trimmed")
    for text in extra[:2]:
        assert small.tokenize(text) == original.tokenize(text)
        assert small.unk_token not in small.tokenize(text)
    info = next(s for s in results["steps"] if s["name"] == "student-trimmed")["info"]
    from shrinkwrap.chain.preflight import prepare

    assert info["texts"] == len(extra) + len(prepare(recipe, tmp_path / "run", quiet=True).data.train)
