"""Encoded examples and their batches: token ids, padding, length-sorted batches.

Numpy and the standard library only: the torch-free predict path (shrinkwrap.serve.artifact) batches
through here too, so predict pads exactly as the chain's accuracy pass does.

Encoded examples are a list of dicts (`encode`) or rows on disk (transfer.ArrowExamples); code that
reads them goes through `take` and `lengths`, so that both work.
"""
from __future__ import annotations

from typing import Optional

import numpy as np

TRUNCATION_RULES = ("head", "tail", "head_tail")


def head_tokens(budget: int) -> int:
    """Tokens kept from the start of a text cut by head_tail: a quarter of the budget, the rest from its end
    (Sun et al. 2019, "How to Fine-Tune BERT for Text Classification?", kept 128 + 382 of 510 — quoted from
    memory, not checked against the paper here)."""
    return budget // 4


def encode_head_tail(backend, texts: list[str], max_length: int) -> list[dict[str, list[int]]]:
    """Single texts longer than `max_length` tokens (special tokens included) cut in the middle: the first
    head_tokens and the last of the rest, then the special tokens added as the tokenizer's post-processor
    adds them. `backend` is a `tokenizers.Tokenizer` that neither truncates nor pads."""
    budget = max_length - backend.num_special_tokens_to_add(False)
    out = []
    for text, enc in zip(texts, backend.encode_batch(list(texts), add_special_tokens=False)):
        if len(enc.ids) > budget:
            tail = backend.encode(text, add_special_tokens=False)
            n_head = head_tokens(budget)
            enc.truncate(n_head, direction="right")
            tail.truncate(budget - n_head, direction="left")
            enc = type(enc).merge([enc, tail], growing_offsets=True)
        enc = backend.post_process(enc, None, True)
        out.append({"input_ids": enc.ids, "attention_mask": enc.attention_mask, "token_type_ids": enc.type_ids})
    return out


def plain_backend(tokenizer):
    """A copy of a transformers tokenizer's `tokenizers` backend that neither truncates nor pads: a saved
    tokenizer.json may carry both settings (the bundled one pads every text to 128 tokens)."""
    from tokenizers import Tokenizer

    backend = Tokenizer.from_str(tokenizer.backend_tokenizer.to_str())
    backend.no_truncation()
    backend.no_padding()
    return backend


def encode(tokenizer, split, max_length: int, chunk: int = 4096, truncation: str = "head") -> list[dict[str, list[int]]]:
    """Token ids of every example of `split` (texts, and pairs or None), unpadded: batches are padded
    to their own longest example. Texts longer than max_length tokens keep their start (`head`), their
    end (`tail`) or both (`head_tail`, single texts). Tokenised `chunk` texts at a time: the tokenizer's
    own output objects are many times the size of the ids kept, and would otherwise all be alive at once."""
    if truncation not in TRUNCATION_RULES:
        raise ValueError(f"truncation {truncation!r}: one of {TRUNCATION_RULES}")
    if truncation == "head_tail" and split.pairs is not None:
        raise ValueError("truncation head_tail goes with single texts, not pairs")
    out: list[dict[str, list[int]]] = []
    side = getattr(tokenizer, "truncation_side", "right")
    backend = plain_backend(tokenizer) if truncation == "head_tail" else None
    try:
        tokenizer.truncation_side = "left" if truncation == "tail" else "right"
        for start in range(0, len(split), chunk):
            texts = split.texts[start:start + chunk]
            if backend is not None:  # the keys the tokenizer gives (those the model takes), cut by head_tail
                keys = [k for k in ("input_ids", "attention_mask", "token_type_ids") if k in tokenizer("a")]
                out.extend({k: e[k] for k in keys} for e in encode_head_tail(backend, texts, max_length))
                continue
            if split.pairs is not None:
                enc = tokenizer(texts, split.pairs[start:start + chunk], truncation=True, max_length=max_length)
            else:
                enc = tokenizer(texts, truncation=True, max_length=max_length)
            keys = [k for k in ("input_ids", "attention_mask", "token_type_ids") if k in enc]
            out.extend({k: enc[k][i] for k in keys} for i in range(len(texts)))
    finally:
        tokenizer.truncation_side = side
    return out


def collate(examples: list[dict[str, list[int]]], pad_id: int, length: Optional[int] = None) -> dict[str, np.ndarray]:
    """Pads a batch to its longest example (or to `length`) and returns int64 arrays."""
    width = length or max(len(e["input_ids"]) for e in examples)
    out = {}
    for key in examples[0]:
        fill = pad_id if key == "input_ids" else 0
        arr = np.full((len(examples), width), fill, dtype=np.int64)
        for i, e in enumerate(examples):
            row = e[key][:width]
            arr[i, : len(row)] = row
        out[key] = arr
    return out


def take(examples, idx) -> list[dict]:
    """The encoded examples at `idx`, from a list or from a table on disk (transfer.ArrowExamples)."""
    if isinstance(examples, list):
        return [examples[i] for i in idx]
    return examples.take(idx)


def lengths(examples) -> np.ndarray:
    if isinstance(examples, list):
        return np.array([len(e["input_ids"]) for e in examples], dtype=np.int64)
    return examples.lengths()


class Joined:
    """Several runs of encoded examples read as one: the labelled ones in memory, then the transfer
    texts on disk. Index i of the whole is found in the part it falls into."""

    def __init__(self, *parts):
        self.parts = [p for p in parts if len(p)]
        self.starts = np.cumsum([0] + [len(p) for p in self.parts])

    def __len__(self) -> int:
        return int(self.starts[-1])

    def lengths(self) -> np.ndarray:
        return np.concatenate([lengths(p) for p in self.parts]) if self.parts else np.zeros(0, np.int64)

    def take(self, idx) -> list[dict]:
        idx = np.asarray(idx, dtype=np.int64)
        part = np.searchsorted(self.starts, idx, side="right") - 1
        out: list = [None] * len(idx)
        for p in np.unique(part):
            where = np.flatnonzero(part == p)
            for j, row in zip(where, take(self.parts[p], idx[where] - self.starts[p])):
                out[j] = row
        return out


def length_batches(examples, pad_id: int, batch_size: int, rows: Optional[np.ndarray] = None):
    """Yields (positions, padded batch) over the examples (or over `rows` of them, positions counted in
    `rows`), grouped by length so that padding costs little."""
    rows = np.arange(len(examples)) if rows is None else np.asarray(rows)
    order = np.argsort(lengths(examples)[rows], kind="stable")
    for start in range(0, len(order), batch_size):
        idx = order[start:start + batch_size]
        yield idx, collate(take(examples, rows[idx]), pad_id)


def all_outputs(fn, examples, pad_id: int, width: Optional[int] = None, batch_size: int = 64) -> np.ndarray:
    """`fn(batch) -> array [batch, width]` for every example (a classifier's logits), in the examples' order;
    `width` None: as wide as the first batch's outputs."""
    out = np.zeros((len(examples), width or 0), dtype=np.float32)
    for idx, batch in length_batches(examples, pad_id, batch_size):
        got = fn(batch)
        if width is None:
            out, width = np.zeros((len(examples), got.shape[1]), dtype=np.float32), got.shape[1]
        out[idx] = got
    return out
