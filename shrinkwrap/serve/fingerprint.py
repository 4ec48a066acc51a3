"""Hashes that tie outputs together: files, tokenizers, and anything JSON-shaped.

Kept free of torch and transformers so that the prediction path can use it in a slim image.
"""
from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path
from typing import Any

# The parts of a tokenizer.json that decide which ids a text becomes. Truncation and padding
# settings are left out: they are per-call options that a save may or may not record.
TOKENIZER_PARTS = ("model", "normalizer", "pre_tokenizer", "post_processor", "added_tokens")


def sha256_json(obj: Any) -> str:
    return hashlib.sha256(json.dumps(obj, sort_keys=True, separators=(",", ":")).encode()).hexdigest()


def sha256_file(path: str | Path, chunk: int = 1 << 20, head: bytes = b"") -> str:
    """Of `head` followed by the file's bytes, read in blocks."""
    h = hashlib.sha256(head)
    with open(path, "rb") as f:
        while block := f.read(chunk):
            h.update(block)
    return h.hexdigest()


def tokenizer_fingerprint(tokenizer_json: dict) -> str:
    """Fingerprint of a tokenizer from its tokenizer.json content: vocabulary, special tokens, normalisation."""
    return sha256_json({k: tokenizer_json.get(k) for k in TOKENIZER_PARTS})


# Fingerprints of tokenizer files, remembered while a file stays the same one (its device, inode, size and
# modification time): a multilingual tokenizer.json of 250k pieces takes ~0.4 s to parse, and a run checks each
# step's several times.
_OF_FILE: dict[tuple, str] = {}


def tokenizer_fingerprint_of_file(path: str | Path) -> str:
    st = os.stat(path)
    key = (str(Path(path).resolve()), st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns)
    if key not in _OF_FILE:
        _OF_FILE[key] = tokenizer_fingerprint(json.loads(Path(path).read_text(encoding="utf-8")))
    return _OF_FILE[key]


def tokenizer_fingerprint_of(tokenizer) -> str:
    """Fingerprint of a loaded transformers fast tokenizer (equal to that of the tokenizer.json it saves)."""
    return tokenizer_fingerprint(json.loads(tokenizer.backend_tokenizer.to_str()))
