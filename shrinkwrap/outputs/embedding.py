"""The embedding task in the outputs: which budget limits judge a sentence encoder and how they are checked, what
its averages hide (texts whose vector left the teacher's space although the mean cosine is high), and the columns
of its step table.

Every task answers the same names (shrinkwrap.outputs.tasks)."""
from __future__ import annotations

from typing import Optional

from shrinkwrap.outputs.checks import Check, check, number
from shrinkwrap.outputs.results import (label_names, rows_after_teacher, steps_of, teacher_row,
                                        test_labels)
from shrinkwrap.recipe.budget import TASK_QUALITY_KEYS

NAME = "embedding"
ARTICLE = "an"
BUDGET_KEYS = TASK_QUALITY_KEYS[NAME]
# A step whose 5th-percentile cosine to the teacher is this much below its mean: a tail of texts whose vectors left
# the teacher's space, which the mean hides. A class (at least CLASS_MIN texts) whose mean neighbour recall at 10 is
# this much below the step's average: its texts lost their neighbours more than the others. (Project rules of
# thumb, set on the demo and BBC News runs, where a trained student's p5 sits within 0.05 of its mean.)
P5_GAP = 0.1
CLASS_GAP = 0.1
CLASS_MIN = 5
CAUTION_RULE = (f"a step is named when its 5th-percentile cosine to the teacher is more than {P5_GAP:g} below its "
                f"mean; with labels, a class of at least {CLASS_MIN} test texts is named when its mean neighbour "
                f"recall at 10 is more than {CLASS_GAP:g} below the step's average")
CAUTION_RULE_TITLE = "Rule"
NO_CAUTION = f"No step's vectors left the teacher's space for a tail of texts or a class ({CAUTION_RULE})."
QUALITY, QUALITY_LABEL = "neighbour_recall_at_10", "neighbour recall at 10"   # what steps are plotted and ranked by


def headline(row: dict) -> str:
    """A step's quality in a few words (the report's "What shipped")."""
    m = row["metrics"]
    return (f"neighbour recall at 10 {m['neighbour_recall_at_10']:.3f}, cosine to the teacher "
            f"{m['cosine_to_teacher']:.4f} (5th percentile {m['cosine_to_teacher_p5']:.3f})")


def compare(row: dict, teacher: Optional[dict], test_labels) -> dict:
    """What results.json stores for a step against the teacher: how much kNN accuracy it lost, in points."""
    m, ref = row["metrics"], (teacher or row)["metrics"]
    out = {}
    if "knn_accuracy" in m:
        out["knn_accuracy_drop"] = round((ref["knn_accuracy"] - m["knn_accuracy"]) * 100, 4)
    return out


# The figures of a step an artifact's manifest records (those the step has: the label ones need labels).
ARTIFACT_KEYS = ("cosine_to_teacher", "cosine_to_teacher_p5", "neighbour_recall_at_10", "cross_recall_at_10",
                 "knn_accuracy", "probe_accuracy", "spearman")


def artifact_metrics(step: dict) -> dict:
    """The shipped step's quality as an artifact's manifest records it."""
    m = {k: step["metrics"][k] for k in ARTIFACT_KEYS if k in step["metrics"]}
    if "knn_accuracy_drop" in step:
        m["knn_accuracy_drop_vs_teacher_points"] = step["knn_accuracy_drop"]
    if "cosine_with_fp32" in step["info"]:
        m["cosine_with_fp32"] = step["info"]["cosine_with_fp32"]
    return m


def quality_checks(results: dict, step: dict, budget, where: str) -> list[Check]:
    """The budget's quality limits on one step's row (BUDGET_KEYS), each one verdict."""
    out = []
    ref = teacher_row(results)["name"]
    if budget.min_cosine_to_teacher is not None:
        out.append(check("min_cosine_to_teacher", f"mean cosine of the step's test vectors to {ref}'s",
                         budget.min_cosine_to_teacher, number(step, "metrics.cosine_to_teacher", where), ">="))
    if budget.min_neighbour_recall is not None:
        out.append(check("min_neighbour_recall", f"share of each test text's 10 nearest under {ref}'s vectors found "
                         f"again", budget.min_neighbour_recall, number(step, "metrics.neighbour_recall_at_10", where),
                         ">="))
    if budget.min_cross_recall is not None:
        out.append(check("min_cross_recall", f"queries embedded by the step against an index built by {ref}",
                         budget.min_cross_recall, number(step, "metrics.cross_recall_at_10", where), ">="))
    if budget.max_knn_accuracy_drop_points is not None:
        out.append(check("max_knn_accuracy_drop_points", f"5-nearest-neighbour accuracy drop vs {ref}, leave-one-out "
                         f"on the test split", budget.max_knn_accuracy_drop_points,
                         number(step, "knn_accuracy_drop", where, "the data has no labels: set data.label"), "<=",
                         " points"))
    return out


def class_recall(results: dict, step: dict) -> list[dict]:
    """Per class of the test texts (with labels): how many texts, and their mean neighbour recall at 10 under the
    step (its per-text figures, `predictions`)."""
    import numpy as np

    names, per_text = label_names(results), step.get("predictions")
    if not names or not per_text:
        return []
    y, r = np.asarray(test_labels(results)), np.asarray(per_text, dtype=float)
    return [{"class": n, "support": int((y == k).sum()), "recall": float(r[y == k].mean()) if (y == k).any() else None}
            for k, n in enumerate(names)]


def cautions(results: dict, budget=None) -> list[tuple[str, str]]:
    """(step, line) for each step whose vectors left the teacher's space for a tail of texts, and each class whose
    texts lost their neighbours much more than the average (CAUTION_RULE)."""
    out = []
    for s in rows_after_teacher(results):
        m = s["metrics"]
        gap = m["cosine_to_teacher"] - m["cosine_to_teacher_p5"]
        if gap > P5_GAP:
            out.append((s["name"], f"{s['name']}: 5 % of the test texts have a cosine to the teacher's vector below "
                                   f"{m['cosine_to_teacher_p5']:.3f} while the mean is {m['cosine_to_teacher']:.3f} — "
                                   f"an index built with the teacher may not find them"))
        average = m["neighbour_recall_at_10"]
        for c in class_recall(results, s):
            if c["support"] >= CLASS_MIN and c["recall"] is not None and average - c["recall"] > CLASS_GAP:
                out.append((s["name"], f"{s['name']}: class '{c['class']}' keeps {c['recall']:.3f} of its test texts' "
                                       f"10 nearest neighbours against {average:.3f} on average ({c['support']} texts) "
                                       f"— search and deduplication within it got worse than the average says"))
    return out


def per_class_cautions(results: dict) -> list[str]:
    """The card's bullets of the cautions about classes."""
    return [f"- {line}." for _, line in cautions(results) if "class '" in line]


def class_changes(results: dict, step: dict) -> list[dict]:
    return []  # no per-class precision and recall: an encoder predicts no class


def per_class_rows(results: dict) -> tuple[list[str], list[list[str]]]:
    """Per class (with labels): its test texts and each step's mean neighbour recall at 10 over them."""
    steps = steps_of(results)
    per_step = [class_recall(results, s) for s in steps]
    if not per_step or not per_step[0]:
        return ["class", "support"], []
    rows = [[c["class"], str(c["support"]), *("—" if p[i]["recall"] is None else f"{p[i]['recall']:.3f}"
                                              for p in per_step)] for i, c in enumerate(per_step[0])]
    return ["class", "support", *(s["name"] for s in steps)], rows


def detail_sections(results: dict) -> list[tuple]:
    """The report's sections of an encoder beside its step table: the distribution of each step's cosine to the
    teacher over the test texts, and (with labels) each class's neighbour recall."""
    rows = []
    for s in steps_of(results):
        m = s["metrics"]
        d = m.get("cosine_deciles") or [None] * 11
        cells = [d[0], m.get("cosine_to_teacher_p5"), d[1], d[5], d[9], d[10]]
        rows.append([s["name"], *("—" if v is None else f"{v:.4f}" for v in cells)])
    out: list[tuple] = [("Cosine to the teacher per test text", [
        ("table", ["step", "lowest", "p5", "p10", "median", "p90", "highest"], rows, 1),
        ("p", "Each test text's vector against the teacher's vector of the same text. The mean in the step table "
              "can hide a tail: the lowest and the 5th percentile are the texts an index built with the teacher "
              "is likeliest to miss.")])]
    header, class_rows = per_class_rows(results)
    if class_rows:
        out.append(("Neighbour recall at 10 per class (test split)", [
            ("table", header, class_rows, 1),
            ("p", "Per class, the mean over its test texts of the share of each text's 10 nearest (teacher's "
                  "vectors) found again by the step's vectors.")]))
    return out


def _f(m: dict, key: str, spec: str = ".4f") -> str:
    return "—" if m.get(key) is None else format(m[key], spec)


def step_rows(results: dict) -> tuple[list[str], list[list[str]], str]:
    """Header, one row of cells per step, and the caption: the same table for report.md and report.html."""
    steps = steps_of(results)
    ref = teacher_row(results)
    lat = ref["latency_ms"]
    header = ["step", "format", "cosine (p5)", "neighbours@10", "cross@10", "kNN acc.", "probe acc.", "Spearman",
              "p50 ms", "p95 ms", "size MB", "speed-up p50", "smaller"]
    rows = []
    for s in steps:
        m, l = s["metrics"], s["latency_ms"]
        rows.append([s["name"], s["format"], f"{m['cosine_to_teacher']:.4f} ({m['cosine_to_teacher_p5']:.3f})",
                     _f(m, "neighbour_recall_at_10", ".3f"), _f(m, "cross_recall_at_10", ".3f"), _f(m, "knn_accuracy"),
                     _f(m, "probe_accuracy"), _f(m, "spearman"), f"{l['p50']:.2f}", f"{l['p95']:.2f}",
                     f"{s['size_bytes'] / 1e6:.1f}", f"{lat['p50'] / l['p50']:.2f}×",
                     f"{ref['size_bytes'] / s['size_bytes']:.2f}×"])
    caption = (f"Latency: batch {lat['batch_size']} × {lat['sequence_length']} tokens, {lat['threads']} threads, the "
               f"teacher and every step timed together. Against `{ref['name']}`'s vectors of the same test texts: "
               f"cosine (mean, and 5th percentile), the share of each text's 10 nearest neighbours found again "
               f"(neighbours@10) and found by a query embedded by the step against an index of `{ref['name']}`'s "
               f"vectors (cross@10); with labels, 5-NN leave-one-out and logistic-probe accuracy; with scored "
               f"pairs, Spearman's rho of the pairs' cosine against their score.")
    return header, rows, caption
