"""results.json: every figure of a run. This module owns its keys: the runner builds it here (a header, then one
row per step), and every other module reads and adds to it through the functions below, never by its keys.

    recipe, recipe_fingerprint, machine, data {path, label_names, sizes, fingerprint, notes, transfer_in_test,
    augmented_in_test}, tokenizer_fingerprint, test_labels, validation_labels, steps [one row per step, the
    teacher first],
    artifact {path, temperature, ece, ece_raw} (when built), cautions (once the run is finished), budget_verdict
    (the recipe budget's verdict, when it sets limits)

A step's row: name, format, path, metrics {accuracy, macro_f1, per_class, ...}, latency_ms {p50, p95, ..., the
teacher and every step timed together in interleaved rounds: round_p50, spread, p95_over_p50, others_cpu_share, unstable},
latency_ms_alone (timed right after the step), size_bytes, load_seconds, memory, seconds, tokenizer_fingerprint,
info (what the step did: its step.json's), predictions, accuracy_drop, agreement_with_teacher, and against the
teacher accuracy_drop_ci95, mcnemar, bootstrap; agreement_with_fp32 for an int8 step; calibration and
validation {metrics, predictions} for the shipped step.
"""
from __future__ import annotations

from pathlib import Path
from typing import Optional

from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.rundir import (STUDENT, STUDENT_INT8, STUDENT_ONNX_INT8_DYNAMIC, STUDENT_ONNX_INT8_STATIC,
                                     STUDENT_PRUNED, read_json)

SPLITS = ("train", "validation", "test")


# ---- building ----------------------------------------------------------------------------------------------


def header(recipe, machine: dict, data, data_fingerprint: str, tokenizer_fp: str) -> dict:
    """A run's results before any step: what it was asked, where, and on which data (`data` as
    shrinkwrap.ml.data loads it)."""
    return {
        "recipe": recipe.model_dump(mode="json"), "recipe_fingerprint": recipe.fingerprint(),
        "machine": machine,
        "data": {"path": str(recipe.resolve(recipe.data.path)), "label_names": data.label_names,
                 "sizes": {s: len(getattr(data, s)) for s in SPLITS},
                 "fingerprint": data_fingerprint, "notes": data.notes},
        "tokenizer_fingerprint": tokenizer_fp,
        "test_labels": data.test.labels.tolist(),
        "validation_labels": data.validation.labels.tolist(),
        "steps": [],
    }


def step_row(name: str, path: Path, record: dict, bench: dict) -> dict:
    """A step's row: its benchmark and what it did (`record`, its step.json). The runner adds how it compares with
    the teacher's row, as the run's task compares (outputs.tasks: compare)."""
    row = {"name": name, "format": bench["format"], "path": str(path),
           "metrics": bench["metrics"], "latency_ms": bench["latency_ms"], "size_bytes": bench["size_bytes"],
           "load_seconds": bench["load_seconds"], "memory": bench.get("memory"), "seconds": record["seconds"],
           "tokenizer_fingerprint": record["tokenizer_fingerprint"], "info": record["info"],
           "source": record.get("after"), "predictions": bench["predictions"]}
    for key in ("agreement_with_fp32", "cosine_with_fp32"):  # an int8 step against the fp32 graph it came from
        if key in record["info"]:
            row[key] = record["info"][key]
    return row


def unmeasured_row(name: str, fmt: str, path: Path, record: dict, size_bytes: int) -> dict:
    """A step's row when the run measures nothing (a search's untrained candidates): where it is and its size."""
    return {"name": name, "format": fmt, "path": str(path), "size_bytes": size_bytes, "seconds": record["seconds"],
            "tokenizer_fingerprint": record["tokenizer_fingerprint"], "info": record["info"]}


def set_latency(row: dict, latency: dict) -> None:
    """A step's latency timed with the others in interleaved rounds becomes its `latency_ms`; the figure timed
    right after the step, alone, stays as `latency_ms_alone`."""
    if "latency_ms" in row and "latency_ms_alone" not in row:
        row["latency_ms_alone"] = row["latency_ms"]
    row["latency_ms"] = latency


def add_row(results: dict, row: dict) -> None:
    results["steps"].append(row)


def set_data_overlap(results: dict, key: str, count: int) -> None:
    """How many transfer texts (`transfer_in_test`) or augmented copies (`augmented_in_test`) are test texts."""
    results["data"][key] = count


def set_calibration(results: dict, calibration: dict) -> None:
    """The shipped step's temperature scaling (shrinkwrap.chain.runner.calibrate_step)."""
    final_row(results)["calibration"] = calibration


def set_validation(results: dict, metrics: dict, predictions: list) -> None:
    """The shipped step's quality on the validation split (what a search ranks candidates by)."""
    final_row(results)["validation"] = {"metrics": metrics, "predictions": predictions}


def set_artifact(results: dict, path: Path) -> None:
    """Where the run's artifact is, with the shipped step's calibration figures."""
    cal = final_row(results).get("calibration") or {}
    results["artifact"] = {"path": str(path), **{k: cal[k] for k in ("temperature", "ece", "ece_raw") if k in cal}}


def set_cautions(results: dict, lines: list[str]) -> None:
    results["cautions"] = lines


def set_verdict(results: dict, verdict: dict) -> None:
    """The recipe budget's verdict on the shipped step (outputs.gate.Verdict.as_dict), as `run` gated it."""
    results["budget_verdict"] = verdict


# ---- reading -----------------------------------------------------------------------------------------------


def load(path: Path) -> dict:
    """A results.json, or a one-line UserError saying why it cannot be one."""
    results = read_json(path, "results file")
    if not isinstance(results, dict) or not isinstance(results.get("steps"), list):
        raise UserError(f"{path}: not a shrinkwrap results.json (no list of steps)")
    return results


def steps_of(results: dict) -> list[dict]:
    """Every step's row, in chain order, the teacher first."""
    return results["steps"]


def rows_after_teacher(results: dict) -> list[dict]:
    return results["steps"][1:]


def teacher_row(results: dict) -> dict:
    """The first row: the reference every other step is compared with."""
    return results["steps"][0]


def final_row(results: dict) -> dict:
    """The last row: the step that ships."""
    return results["steps"][-1]


def step_named(results: dict, name: str) -> Optional[dict]:
    return next((s for s in results.get("steps") or [] if isinstance(s, dict) and s.get("name") == name), None)


def recipe_dump(results: dict) -> dict:
    """The recipe the run used, as plain data (every key, defaults included)."""
    return results.get("recipe") or {}


def recipe_of(results: dict):
    """The recipe the run used, validated again (its methods, e.g. student_length)."""
    from shrinkwrap.recipe.schema import Recipe

    return Recipe.model_validate(recipe_dump(results))


def recipe_fingerprint(results: dict) -> str:
    return results["recipe_fingerprint"]


def run_name(results: dict) -> str:
    return recipe_dump(results)["name"]


def data_info(results: dict) -> dict:
    """The data block: path, label_names, sizes, fingerprint, notes (and the overlap counts)."""
    return results.get("data") or {}


def label_names(results: dict) -> list[str]:
    return data_info(results).get("label_names") or []


def data_notes(results: dict) -> list[str]:
    return data_info(results).get("notes") or []


def test_labels(results: dict) -> list[int]:
    return results["test_labels"]


def validation_labels(results: dict) -> Optional[list[int]]:
    return results.get("validation_labels")


def validation_of(row: dict) -> Optional[dict]:
    """A step's quality on the validation split, {metrics, predictions}, where it was measured (the shipped step)."""
    return row.get("validation")


def machine_of(results: dict) -> dict:
    return results["machine"]


def artifact_path(results: dict) -> Optional[str]:
    return (results.get("artifact") or {}).get("path")


def verdict_of(results: dict) -> Optional[dict]:
    return results.get("budget_verdict")


def cautions_of(results: dict) -> list[str]:
    return results.get("cautions") or []


def lineage(results: dict, row: Optional[dict] = None) -> list[str]:
    """The names of `row` (default: the final row) and of every step it was made from, following each row's
    `source`; rows from before sources were recorded: the chain's rule, every step but the measured-only int8
    side branches."""
    row = row or final_row(results)
    if "source" not in row:
        side = (STUDENT_INT8, STUDENT_ONNX_INT8_STATIC, STUDENT_ONNX_INT8_DYNAMIC)
        return [s["name"] for s in steps_of(results) if s["name"] not in side]
    names = []
    while row is not None:
        names.append(row["name"])
        row = step_named(results, row["source"]) if row.get("source") else None
    return names


def validation_accuracy(results: dict) -> float:
    """The best validation accuracy of the last trained student step (a pruned student's recovery first);
    -inf when no student step trained."""
    for name in (STUDENT_PRUNED, STUDENT):
        row = step_named(results, name)
        if row is None:
            continue
        info = row["info"].get("recovery", {}) if name == STUDENT_PRUNED else row["info"]
        curve, best = info.get("curve"), info.get("best_epoch")
        if curve and best:
            return float(curve[best - 1]["accuracy"])
    return float("-inf")
