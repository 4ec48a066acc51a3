"""Transfer texts on disk: every file type reads the texts that pandas / pyarrow read from it, the rows
the training loop gets are the tokenizer's own output, and the Arrow tables are built once and reused."""
from __future__ import annotations

import json
import os

import numpy as np
import pandas as pd
import pytest

from shrinkwrap.ml.data import Split
from shrinkwrap.ml.models import load_tokenizer
from shrinkwrap.ml.transfer import check
from shrinkwrap.serve.batches import Joined, encode, length_batches, lengths, take
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.fingerprint import tokenizer_fingerprint_of

TEXTS = ["my refund please", "router offline again since the morning", "Password locked — café login",
         "x" * 50, "  leading and trailing spaces  "]


def _write(folder, kind: str):
    path = folder / f"more.{kind}"
    if kind == "txt":
        path.write_bytes(("\r\n".join(TEXTS[:2]) + "\r\n\n   \n" + "\n".join(TEXTS[2:]) + "\n").encode())
    elif kind == "csv":
        pd.DataFrame({"text": TEXTS + [""], "other": range(len(TEXTS) + 1)}).to_csv(path, index=False)
    elif kind == "jsonl":
        path.write_text("\n".join(json.dumps({"text": t, "n": i}) for i, t in enumerate(TEXTS)) + "\n\n")
    else:
        pd.DataFrame({"text": TEXTS + [None]}).to_parquet(path)
    return path


@pytest.mark.parametrize("kind", ["txt", "csv", "jsonl", "parquet"])
def test_each_file_type_reads_the_texts_a_table_reader_reads(tmp_path, kind):
    path = _write(tmp_path, kind)
    transfer = check(path, "text", str(path))
    if kind == "txt":
        expected = [line for line in path.read_text(encoding="utf-8").splitlines() if line.strip()]
    else:  # reference: pandas' own readers, blank and missing cells dropped
        df = {"csv": pd.read_csv, "jsonl": lambda p: pd.read_json(p, lines=True), "parquet": pd.read_parquet}[kind](path)
        expected = [t for t in df["text"].dropna() if t.strip()]
    assert expected == TEXTS
    assert len(transfer) == len(TEXTS)
    assert [t for batch in transfer.batches(tmp_path / "cache", size=2) for t in batch] == TEXTS
    assert not (tmp_path / "cache").joinpath("transfer-" + transfer.fingerprint[:16], "texts.partial").exists()


def test_rows_on_disk_are_the_tokenizers_own_output(tmp_path, tiny_base):
    """Reference: the transformers tokenizer called on the same texts (batches.encode is that call)."""
    path = _write(tmp_path, "txt")
    tok = load_tokenizer(str(tiny_base), "test")
    examples = check(path, "text", str(path)).encoded(tmp_path / "cache", tok, tokenizer_fingerprint_of(tok), 8)
    expected = encode(tok, Split(texts=TEXTS, labels=None), 8)
    assert examples.take(range(len(TEXTS))) == expected
    assert examples.take([3, 0]) == [expected[3], expected[0]]
    assert lengths(examples).tolist() == [len(e["input_ids"]) for e in expected]
    assert max(lengths(examples)) == 8  # cut at max_length


def test_tables_are_built_once_and_keyed_by_file_and_tokenizer(tmp_path, tiny_base):
    path = _write(tmp_path, "txt")
    tok = load_tokenizer(str(tiny_base), "test")
    fp = tokenizer_fingerprint_of(tok)
    check(path, "text", str(path)).encoded(tmp_path / "cache", tok, fp, 8)
    files = sorted(p for p in (tmp_path / "cache").rglob("*") if p.is_file())
    stamps = {p: os.stat(p).st_mtime_ns for p in files}
    check(path, "text", str(path)).encoded(tmp_path / "cache", tok, fp, 8)
    assert {p: os.stat(p).st_mtime_ns for p in files} == stamps   # reused, not rewritten
    check(path, "text", str(path)).encoded(tmp_path / "cache", tok, fp, 16)
    assert len(list((tmp_path / "cache").rglob("tokens-*.arrow"))) == 2   # another length, another table
    before = check(path, "text", str(path)).fingerprint
    path.write_text(path.read_text() + "one more text\n")
    assert check(path, "text", str(path)).fingerprint != before


def test_joined_reads_like_the_concatenated_list(tmp_path, tiny_base):
    """Reference: Python list concatenation and indexing."""
    path = _write(tmp_path, "txt")
    tok = load_tokenizer(str(tiny_base), "test")
    on_disk = check(path, "text", str(path)).encoded(tmp_path / "cache", tok, tokenizer_fingerprint_of(tok), 32)
    labelled = encode(tok, Split(texts=["refund now", "router down", "hello"], labels=None), 32)
    whole = labelled + encode(tok, Split(texts=TEXTS, labels=None), 32)
    joined = Joined(labelled, on_disk)
    assert len(joined) == len(whole)
    idx = np.random.default_rng(0).permutation(len(whole))
    assert take(joined, idx) == [whole[i] for i in idx]
    assert lengths(joined).tolist() == lengths(whole).tolist()
    # length-grouped batches over a subset of rows: positions within the subset, rows padded alike
    rows = np.array([7, 1, 4, 2])
    seen = []
    for pos, batch in length_batches(joined, 0, 3, rows=rows):
        for p, ids in zip(pos, batch["input_ids"]):
            row = whole[rows[p]]["input_ids"]
            assert ids[:len(row)].tolist() == row and not ids[len(row):].any()
            seen.append(int(p))
    assert sorted(seen) == [0, 1, 2, 3]


def test_a_folder_is_refused(tmp_path):
    with pytest.raises(UserError, match="is a folder"):
        check(tmp_path, "text", str(tmp_path))


def test_encoding_in_chunks_equals_one_tokenizer_call(tiny_base):
    """Reference: the transformers tokenizer called once on all the texts (and pairs)."""
    tok = load_tokenizer(str(tiny_base), "test")
    texts, pairs = TEXTS * 3, [t.upper() for t in TEXTS] * 3
    for split in (Split(texts=texts, labels=None), Split(texts=texts, labels=None, pairs=pairs)):
        whole = tok(split.texts, split.pairs, truncation=True, max_length=12) if split.pairs else \
            tok(split.texts, truncation=True, max_length=12)
        expected = [{k: whole[k][i] for k in whole} for i in range(len(texts))]
        assert encode(tok, split, 12, chunk=4) == expected
