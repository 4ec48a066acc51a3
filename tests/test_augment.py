"""Augmented copies of the training texts (Tang et al. 2019, "Distilling Task-Specific Knowledge from BERT
into Simple Neural Networks", section 3.3: masking, same-slot word replacement, n-gram sampling; plus
swapping the texts of a symmetric pair), and the student step distilling on them."""
import math
import shutil

import numpy as np
import pytest
from conftest import tiny_recipe, write_recipe
from scipy import stats

from shrinkwrap.ml import augment
from shrinkwrap.ml.augment import Vocabulary, augment_one, augment_split, in_split, ngram_rule, words_rule
from shrinkwrap.ml.data import Split
from shrinkwrap.serve.errors import UserError

TEXTS = ["the cat sat on the mat", "a dog ran in the park today", "the bird sang on a wire",
         "my cat ran to the door", "a bird sat in the tree"]


def _split(texts=TEXTS, pairs=None) -> Split:
    return Split(list(texts), np.zeros(len(texts), dtype=np.int64), pairs)


# --- each rule ---

def test_masking_and_replacing_are_exclusive_per_word():
    # The paper draws one X per word: X < p_mask masks, p_mask <= X < p_mask + p_pos replaces, so with both at
    # 0.5 no word survives, and the masked share is p_mask.
    vocab, rng = Vocabulary(TEXTS), np.random.default_rng(0)
    words = " ".join(TEXTS * 40).split()
    out = words_rule(words, vocab, "[MASK]", rng, 0.5, 0.5)
    assert not any(o == w for o, w in zip(out, words))
    masked = np.mean([o == "[MASK]" for o in out])
    assert abs(masked - 0.5) < 4 * math.sqrt(0.25 / len(words))   # binomial, 4 standard deviations


def test_mask_rate_is_the_papers_p_mask():
    vocab, rng = Vocabulary(TEXTS), np.random.default_rng(1)
    words = " ".join(TEXTS * 400).split()
    out = words_rule(words, vocab, "[MASK]", rng, augment.P_MASK, 0.0)
    share = np.mean([o == "[MASK]" for o in out])
    assert abs(share - 0.1) < 4 * math.sqrt(0.09 / len(words))
    assert all(o in ("[MASK]", w) for o, w in zip(out, words))


def test_a_replacement_follows_the_same_word_in_the_training_texts():
    # Checked against the texts' bigrams counted here, independently of Vocabulary.
    bigrams = {(a, b) for t in TEXTS for a, b in zip(["<s>"] + t.split(), t.split())}
    vocab, rng = Vocabulary(TEXTS), np.random.default_rng(2)
    every = {w for t in TEXTS for w in t.split()}
    for text in TEXTS * 20:
        words = text.split()
        out = words_rule(words, vocab, "[MASK]", rng, 0.0, 1.0)
        for prev, word, new in zip(["<s>"] + words, words, out):
            assert new != word and new in every
            others = {b for a, b in bigrams if a == prev and b != word}
            if others:  # a slot with other words seen in it draws from them; otherwise from every word
                assert new in others, (prev, word, new)


def test_ngram_keeps_a_window_of_1_to_5_words_drawn_uniformly():
    rng = np.random.default_rng(3)
    words = "one two three four five six seven eight".split()
    sizes = []
    for _ in range(5000):
        out = ngram_rule(words, rng)
        start = words.index(out[0])
        assert out == words[start:start + len(out)]     # consecutive words of the text
        sizes.append(len(out))
    counts = np.bincount(sizes, minlength=6)[1:]
    assert counts.sum() == 5000 and stats.chisquare(counts).pvalue > 1e-3   # uniform over n = 1..5
    assert ngram_rule(["solo"], rng) == ["solo"]


def test_ngram_is_applied_to_a_quarter_of_the_copies():
    vocab, rng = Vocabulary(TEXTS), np.random.default_rng(4)
    text = "one two three four five six seven"
    cut = sum(len(augment_one(text, None, vocab, ["ngram"], "[MASK]", rng)[0].split()) < 7 for _ in range(4000))
    assert abs(cut / 4000 - augment.P_NGRAM) < 4 * math.sqrt(0.25 * 0.75 / 4000)


def test_swap_exchanges_the_texts_of_half_the_pairs_and_nothing_else():
    vocab, rng = Vocabulary(TEXTS), np.random.default_rng(5)
    made = [augment_one("left side", "right side", vocab, ["swap"], "[MASK]", rng) for _ in range(2000)]
    assert set(made) == {("left side", "right side"), ("right side", "left side")}
    share = np.mean([m == ("right side", "left side") for m in made])
    assert abs(share - 0.5) < 4 * math.sqrt(0.25 / 2000)


def test_pairs_change_word_by_word_on_both_sides():
    seconds = [" ".join(reversed(t.split())) for t in TEXTS]
    split, source = augment_split(_split(pairs=seconds), 3, ["mask"], 0, "[MASK]")
    assert split.pairs is not None and len(split.pairs) == len(split.texts) == len(source)
    for text, pair, i in zip(split.texts, split.pairs, source):
        for made, orig in ((text, TEXTS[i]), (pair, seconds[i])):   # same words, some masked, in place
            assert len(made.split()) == len(orig.split())
            assert all(m in ("[MASK]", o) for m, o in zip(made.split(), orig.split()))
    assert any("[MASK]" in p for p in split.pairs) and any("[MASK]" in t for t in split.texts)


# --- the copies as a whole ---

def test_copies_are_deterministic_given_the_seed_and_drop_duplicates():
    a, src_a = augment_split(_split(), 4, ["mask", "replace", "ngram"], 7, "[MASK]")
    b, src_b = augment_split(_split(), 4, ["mask", "replace", "ngram"], 7, "[MASK]")
    c, _ = augment_split(_split(), 4, ["mask", "replace", "ngram"], 8, "[MASK]")
    assert a.texts == b.texts and np.array_equal(src_a, src_b) and a.texts != c.texts
    assert (a.labels == -1).all()
    for i, text in enumerate(TEXTS):
        mine = [t for t, s in zip(a.texts, src_a) if s == i]
        assert len(mine) == len(set(mine)) <= 4 and text not in mine
    # the copies of a text do not depend on the other texts (no vocabulary needed without replace)
    alone, _ = augment_split(_split(TEXTS[:1]), 4, ["mask", "ngram"], 7, "[MASK]")
    full, src = augment_split(_split(), 4, ["mask", "ngram"], 7, "[MASK]")
    assert alone.texts == [t for t, s in zip(full.texts, src) if s == 0]
    # a one-word text that only n-gram sampling touches has no copy unlike itself
    assert len(augment_split(_split(["solo"]), 5, ["ngram"], 0, "[MASK]")[0]) == 0


def test_test_texts_reproduced_are_counted():
    test = _split(["the cat", "dog ran", "nothing like it"])
    assert in_split(_split(["the cat", "the cat", "dog ran", "cat the"]), test) == 3
    paired = Split(["a", "a"], np.zeros(2, dtype=np.int64), ["b", "c"])
    assert in_split(paired, Split(["a"], np.zeros(1, dtype=np.int64), ["b"])) == 1


def test_recipe_checks_of_the_augment_section(tiny_base, keyword_csv):
    from shrinkwrap.recipe.schema import validate_recipe

    def check(**augment_keys):
        return validate_recipe(tiny_recipe(tiny_base, keyword_csv, augment=augment_keys), "r.yaml")

    assert check().augment.copies == 0 and check().augment.transforms == ["mask", "replace", "ngram"]
    for keys, message in [({"transforms": ["swap"]}, "swap exchanges the two texts of a pair"),
                          ({"copies": -1}, "augment.copies = -1"),
                          ({"transforms": ["mask", "mask"]}, "mask is repeated"),
                          ({"transforms": ["shuffle"]}, r"augment\.transforms\[0\] = \"shuffle\"")]:
        with pytest.raises(UserError, match=message) as e:
            check(**keys)
        assert "\n" not in str(e.value)


# --- the student step distilling on them (tiny model) ---

@pytest.fixture
def teacher_done(tiny_run, tmp_path):
    (tmp_path / "run").mkdir()
    shutil.copytree(tiny_run / "teacher", tmp_path / "run" / "teacher")
    return tmp_path


def _run(folder, base, data, student=None, **augment_keys):
    from shrinkwrap.chain.runner import run_chain
    from shrinkwrap.recipe.schema import load_recipe

    recipe = tiny_recipe(base, data, student=student or {}, augment=augment_keys)
    recipe = load_recipe(write_recipe(folder / "r.yaml", recipe))
    return recipe, run_chain(recipe, folder / "run", quiet=True, until="student")


def _soft_targets(recipe, run):
    """The student step's soft targets for `recipe` over the finished teacher in `run`, and the cache's answer."""
    import json

    from shrinkwrap.chain.preflight import prepare
    from shrinkwrap.ml.classification import load as load_classifier
    from shrinkwrap.ml.distillation import soft_targets

    ctx = prepare(recipe, run, quiet=True)
    ctx.fingerprints["teacher"] = json.loads((run / "teacher" / "step.json").read_text())["fingerprint"]
    examples, labels, targets, cache_info = soft_targets(ctx, load_classifier(str(run / "teacher")), [], False, False)
    return ctx, examples, labels, cache_info


def test_student_distils_on_augmented_copies_labelled_once(teacher_done, tiny_base, keyword_csv):
    from shrinkwrap.recipe.schema import load_recipe

    run = teacher_done / "run"
    recipe, results = _run(teacher_done, tiny_base, keyword_csv, copies=2, seed=3)
    info = results["steps"][1]["info"]
    assert info["teacher_outputs"]["cache"] == "miss"
    ctx, examples, labels, cache_info = _soft_targets(recipe, run)
    assert cache_info["cache"] == "hit"       # the same settings again: the teacher is not run again
    data = ctx.data
    expected, source = augment_split(data.train, 2, ["mask", "replace", "ngram"], 3, "[MASK]")
    assert info["augmented_texts"] == len(expected) > len(data.train)
    assert source.max() < len(data.train)       # made from training texts only
    train_words = {w for t in data.train.texts for w in t.split()} | {"[MASK]"}
    assert all(set(t.split()) <= train_words for t in expected.texts)
    assert results["data"]["augmented_in_test"] == in_split(expected, data.test)
    # the distillation set: the training texts with their labels, then the copies with none (-1)
    assert len(examples) == len(labels) == len(data.train) + len(expected)
    assert np.array_equal(labels[:len(data.train)], data.train.labels) and (labels[len(data.train):] == -1).all()
    # the teacher labelled the training texts and every copy once; the soft targets on the copies are its
    # own logits on them (recomputed here with transformers alone)
    caches = list((run / "cache").glob("teacher-outputs-*"))
    assert len(caches) == 1
    logits = np.load(caches[0] / "logits.npy")
    assert logits.shape == (len(data.train) + len(expected), 3)
    import torch
    from transformers import AutoModelForSequenceClassification, AutoTokenizer

    teacher = AutoModelForSequenceClassification.from_pretrained(run / "teacher").eval()
    tok = AutoTokenizer.from_pretrained(run / "teacher")
    with torch.no_grad():
        ref = teacher(**tok(expected.texts[:4], truncation=True, max_length=32, padding=True,
                            return_tensors="pt")).logits.numpy()
    assert np.allclose(logits[len(data.train):len(data.train) + 4], ref, atol=1e-4)
    # other augment settings are other copies: labelled anew, in a cache of their own
    other = load_recipe(write_recipe(teacher_done / "r2.yaml", tiny_recipe(
        tiny_base, keyword_csv, augment={"copies": 2, "seed": 4})))
    assert _soft_targets(other, run)[3]["cache"] == "miss"
    assert len(list((run / "cache").glob("teacher-outputs-*"))) == 2


def test_augmented_test_texts_are_a_caution(tiny_run):
    import json

    from shrinkwrap.outputs.findings import cautions

    results = json.loads((tiny_run / "results.json").read_text())
    assert not any("augmented" in line for line in cautions(results))
    results["data"]["augmented_in_test"] = 3
    assert any(line.startswith("3 augmented copies of training texts are also test texts")
               for line in cautions(results))


def test_student_stops_on_agreement_and_scales_its_epochs(teacher_done, tiny_base, keyword_csv):
    from shrinkwrap.ml.distillation import scaled_epochs

    recipe, results = _run(teacher_done, tiny_base, keyword_csv, student={"metric": "agreement", "epochs": None,
                                                                           "patience": 1})
    info = results["steps"][1]["info"]
    assert info["metric"] == "agreement"
    curve = info["curve"]
    assert all(0 <= e["agreement"] <= 1 for e in curve)
    best = max(range(len(curve)), key=lambda i: (curve[i]["agreement"], -i))
    assert info["best_epoch"] == curve[best]["epoch"]
    # the rule the README states: ceil(30,000 / texts distilled on) within 3..10
    assert scaled_epochs(100) == 10 and scaled_epochs(4000) == 8 and scaled_epochs(18_500) == 3
    assert scaled_epochs(1_000_000) == 3
    assert info["epochs"] == scaled_epochs(results["data"]["sizes"]["train"]) >= len(curve)
    assert info["epochs_from"].startswith("scaled")


def test_pair_copies_with_swap_are_encoded_as_pairs(tmp_path, tiny_base):
    from conftest import keyword_rows, write_csv

    from shrinkwrap.chain.preflight import prepare
    from shrinkwrap.recipe.schema import load_recipe

    rows = [(" ".join(t.split()[:3]), " ".join(t.split()[3:]), y) for t, y in keyword_rows(60)]
    data = write_csv(tmp_path / "pairs.csv", rows, header=("first", "second", "label"))
    recipe = tiny_recipe(tiny_base, data, augment={"copies": 3, "transforms": ["swap", "mask"]})
    recipe["data"].update(text="first", text_pair="second")
    ctx = prepare(load_recipe(write_recipe(tmp_path / "r.yaml", recipe)), tmp_path / "run", quiet=True)
    split, source, encoded = ctx.augmented()
    train = ctx.data.train
    swapped = [j for j, i in enumerate(source)
               if split.texts[j].split() != train.texts[i].split()
               and len(split.texts[j].split()) == len(train.pairs[i].split())
               and all(m in ("[MASK]", o) for m, o in zip(split.texts[j].split(), train.pairs[i].split()))]
    assert swapped and len(swapped) < len(split)
    j = swapped[0]
    # the copy is read as a pair, its first text in segment 0 (checked against the tokenizer's own pair call)
    want = ctx.tokenizer(split.texts[j], split.pairs[j], truncation=True, max_length=32)
    assert encoded[j]["input_ids"] == want["input_ids"] and encoded[j]["token_type_ids"] == want["token_type_ids"]
    assert set(want["token_type_ids"]) == {0, 1}


def test_mask_needs_a_mask_token(tmp_path, tiny_base, keyword_csv):
    from transformers import AutoTokenizer

    from shrinkwrap.chain.preflight import prepare
    from shrinkwrap.recipe.schema import load_recipe

    base = tmp_path / "base"
    shutil.copytree(tiny_base, base)
    tok = AutoTokenizer.from_pretrained(base)
    tok.mask_token, tok.unk_token = None, None
    tok.save_pretrained(base)
    for transforms, refused in ((["mask", "ngram"], True), (["ngram"], False)):
        recipe = load_recipe(write_recipe(tmp_path / "r.yaml", tiny_recipe(
            base, keyword_csv, augment={"copies": 1, "transforms": transforms})))
        if refused:
            with pytest.raises(UserError, match="augment.transforms lists mask, but the teacher's tokenizer has no mask"):
                prepare(recipe, tmp_path / "run")
        else:
            assert prepare(recipe, tmp_path / "run", quiet=True).augmented()[0].texts
