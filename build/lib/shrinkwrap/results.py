"""results.json: every figure of a run. The runner builds it (a header, then one row per step); the
artifact, the reports and the gate read it through the accessors here.

    recipe, recipe_fingerprint, machine, data {path, label_names, sizes, fingerprint, notes},
    tokenizer_fingerprint, test_labels, steps [one row per step, the teacher first], artifact (when built)
"""
from __future__ import annotations

from pathlib import Path
from typing import Optional

from shrinkwrap.errors import UserError
from shrinkwrap.rundir import read_json

SPLITS = ("train", "validation", "test")


def header(recipe, machine: dict, data, data_fingerprint: str, tokenizer_fp: str) -> dict:
    """A run's results before any step: what it was asked, where, and on which data (`data` as
    shrinkwrap.data loads it)."""
    return {
        "recipe": recipe.model_dump(mode="json"), "recipe_fingerprint": recipe.fingerprint(),
        "machine": machine,
        "data": {"path": str(recipe.resolve(recipe.data.path)), "label_names": data.label_names,
                 "sizes": {s: len(getattr(data, s)) for s in SPLITS},
                 "fingerprint": data_fingerprint, "notes": data.notes},
        "tokenizer_fingerprint": tokenizer_fp,
        "test_labels": data.test.labels.tolist(),
        "steps": [],
    }


def step_row(name: str, path: Path, record: dict, bench: dict, teacher: Optional[dict], test_labels) -> dict:
    """A step's row: its benchmark, what it did (`record`, its step.json) and how it compares with the
    `teacher` row (None: this is the teacher's row)."""
    import numpy as np

    row = {"name": name, "format": bench["format"], "path": str(path),
           "metrics": bench["metrics"], "latency_ms": bench["latency_ms"], "size_bytes": bench["size_bytes"],
           "load_seconds": bench["load_seconds"], "memory": bench.get("memory"), "seconds": record["seconds"],
           "tokenizer_fingerprint": record["tokenizer_fingerprint"], "info": record["info"],
           "predictions": bench["predictions"]}
    if "agreement_with_fp32" in record["info"]:  # an int8 step against the fp32 graph it came from
        row["agreement_with_fp32"] = record["info"]["agreement_with_fp32"]
    ref = teacher or row
    row["accuracy_drop"] = round((ref["metrics"]["accuracy"] - row["metrics"]["accuracy"]) * 100, 4)
    row["agreement_with_teacher"] = float(np.mean(np.array(ref["predictions"]) == np.array(row["predictions"])))
    if teacher is not None:
        from shrinkwrap.bench.stats import compare_to_reference

        row.update(compare_to_reference(test_labels, ref["predictions"], row["predictions"]))
    return row


def load(path: Path) -> dict:
    """A results.json, or a one-line UserError saying why it cannot be one."""
    results = read_json(path, "results file")
    if not isinstance(results, dict) or not isinstance(results.get("steps"), list):
        raise UserError(f"{path}: not a shrinkwrap results.json (no list of steps)")
    return results


def teacher_row(results: dict) -> dict:
    """The first row: the reference every other step is compared with."""
    return results["steps"][0]


def final_step(results: dict) -> dict:
    """The last row: the step that ships."""
    return results["steps"][-1]


def step_named(results: dict, name: str) -> Optional[dict]:
    return next((s for s in results["steps"] if s.get("name") == name), None)
