"""Augmented copies of the training texts for the transfer set (Tang et al. 2019, "Distilling
Task-Specific Knowledge from BERT into Simple Neural Networks", section 3.3).

Each copy of a text goes word by word: with probability P_MASK a word becomes the tokenizer's mask
token (`mask`); with probability P_REPLACE (exclusive of masking, as in the paper) it becomes another
word (`replace`). Then, with probability P_NGRAM, only a random window of 1 to 5 consecutive words is
kept (`ngram`). For pairs, the words of both texts are treated alike and the window is drawn for each
text on its own; `swap` exchanges the two texts of a pair with probability 1/2 — meant only for tasks
whose label does not depend on the order (a paraphrase is one, an entailment is not).

The paper replaces a word by another of the same part of speech, which needs a tagger. None is
shipped and nothing is downloaded: the stand-in is a word that follows the same word somewhere in the
training texts (a distributional category; words in the same slot are mostly of the same part of
speech), drawn by frequency; a word with no other such follower gets any word of the training texts.

Every copy of text i is drawn from its own generator, seeded by (seed, i): the copies do not depend on
the order of the other texts nor on how many there are. A copy equal to its text, or to an earlier
copy of it, is dropped (the paper discards duplicates too): the teacher's label on it adds nothing.
"""
from __future__ import annotations

from collections import defaultdict
from typing import Optional, Sequence

import numpy as np

from shrinkwrap.ml.data import Split

P_MASK, P_REPLACE, P_NGRAM, MAX_N = 0.1, 0.1, 0.25, 5   # the paper's settings (p_mask, p_pos, p_ng, n ≤ 5)
START = "\0"                                             # the "word" before a text's first word


class Vocabulary:
    """The training texts' words, by the word before them: where `replace` draws from."""

    def __init__(self, texts: Sequence[str]):
        followers: dict[str, list[str]] = defaultdict(list)
        every: list[str] = []
        for text in texts:
            words = text.split()
            every.extend(words)
            for prev, word in zip([START] + words, words):
                followers[prev].append(word)
        self.followers, self.every = dict(followers), every
        # the distinct words of each pool, so that "is there another word?" costs no pass over the pool
        self.distinct = {prev: set(pool) for prev, pool in self.followers.items()}
        self.every_distinct = set(every)

    def draw(self, prev: str, word: str, rng: np.random.Generator) -> str:
        """Another word that follows `prev` in the training texts, by frequency; failing that, any word."""
        for pool, distinct in ((self.followers.get(prev, ()), self.distinct.get(prev, set())),
                               (self.every, self.every_distinct)):
            if len(distinct) > 1 or (distinct and word not in distinct):
                while True:  # drawn by frequency among the pool's other words
                    pick = pool[rng.integers(len(pool))]
                    if pick != word:
                        return pick
        return word


def words_rule(words: list[str], vocab: Vocabulary, mask_token: str, rng: np.random.Generator,
               p_mask: float, p_replace: float) -> list[str]:
    """The paper's per-word rule: one uniform draw X per word; X < p_mask masks it, p_mask ≤ X <
    p_mask + p_replace replaces it; the word before is the original one (the slot's context)."""
    out = []
    for prev, word in zip([START] + words, words):
        x = rng.random()
        out.append(mask_token if x < p_mask else vocab.draw(prev, word, rng) if x < p_mask + p_replace else word)
    return out


def ngram_rule(words: list[str], rng: np.random.Generator) -> list[str]:
    """n drawn uniformly from 1..5 (at most the text's length), then a window of n words at a uniform place."""
    if not words:
        return words
    n = int(rng.integers(1, min(MAX_N, len(words)) + 1))
    start = int(rng.integers(0, len(words) - n + 1))
    return words[start:start + n]


def augment_one(text: str, pair: Optional[str], vocab: Vocabulary, transforms: Sequence[str], mask_token: str,
                rng: np.random.Generator) -> tuple[str, Optional[str]]:
    p_mask = P_MASK if "mask" in transforms else 0.0
    p_replace = P_REPLACE if "replace" in transforms else 0.0
    ngram = "ngram" in transforms and rng.random() < P_NGRAM
    sides = [text] if pair is None else [text, pair]
    out = []
    for side in sides:
        words = words_rule(side.split(), vocab, mask_token, rng, p_mask, p_replace)
        if ngram:
            words = ngram_rule(words, rng)
        out.append(" ".join(words) if words else side)
    if pair is not None and "swap" in transforms and rng.random() < 0.5:
        out.reverse()
    return out[0], (out[1] if pair is not None else None)


def augment_split(train: Split, copies: int, transforms: Sequence[str], seed: int,
                  mask_token: str) -> tuple[Split, np.ndarray]:
    """Up to `copies` augmented copies of every training text (label -1: soft targets only), the
    copies of text 0 first, and for each the index of the training text it came from."""
    vocab = Vocabulary(list(train.texts) + list(train.pairs or []))
    texts, pairs, source = [], [], []
    for i, text in enumerate(train.texts):
        pair = train.pairs[i] if train.pairs is not None else None
        rng = np.random.default_rng([seed, i])
        seen = {(text, pair)}
        for _ in range(copies):
            made = augment_one(text, pair, vocab, transforms, mask_token, rng)
            if made not in seen:
                seen.add(made)
                texts.append(made[0])
                pairs.append(made[1])
                source.append(i)
    split = Split(texts, np.full(len(texts), -1, dtype=np.int64), pairs if train.pairs is not None else None)
    return split, np.array(source, dtype=np.int64)


def in_split(augmented: Split, other: Split) -> int:
    """How many augmented texts (pairs: both texts) are also a text of `other` (the test split)."""
    pairs = other.pairs if other.pairs is not None else [None] * len(other)
    known = set(zip(other.texts, pairs))
    mine = augmented.pairs if augmented.pairs is not None else [None] * len(augmented)
    return sum((t, p) in known for t, p in zip(augmented.texts, mine))
