"""Transfer texts for distillation, kept on disk rather than in memory.

Unlabeled in-domain texts can run to millions, so nothing here holds them all at once: the file is
read a chunk at a time, checked, and written once into a memory-mapped Arrow table (Hugging Face
`datasets`); each tokenizer's ids are computed with `Dataset.map` and cached beside it. Training and
the teacher-output pass read only the rows of the batch in hand.

Read once in `check` (before anything is written: a bad file stops the run with one line), and again
when the table is built on first use by a step, under the run folder's cache.
"""
from __future__ import annotations

import json
import shutil
from pathlib import Path
from typing import Iterator, Optional

import numpy as np

from shrinkwrap.ml import distributed
from shrinkwrap.ml.data import MAX_CHARS
from shrinkwrap.serve.errors import StepFailed, UserError
from shrinkwrap.serve.fingerprint import sha256_file
from shrinkwrap.serve.rundir import scratch
from shrinkwrap.serve.textfiles import check_text_file, json_line, utf8_lines

CHUNK = 10_000          # rows read, checked and written at a time


def _rows(path: Path, column: Optional[str], where: str) -> Iterator[str]:
    """Every non-blank text of the file, cut to MAX_CHARS, read a chunk at a time."""
    suffix = path.suffix.lower()
    if suffix == ".txt":
        with open(path, "rb") as f:
            for _, line in utf8_lines(f, where):
                line = line.rstrip("\r\n")
                if line.strip():
                    yield line[:MAX_CHARS]
        return
    if suffix in (".jsonl", ".ndjson"):
        with open(path, "rb") as f:
            for number, line in utf8_lines(f, where):
                if not line.strip():
                    continue
                row = json_line(line, number, where)
                if not isinstance(row, dict) or column not in row:
                    raise UserError(f"{where}: line {number} has no {column!r} field (student.transfer_column)")
                text = row[column]
                if text is not None and str(text).strip():
                    yield str(text)[:MAX_CHARS]
        return
    yield from _table_rows(path, suffix, column, where)


def _table_rows(path: Path, suffix: str, column: Optional[str], where: str) -> Iterator[str]:
    def missing(columns) -> UserError:
        return UserError(f"{where}: student.transfer_column = {column!r} is not a column — columns: "
                         f"{', '.join(map(str, columns))}")

    if suffix == ".csv":
        import pandas as pd

        check_text_file(path, where, lines=False)  # one pass, so that a bad byte is named by its line
        try:
            chunks = pd.read_csv(path, encoding="utf-8", keep_default_na=False, na_values=[""], dtype=str,
                                 chunksize=CHUNK)
            for chunk in chunks:
                if column not in chunk.columns:
                    raise missing(chunk.columns)
                yield from (t[:MAX_CHARS] for t in chunk[column].dropna() if t.strip())
        except UserError:
            raise
        except Exception as e:  # pandas raises many kinds for a broken file
            raise UserError(f"{where}: cannot parse — {type(e).__name__}: {str(e).splitlines()[0] if str(e) else ''}") from None
        return
    if suffix in (".parquet", ".pq"):
        import pyarrow.parquet as pq

        try:
            parquet = pq.ParquetFile(path)
        except Exception as e:
            raise UserError(f"{where}: cannot parse — {type(e).__name__}: {str(e).splitlines()[0] if str(e) else ''}") from None
        if column not in parquet.schema_arrow.names:
            raise missing(parquet.schema_arrow.names)
        for batch in parquet.iter_batches(batch_size=CHUNK, columns=[column]):
            yield from (str(t)[:MAX_CHARS] for t in batch.column(0).to_pylist() if t is not None and str(t).strip())
        return
    raise UserError(f"{where}: unsupported file type {suffix!r} — use .txt (one text per line), .csv, .jsonl or .parquet")


def fingerprint(path: Path, column: Optional[str]) -> str:
    """Of the file's bytes (read in blocks) and the column read from it."""
    return sha256_file(path, head=json.dumps({"column": column, "max_chars": MAX_CHARS}).encode())


class TransferTexts:
    """A transfer file, checked; its Arrow table is built on first use under `cache_root`."""

    def __init__(self, path: Path, column: Optional[str], where: str, count: int, fp: str):
        self.path, self.column, self.where, self.count, self.fingerprint = path, column, where, count, fp
        self._texts = None

    def __len__(self) -> int:
        return self.count

    def folder(self, cache_root: Path) -> Path:
        return cache_root / f"transfer-{self.fingerprint[:16]}"

    def texts(self, cache_root: Path, quiet: bool = True):
        """The texts as a memory-mapped `datasets.Dataset` with one column, "text"; built on first use.
        Called by one process at a time (under several, `encoded` lets the main process build it)."""
        if self._texts is None:
            import datasets

            if quiet:
                datasets.disable_progress_bars()
            table = self.folder(cache_root) / "texts"
            if not (table / "dataset_info.json").exists():
                # The generator's own cache lives outside the scratch folder: only the saved table is
                # renamed into place.
                build = table.with_name(".build-texts")
                shutil.rmtree(build, ignore_errors=True)
                try:
                    with scratch(table) as tmp:
                        built = datasets.Dataset.from_generator(
                            _generate, gen_kwargs={"path": str(self.path), "column": self.column, "where": self.where},
                            features=datasets.Features({"text": datasets.Value("string")}), cache_dir=str(build))
                        built.save_to_disk(str(tmp))
                        del built
                finally:
                    shutil.rmtree(build, ignore_errors=True)
            self._texts = datasets.load_from_disk(str(table))
        return self._texts

    def batches(self, cache_root: Path, size: int = 1024, quiet: bool = True) -> Iterator[list[str]]:
        for rows in self.texts(cache_root, quiet).iter(batch_size=size):
            yield rows["text"]

    def encoded(self, cache_root: Path, tokenizer, tokenizer_fp: str, max_length: int,
                quiet: bool = True, truncation: str = "head") -> "ArrowExamples":
        """The texts' token ids under `tokenizer`, computed once with `Dataset.map` and cached. Under
        several processes every one calls this; the main process builds the tables, the others wait."""
        import datasets

        # the same keys as batches.encode gives the labelled texts, so that both go into one batch
        keys = [k for k in ("attention_mask", "token_type_ids") if k in tokenizer(["a"], truncation=True)]

        from shrinkwrap.ml.data import Split
        from shrinkwrap.serve.batches import encode

        def tokenize(rows):
            # batches.encode: the labelled texts' own truncation rule
            rows_enc = encode(tokenizer, Split(texts=rows["text"], labels=None), max_length, truncation=truncation)
            enc = {k: [e[k] for e in rows_enc] for k in ["input_ids", *keys]}
            # Only the ids are stored: for one unpadded text the mask is all ones and the segment ids
            # all zeros. Checked here for every row, so a tokenizer for which that fails is caught.
            for k in keys:
                expected = 1 if k == "attention_mask" else 0
                if any(v != expected for row in enc[k] for v in row):
                    raise StepFailed(f"{self.where}: the tokenizer's {k} is not all {expected} on a single text; "
                                     f"this transfer table stores token ids only")
            return {"input_ids": enc["input_ids"], "length": [len(ids) for ids in enc["input_ids"]]}

        rule = "" if truncation == "head" else f"-{truncation}"
        target = self.folder(cache_root) / f"tokens-{tokenizer_fp[:16]}-{max_length}{rule}.arrow"
        if distributed.is_main():
            self.texts(cache_root, quiet).map(
                tokenize, batched=True, batch_size=1000, remove_columns=["text"],
                features=datasets.Features({"input_ids": datasets.List(datasets.Value("int32")),
                                            "length": datasets.Value("int32")}),
                cache_file_name=str(target), desc="tokenising transfer texts")
        distributed.barrier()
        return ArrowExamples(datasets.Dataset.from_file(str(target)), keys)


def _generate(path: str, column: Optional[str], where: str):
    for text in _rows(Path(path), column, where):
        yield {"text": text}


def check(path: Path, column: Optional[str], where: str) -> TransferTexts:
    """Reads the whole file once, a chunk at a time, and stops at the first problem. Writes nothing."""
    if not path.exists():
        raise UserError(f"{where}: no such file")
    if path.is_dir():
        raise UserError(f"{where}: is a folder — give one file of texts")
    count = sum(1 for _ in _rows(path, column, where))
    if not count:
        raise UserError(f"{where}: no non-empty transfer texts")
    return TransferTexts(path, column, where, count, fingerprint(path, column))


class ArrowExamples:
    """Encoded texts in a memory-mapped Arrow table, read a batch of rows at a time. Rows come back as
    `batches.encode` gives them (input_ids, and the attention mask / segment ids the model takes)."""

    def __init__(self, table, keys: list[str]):
        self.table, self.keys = table, keys

    def __len__(self) -> int:
        return len(self.table)

    def lengths(self) -> np.ndarray:
        return self.table.data.column("length").to_numpy().astype(np.int64)

    def take(self, idx) -> list[dict]:
        ids = self.table[[int(i) for i in idx]]["input_ids"]
        fill = {"attention_mask": 1, "token_type_ids": 0}
        return [{"input_ids": row, **{k: [fill[k]] * len(row) for k in self.keys}} for row in ids]
