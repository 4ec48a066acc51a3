"""Data: a table or a `datasets` folder -> train / validation / test splits and label names.

Texts are tokenised only with the teacher's tokenizer (batches.encode); every later step reuses it.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Optional

import numpy as np

from shrinkwrap.recipe.schema import DataConfig
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.fingerprint import sha256_json
from shrinkwrap.serve.textfiles import byte_to_line, check_text_file

SPLITS = ("train", "validation", "test")
# A text longer than this many characters is cut before tokenisation: the tokenizer truncates to
# max_length tokens anyway, and a multi-megabyte cell would only cost memory and time.
MAX_CHARS = 100_000


@dataclass
class Split:
    texts: list[str]
    labels: np.ndarray                     # int64 class ids; -1 where the data has no labels (task: embedding)
    pairs: Optional[list[str]] = None      # second text of each pair, with data.text_pair
    scores: Optional[np.ndarray] = None    # how alike each pair's texts are, with data.score (task: embedding)
    # task: embedding — each pair's second text, embedded on its own (Dataset.pairs_apart): `texts` alone are encoded
    second: Optional[list[str]] = None

    def __len__(self) -> int:
        return len(self.texts)


@dataclass
class Dataset:
    train: Split
    validation: Split
    test: Split
    label_names: list[str]
    notes: list[str] = field(default_factory=list)   # warnings the user should see in the report

    @property
    def has_labels(self) -> bool:
        return bool(self.label_names)

    def pairs_apart(self) -> "Dataset":
        """The same data with each pair's second text set apart (Split.second), so that every text is encoded, and
        embedded, on its own (task: embedding)."""
        def apart(s: Split) -> Split:
            return Split(texts=s.texts, labels=s.labels, scores=s.scores, second=s.pairs)

        return Dataset(**{s: apart(getattr(self, s)) for s in SPLITS}, label_names=self.label_names, notes=self.notes)

    def fingerprint(self) -> str:
        def split(s: Split) -> dict:
            out = {"texts": s.texts, "pairs": s.pairs if s.second is None else s.second, "labels": s.labels.tolist()}
            return out | ({"scores": s.scores.tolist()} if s.scores is not None else {})
        return sha256_json({s: split(getattr(self, s)) for s in SPLITS} | {"label_names": self.label_names})


def table_columns(path: Path, where: str) -> list[str]:
    """The column names of a data file, read as a recipe's data is (a one-line UserError otherwise)."""
    return [str(c) for c in _read_table(path, where).columns]


def _read_table(path: Path, where: str):
    import pandas as pd

    suffix = path.suffix.lower()
    if suffix in (".csv", ".jsonl", ".ndjson", ".json"):
        check_text_file(path, where, lines=suffix in (".jsonl", ".ndjson"))
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
        raise UserError(f"{where}: not UTF-8 text — {byte_to_line(path, e.start)}") from None
    except ValueError as e:
        raise UserError(f"{where}: cannot parse — {str(e).splitlines()[0] if str(e) else type(e).__name__}") from None
    except Exception as e:  # pandas / pyarrow raise many kinds for a broken file
        raise UserError(f"{where}: cannot parse — {type(e).__name__}: {str(e).splitlines()[0] if str(e) else ''}") from None
    raise UserError(f"{where}: unsupported file type {suffix!r} — use .csv, .jsonl, .parquet or a datasets folder")


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


def _clean(df, cfg: DataConfig, where: str, notes: list[str], keys: Optional[dict[str, str]] = None):
    """`keys` names the text, label, pair and score settings in errors (default: the recipe's data.* keys). A
    config whose label is None reads no labels."""
    keys = keys or {"text": "data.text = ", "label": "data.label = ", "text_pair": "data.text_pair = ",
                    "score": "data.score = "}
    for key, col in (("text", cfg.text), ("label", cfg.label), ("text_pair", cfg.text_pair), ("score", cfg.score)):
        if col is not None and col not in df.columns:
            raise UserError(f"{where}: {keys[key]}{col!r} is not a column — columns: {', '.join(map(str, df.columns))}")
    if len(df) == 0:
        raise UserError(f"{where}: the dataset is empty")
    if cfg.label is not None:
        labels = df[cfg.label]
        missing = labels.isna() | labels.astype(str).str.strip().eq("")
        if missing.any():
            rows = np.flatnonzero(missing.to_numpy())
            raise UserError(f"{where}: {_count(rows)} no label (empty, null or NaN) in column {cfg.label!r} "
                            f"(data rows {_rows(rows)}; row 1 is the first after the header)")
    if cfg.score is not None:
        import pandas as pd

        scores = pd.to_numeric(df[cfg.score], errors="coerce")
        bad = scores.isna() | ~np.isfinite(scores.to_numpy(dtype=np.float64, na_value=np.nan))
        if bad.any():
            rows = np.flatnonzero(bad.to_numpy())
            raise UserError(f"{where}: {_count(rows)} a score that is not a number in column {cfg.score!r} "
                            f"(data rows {_rows(rows)}, e.g. {df[cfg.score].iloc[rows[0]]!r})")
        df = df.assign(**{cfg.score: scores.astype(np.float64)})
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
    if cfg.label is not None:
        df[cfg.label] = df[cfg.label].astype(str).str.strip()
    return df


def _count(rows: np.ndarray) -> str:
    return "1 row has" if len(rows) == 1 else f"{len(rows)} rows have"


def _rows(rows: np.ndarray) -> str:
    return ", ".join(str(r + 1) for r in rows[:5]) + (f" and {len(rows) - 5} more" if len(rows) > 5 else "")


def read_labelled_table(cfg: DataConfig, path: Path, where: str, keys: Optional[dict[str, str]] = None):
    """One table read and checked like a recipe's data but not split: a file, or the `test` split of
    a datasets folder. A DataFrame with cleaned text, pair and label columns."""
    frames = _read_splits(path, where)
    df = frames.get("all", frames.get("test"))
    if df is None:
        raise UserError(f"{where}: the datasets folder has splits {sorted(frames)} and no `test` — bench reads a "
                        f"table or a folder's test split")
    return _clean(df, cfg, where, [], keys)


def _to_split(df, cfg: DataConfig, index: dict[str, int]) -> Split:
    return Split(
        texts=df[cfg.text].tolist(),
        labels=(np.array([index[v] for v in df[cfg.label]], dtype=np.int64) if cfg.label is not None
                else np.full(len(df), -1, dtype=np.int64)),
        pairs=df[cfg.text_pair].tolist() if cfg.text_pair else None,
        scores=df[cfg.score].to_numpy(dtype=np.float64) if cfg.score else None,
    )


def load_dataset(cfg: DataConfig, path: Path, where: str, labels_optional: bool = False) -> Dataset:
    """Reads, checks and splits the data named by the recipe. Raises UserError with one line on bad data. With
    `labels_optional` (task: embedding), a table without the default label column is read without labels (split
    at random rather than stratified); a label column named in the recipe must still be there."""
    from sklearn.model_selection import train_test_split

    notes: list[str] = []
    read = _read_splits(path, where)
    if labels_optional and "label" not in cfg.model_fields_set and all(cfg.label not in f.columns for f in read.values()):
        cfg = cfg.model_copy(update={"label": None})
        notes.append(f"no {DataConfig.model_fields['label'].default!r} column: the data is read without labels, so "
                     f"kNN and probe accuracy are not measured (set data.label to a label column to have them)")
    frames = {k: _clean(v, cfg, f"{where} [{k}]" if k != "all" else where, notes) for k, v in read.items()}
    if cfg.label is None:
        return _unlabelled(frames, cfg, where, notes)

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

    _note_duplicates(frames, cfg, where, notes)
    return Dataset(**{s: _to_split(frames[s], cfg, index) for s in SPLITS}, label_names=label_names, notes=notes)


def _unlabelled(frames: dict, cfg: DataConfig, where: str, notes: list[str]) -> Dataset:
    """Splits without labels: at random (nothing to stratify by), with the same shares and seed."""
    from sklearn.model_selection import train_test_split

    if "all" in frames:
        df = frames.pop("all")
        n_test, n_val = math.ceil(cfg.test_size * len(df)), math.ceil(cfg.validation_size * len(df))
        if len(df) - n_test - n_val < 2 or n_test < 2 or n_val < 1:
            raise UserError(f"{where}: {len(df)} rows are too few to split into train, validation and test")
        rest, test = train_test_split(df, test_size=n_test, random_state=cfg.seed)
        train, val = train_test_split(rest, test_size=n_val, random_state=cfg.seed)
        frames = {"train": train, "validation": val, "test": test}
    else:
        train = frames["train"]
        for name, share in (("test", cfg.test_size), ("validation", cfg.validation_size)):
            if name not in frames:
                train, frames[name] = train_test_split(train, test_size=share, random_state=cfg.seed)
        frames["train"] = train
    _note_duplicates(frames, cfg, where, notes)
    return Dataset(**{s: _to_split(frames[s], cfg, {}) for s in SPLITS}, label_names=[], notes=notes)


def _note_duplicates(frames: dict, cfg: DataConfig, where: str, notes: list[str]) -> None:
    """A note (and a warning) when test rows also appear in train: the test figures are optimistic."""
    key = [cfg.text] + ([cfg.text_pair] if cfg.text_pair else [])
    seen = set(map(tuple, frames["train"][key].to_numpy().tolist()))
    dup = sum(tuple(r) in seen for r in frames["test"][key].to_numpy().tolist())
    if dup:
        note = f"{dup} test rows also appear in train (same text): test accuracy is optimistic"
        notes.append(note)
        warnings.warn(f"{where}: {note}")


def in_label_order(data: Dataset, names: list[str]) -> Dataset:
    """The same data with class ids renumbered so that class k is `names[k]` (a permutation of
    data.label_names): a classifier used as is reads its own order."""
    if sorted(data.label_names) != sorted(names):
        raise ValueError(f"in_label_order: {names} is not an order of {data.label_names}")
    new_id = np.array([names.index(n) for n in data.label_names], dtype=np.int64)

    def renumber(split: Split) -> Split:
        return Split(texts=split.texts, labels=new_id[split.labels], pairs=split.pairs, scores=split.scores)

    return Dataset(**{s: renumber(getattr(data, s)) for s in SPLITS}, label_names=list(names), notes=data.notes)
