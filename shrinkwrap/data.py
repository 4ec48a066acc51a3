"""Data: a table or a `datasets` folder -> train / validation / test splits and label names.

Texts are tokenised only with the teacher's tokenizer (see `encode`); every later step reuses it.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Optional

import numpy as np

from shrinkwrap.errors import UserError
from shrinkwrap.fingerprint import sha256_json
from shrinkwrap.recipe import DataConfig

SPLITS = ("train", "validation", "test")
# A text longer than this many characters is cut before tokenisation: the tokenizer truncates to
# max_length tokens anyway, and a multi-megabyte cell would only cost memory and time.
MAX_CHARS = 100_000


@dataclass
class Split:
    texts: list[str]
    labels: np.ndarray                     # int64 class ids
    pairs: Optional[list[str]] = None      # second text of each pair, with data.text_pair

    def __len__(self) -> int:
        return len(self.texts)


@dataclass
class Dataset:
    train: Split
    validation: Split
    test: Split
    label_names: list[str]
    notes: list[str] = field(default_factory=list)   # warnings the user should see in the report

    def fingerprint(self) -> str:
        return sha256_json({
            s: {"texts": getattr(self, s).texts, "pairs": getattr(self, s).pairs,
                "labels": getattr(self, s).labels.tolist()} for s in SPLITS
        } | {"label_names": self.label_names})


def _read_table(path: Path, where: str):
    import pandas as pd

    suffix = path.suffix.lower()
    if suffix in (".csv", ".jsonl", ".ndjson", ".json"):
        _check_text_file(path, where, lines=suffix in (".jsonl", ".ndjson"))
    try:
        if suffix == ".csv":
            return pd.read_csv(path, encoding="utf-8", keep_default_na=False, na_values=[""], dtype=str)
        if suffix in (".jsonl", ".ndjson"):
            return pd.read_json(path, lines=True, dtype=False, encoding="utf-8")
        if suffix == ".json":
            return pd.read_json(path, dtype=False, encoding="utf-8")
        if suffix in (".parquet", ".pq"):
            return pd.read_parquet(path)
    except UnicodeDecodeError as e:
        raise UserError(f"{where}: not UTF-8 text — {_byte_to_line(path, e.start)}") from None
    except ValueError as e:
        raise UserError(f"{where}: cannot parse — {str(e).splitlines()[0] if str(e) else type(e).__name__}") from None
    except Exception as e:  # pandas / pyarrow raise many kinds for a broken file
        raise UserError(f"{where}: cannot parse — {type(e).__name__}: {str(e).splitlines()[0] if str(e) else ''}") from None
    raise UserError(f"{where}: unsupported file type {suffix!r} — use .csv, .jsonl, .parquet or a datasets folder")


def _check_text_file(path: Path, where: str, lines: bool) -> None:
    """Catches what the table readers report badly: an empty file, a non-UTF-8 byte (pandas reads in
    chunks, so its byte offsets are not the file's), and a JSON Lines line that does not parse."""
    try:
        f = open(path, "rb")
    except OSError as e:
        raise UserError(f"{where}: cannot read — {e.strerror or e}") from None
    with f:
        seen_any = False
        for number, line in utf8_lines(f, where):
            seen_any = seen_any or bool(line.strip())
            if lines and line.strip():
                json_line(line, number, where)
    if not seen_any:
        raise UserError(f"{where}: the file is empty")


def utf8_lines(f, where: str):
    """(line number, text) of every line of the binary file `f`; a byte that is not UTF-8 stops it with
    one line naming the line."""
    for number, raw in enumerate(f, 1):
        try:
            yield number, raw.decode("utf-8")
        except UnicodeDecodeError as e:
            raise UserError(f"{where}: not UTF-8 text — line {number}, byte {e.start + 1} of the line "
                            f"(0x{raw[e.start]:02x}); save the file as UTF-8") from None


def json_line(line: str, number: int, where: str):
    import json

    try:
        return json.loads(line)
    except ValueError as e:
        raise UserError(f"{where}: line {number} is not a JSON object — {e.msg} at column {e.colno}") from None


def _byte_to_line(path: Path, offset: int) -> str:
    with open(path, "rb") as f:
        head = f.read(offset)
    line = head.count(b"\n") + 1
    return f"line {line} (byte {offset})"


def _read_splits(path: Path, where: str) -> dict:
    """Returns {split name: DataFrame}; a single table comes back as {"all": df}."""
    if path.is_dir():
        import datasets

        try:
            loaded = datasets.load_from_disk(str(path))
        except Exception as e:
            raise UserError(f"{where}: not a datasets folder saved with save_to_disk — "
                            f"{str(e).splitlines()[0] if str(e) else type(e).__name__}") from None
        if isinstance(loaded, datasets.DatasetDict):
            frames = {k: v.to_pandas() for k, v in loaded.items()}
            if "train" not in frames:
                raise UserError(f"{where}: the datasets folder has splits {sorted(frames)} — a `train` split is needed")
            unknown = set(frames) - {"train", "validation", "test"}
            if unknown:
                raise UserError(f"{where}: unknown splits {sorted(unknown)} — allowed: train, validation, test")
            return frames
        return {"all": loaded.to_pandas()}
    if not path.exists():
        raise UserError(f"{where}: no such file")
    if not path.is_file():
        raise UserError(f"{where}: not a regular file — give a .csv, .jsonl or .parquet file or a datasets folder")
    return {"all": _read_table(path, where)}


def _clean(df, cfg: DataConfig, where: str, notes: list[str]):
    for key, col in (("data.text", cfg.text), ("data.label", cfg.label), ("data.text_pair", cfg.text_pair)):
        if col is not None and col not in df.columns:
            raise UserError(f"{where}: {key} = {col!r} is not a column — columns: {', '.join(map(str, df.columns))}")
    if len(df) == 0:
        raise UserError(f"{where}: the dataset is empty")
    labels = df[cfg.label]
    missing = labels.isna() | labels.astype(str).str.strip().eq("")
    if missing.any():
        rows = np.flatnonzero(missing.to_numpy())
        raise UserError(f"{where}: {_count(rows)} no label (empty, null or NaN) in column {cfg.label!r} "
                        f"(data rows {_rows(rows)}; row 1 is the first after the header)")
    text_cols = [cfg.text] + ([cfg.text_pair] if cfg.text_pair else [])
    empty_any = np.zeros(len(df), dtype=bool)
    for col in text_cols:  # positions in the file as read, before anything is dropped
        values = df[col]
        empty = (values.isna() | values.astype(str).str.strip().eq("")).to_numpy()
        if empty.any():
            rows = np.flatnonzero(empty)
            if not cfg.drop_empty:
                raise UserError(f"{where}: {_count(rows)} an empty or whitespace-only {col!r} "
                                f"(data rows {_rows(rows)}) — fix them or set data.drop_empty: true")
            notes.append(f"dropped {len(rows)} rows with an empty {col!r} (data rows {_rows(rows)})")
        empty_any |= empty
    df = df[~empty_any]
    if len(df) == 0:
        raise UserError(f"{where}: no rows left after dropping empty texts")
    df = df.copy()
    for col in text_cols:
        df[col] = df[col].astype(str)
        long = df[col].str.len() > MAX_CHARS
        if long.any():
            note = f"{int(long.sum())} texts in {col!r} longer than {MAX_CHARS:,} characters were cut to that length"
            notes.append(note)
            warnings.warn(f"{where}: {note}")
            df.loc[long, col] = df.loc[long, col].str.slice(0, MAX_CHARS)
    df[cfg.label] = df[cfg.label].astype(str).str.strip()
    return df


def _count(rows: np.ndarray) -> str:
    return "1 row has" if len(rows) == 1 else f"{len(rows)} rows have"


def _rows(rows: np.ndarray) -> str:
    return ", ".join(str(r + 1) for r in rows[:5]) + (f" and {len(rows) - 5} more" if len(rows) > 5 else "")


def _to_split(df, cfg: DataConfig, index: dict[str, int]) -> Split:
    return Split(
        texts=df[cfg.text].tolist(),
        labels=np.array([index[v] for v in df[cfg.label]], dtype=np.int64),
        pairs=df[cfg.text_pair].tolist() if cfg.text_pair else None,
    )


def load_dataset(cfg: DataConfig, path: Path, where: str) -> Dataset:
    """Reads, checks and splits the data named by the recipe. Raises UserError with one line on bad data."""
    from sklearn.model_selection import train_test_split

    notes: list[str] = []
    frames = {k: _clean(v, cfg, f"{where} [{k}]" if k != "all" else where, notes)
              for k, v in _read_splits(path, where).items()}

    if "all" in frames:
        df = frames.pop("all")
        counts = df[cfg.label].value_counts()
        if len(counts) < 2:
            raise UserError(f"{where}: only one class ({counts.index[0]!r}) in column {cfg.label!r} — a classifier needs at least two")
        rare = counts[counts < 3]
        if len(rare):
            raise UserError(f"{where}: class {rare.index[0]!r} has {int(rare.iloc[0])} rows — each class needs at least 3 "
                            f"to appear in train, validation and test")
        n_classes = len(counts)
        n_test = max(n_classes, math.ceil(cfg.test_size * len(df)))
        rest, test = train_test_split(df, test_size=n_test, stratify=df[cfg.label], random_state=cfg.seed)
        n_val = max(n_classes, math.ceil(cfg.validation_size * len(df)))
        if len(rest) - n_val < n_classes:
            raise UserError(f"{where}: {len(df)} rows are too few to split into train, validation and test")
        train, val = train_test_split(rest, test_size=n_val, stratify=rest[cfg.label], random_state=cfg.seed)
        frames = {"train": train, "validation": val, "test": test}
    elif "validation" not in frames or "test" not in frames:
        # The folder has a train split but lacks one of the held-out ones: carve it from train.
        train = frames["train"]
        for name, share in (("test", cfg.test_size), ("validation", cfg.validation_size)):
            if name not in frames:
                train, frames[name] = train_test_split(train, test_size=share, stratify=train[cfg.label],
                                                       random_state=cfg.seed)
        frames["train"] = train

    train_labels = set(frames["train"][cfg.label])
    if len(train_labels) < 2:
        raise UserError(f"{where}: the train split has only one class — a classifier needs at least two")
    for name in ("validation", "test"):
        unseen = sorted(set(frames[name][cfg.label]) - train_labels)
        if unseen:
            count = int(frames[name][cfg.label].isin(unseen).sum())
            raise UserError(f"{where}: label {unseen[0]!r} appears in the {name} split but never in train "
                            f"({count} {name} row{'s' if count != 1 else ''} with labels unseen in train: {', '.join(map(repr, unseen[:5]))})")
    label_names = sorted(train_labels)
    index = {name: i for i, name in enumerate(label_names)}

    key = [cfg.text] + ([cfg.text_pair] if cfg.text_pair else [])
    seen = set(map(tuple, frames["train"][key].to_numpy().tolist()))
    dup = sum(tuple(r) in seen for r in frames["test"][key].to_numpy().tolist())
    if dup:
        note = f"{dup} test rows also appear in train (same text): test accuracy is optimistic"
        notes.append(note)
        warnings.warn(f"{where}: {note}")

    return Dataset(**{s: _to_split(frames[s], cfg, index) for s in SPLITS}, label_names=label_names, notes=notes)


def encode(tokenizer, split: Split, max_length: int, chunk: int = 4096) -> list[dict[str, list[int]]]:
    """Token ids of every example, unpadded: batches are padded to their own longest example.
    Tokenised `chunk` texts at a time: the tokenizer's own output objects are many times the size of
    the ids kept, and would otherwise all be alive at once."""
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
