"""Encoded examples and their batches: token ids, padding, length-sorted batches.

Numpy and the standard library only: the torch-free predict path (shrinkwrap.artifact) batches
through here too, so predict pads exactly as the chain's accuracy pass does.

Encoded examples are a list of dicts (`encode`) or rows on disk (transfer.ArrowExamples); code that
reads them goes through `take` and `lengths`, so that both work.
"""
from __future__ import annotations

from typing import Optional

import numpy as np


def encode(tokenizer, split, max_length: int, chunk: int = 4096) -> list[dict[str, list[int]]]:
    """Token ids of every example of `split` (texts, and pairs or None), unpadded: batches are padded
    to their own longest example. Tokenised `chunk` texts at a time: the tokenizer's own output
    objects are many times the size of the ids kept, and would otherwise all be alive at once."""
    out: list[dict[str, list[int]]] = []
    for start in range(0, len(split), chunk):
        texts = split.texts[start:start + chunk]
        if split.pairs is not None:
            enc = tokenizer(texts, split.pairs[start:start + chunk], truncation=True, max_length=max_length)
        else:
            enc = tokenizer(texts, truncation=True, max_length=max_length)
        keys = [k for k in ("input_ids", "attention_mask", "token_type_ids") if k in enc]
        out.extend({k: enc[k][i] for k in keys} for i in range(len(texts)))
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


def all_logits(fn, examples, pad_id: int, n_labels: int, batch_size: int = 64) -> np.ndarray:
    """Logits of every example from `fn(batch) -> array`, in the examples' order."""
    out = np.zeros((len(examples), n_labels), dtype=np.float32)
    for idx, batch in length_batches(examples, pad_id, batch_size):
        out[idx] = fn(batch)
    return out
