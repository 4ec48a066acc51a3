"""`shrinkwrap bench --data FILE`: a labelled table read as one test set (no split), tokenised with the
target's own tokenizer and labelled by the target's own label names."""
from __future__ import annotations

import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Optional

import numpy as np

from shrinkwrap.bench.measure import Inputs
from shrinkwrap.bench.targets import Target
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.rundir import trained_length

# Without --max-length and without a limit from the model, texts are cut at this many tokens
# (the usual BERT position count, common practice).
DEFAULT_MAX_LENGTH = 512


@dataclass
class LabelledTable:
    path: Path
    texts: list[str]
    labels: Optional[list[str]]        # as written in the table; None: it has no label column (an encoder's data)
    pairs: Optional[list[str]] = None
    label_column: str = "label"
    columns: tuple[str, ...] = ()      # every column of the table, for the one-line errors


def read_table(path: Path, text: str, label: str, text_pair: Optional[str] = None,
               label_optional: bool = False) -> LabelledTable:
    """Reads and checks the table with the same reader and checks as a recipe's data (shrinkwrap.ml.data).
    `label_optional`: a table without the label column is read without labels (a sentence encoder's data; a
    classifier refuses it once loaded)."""
    from shrinkwrap.ml.data import read_labelled_table, table_columns
    from shrinkwrap.recipe.schema import DataConfig

    columns = table_columns(path, f"--data {path}") if label_optional and path.is_file() else []
    label_given = None if label_optional and path.is_file() and label not in columns else label
    cfg = DataConfig(path=str(path), text=text, label=label_given, text_pair=text_pair)
    df = read_labelled_table(cfg, path, f"--data {path}",
                             keys={"text": "--text ", "label": "--label ", "text_pair": "--text-pair ",
                                   "score": "--score "})
    return LabelledTable(path=path, texts=df[text].tolist(), labels=df[label].tolist() if label_given else None,
                         pairs=df[text_pair].tolist() if text_pair else None, label_column=label,
                         columns=tuple(columns))


def label_ids(table: LabelledTable, names: list[str]) -> np.ndarray:
    """The table's labels as the model's class ids (`names` by id); a one-line UserError naming the first row
    whose label is not one of the model's."""
    index = {n: i for i, n in enumerate(names)}
    unknown = next((i for i, v in enumerate(table.labels) if v not in index), None)
    if unknown is not None:
        raise UserError(f"--data {table.path}: label {table.labels[unknown]!r} (data row {unknown + 1}) is not "
                        f"one of the model's labels: {', '.join(names)}")
    return np.array([index[v] for v in table.labels], dtype=np.int64)


def _trained_length(target: Target) -> int:
    """Where an artifact cuts texts (its manifest), or the length a step folder records it was trained at; else
    the model's position count (or 512), said in a note."""
    if target.extra.get("manifest") is not None:
        return target.token_limit()
    recorded = trained_length(target.tokenizer_dir, target.token_limit())
    if recorded is not None:
        return recorded
    limit = target.token_limit() or DEFAULT_MAX_LENGTH
    print(f"note: {target.tokenizer_dir} does not record the length it was trained at — --data texts are cut at "
          f"{limit} tokens (the most the model takes); give --max-length to choose", file=sys.stderr, flush=True)
    return limit


def _tokenizer(target: Target):
    from shrinkwrap.ml.models import load_tokenizer

    if target.tokenizer_dir is None:
        raise UserError(f"{target.path}: no tokenizer beside the model (tokenizer.json) — --data needs the "
                        f"tokenizer the model was trained with")
    return load_tokenizer(str(target.tokenizer_dir), what=str(target.tokenizer_dir))


def reference_vectors(path: Path, table: LabelledTable, max_length: Optional[int], threads: int) -> np.ndarray:
    """`bench --reference MODEL`: the reference encoder's vectors of the table's texts, each read with its own
    tokenizer and cut where it stops reading (computed before the benchmarked target loads)."""
    from shrinkwrap.bench.targets import load_target
    from shrinkwrap.serve.batches import all_outputs

    target = load_target(path, threads)
    try:
        if target.task != "embedding":
            raise UserError(f"--reference {path}: a classifier — the reference must be a sentence encoder (its "
                            f"vectors are what the target's are compared with)")
        inputs = inputs_for(table, max_length)(target)
        return all_outputs(target.outputs, inputs.test, inputs.pad_id, None, 32)
    finally:
        target.release()


def inputs_for(table: Optional[LabelledTable], max_length: Optional[int] = None,
               reference: Optional[np.ndarray] = None) -> Callable[[Target], Inputs]:
    """Builds a target's Inputs from `table` once the target is loaded (synthetic ids when no table). A sentence
    encoder's quality is measured against `reference` (another encoder's vectors of the same texts, e.g. its
    teacher's), with the kNN vote where the table has labels."""
    if table is not None:
        import transformers.models.auto.tokenization_auto  # noqa: F401  (now, not inside the memory window)

        import shrinkwrap.ml.models  # noqa: F401  (its loader, likewise)

    def build(target: Target) -> Inputs:
        from shrinkwrap.ml.data import Split
        from shrinkwrap.serve.artifact import truncation_of
        from shrinkwrap.serve.batches import encode

        if table is None:
            return Inputs()
        if target.task == "embedding":
            return _encoder_inputs(target, table, max_length, reference)
        if table.labels is None:
            raise UserError(f"--data {table.path}: --label {table.label_column!r} is not a column — columns: "
                            f"{', '.join(table.columns)} (a classifier's accuracy needs the labels)")
        names = target.label_names
        if not names:
            raise UserError(f"{target.path}: no label names (a classification head with id2label in config.json, "
                            f"or an artifact's labels) — accuracy on --data needs them")
        labels = label_ids(table, names)
        tokenizer = _tokenizer(target)
        limit = max_length or _trained_length(target)
        if max_length and target.token_limit() and max_length > target.token_limit():
            raise UserError(f"--max-length {max_length} — {target.path} takes at most {target.token_limit()} tokens")
        # an artifact's texts are cut by the rule its manifest records, as its chain cut them
        manifest = target.extra.get("manifest")
        rule = truncation_of(manifest) if manifest else "head"
        examples = encode(tokenizer, Split(texts=table.texts, labels=labels, pairs=table.pairs), limit,
                          truncation=rule)
        return Inputs(timing=examples, pad_id=tokenizer.pad_token_id or 0, test=examples, labels=labels,
                      n_labels=len(names), about={"path": str(table.path), "rows": len(examples), "max_length": limit,
                                                  "label_names": names})

    return build


def _encoder_inputs(target: Target, table: LabelledTable, max_length: Optional[int], reference) -> Inputs:
    """A sentence encoder's Inputs: the table's texts, each embedded alone; its labels as class ids in name order."""
    from shrinkwrap.ml.data import Split
    from shrinkwrap.serve.artifact import truncation_of
    from shrinkwrap.serve.batches import encode

    if table.pairs is not None:
        raise UserError(f"--data {table.path}: --text-pair — a sentence encoder embeds each text alone")
    tokenizer = _tokenizer(target)
    limit = max_length or _trained_length(target)
    manifest = target.extra.get("manifest")
    names = sorted(set(table.labels)) if table.labels is not None else []
    labels = (np.array([names.index(v) for v in table.labels], dtype=np.int64) if names
              else np.full(len(table.texts), -1, dtype=np.int64))
    examples = encode(tokenizer, Split(texts=table.texts, labels=labels), limit,
                      truncation=truncation_of(manifest) if manifest else "head")
    if reference is not None and len(reference) != len(examples):
        raise UserError(f"--reference: {len(reference)} vectors for {len(examples)} texts")
    return Inputs(timing=examples, pad_id=tokenizer.pad_token_id or 0, test=examples,
                  labels=labels if names else None, n_labels=len(names), reference=reference, self_reference=False,
                  about={"path": str(table.path), "rows": len(examples), "max_length": limit, "label_names": names,
                         "reference": reference is not None})
