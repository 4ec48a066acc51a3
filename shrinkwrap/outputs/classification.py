"""The classification task in the outputs: which budget limits judge a classifier and how they are checked,
what its averages hide (a class that lost much more than the average), and the columns of its step table.

Every task answers the same names (shrinkwrap.outputs.tasks): NAME, BUDGET_KEYS, quality_checks, cautions,
CAUTION_RULE, NO_CAUTION, per_class_cautions, step_rows, per_class_rows, class_changes."""
from __future__ import annotations

from typing import Optional

from shrinkwrap.outputs.checks import Check, check, field, num, number
from shrinkwrap.outputs.results import final_row, label_names, recipe_dump, rows_after_teacher, steps_of, teacher_row
from shrinkwrap.recipe.budget import TASK_QUALITY_KEYS
from shrinkwrap.serve.errors import UserError

NAME = "classification"
ARTICLE = "a"
# The budget keys that judge a classifier's quality (the latency, size and regression ones judge every task).
BUDGET_KEYS = TASK_QUALITY_KEYS[NAME]

# A class is called out when it lost more of its texts than the average loss explains: a one-sided
# binomial test of its lost texts among its test texts, at the rate the accuracy fell overall (at least
# CLASS_FLOOR_RATE, so that a step with no average loss is not flagged for one unlucky text), p < CLASS_P,
# and at least CLASS_MIN_LOST texts. A fixed points threshold misses a 5-point loss on a large class.
CLASS_P = 0.05
CLASS_FLOOR_RATE = 0.01
CLASS_MIN_LOST = 2
CLASS_RULE = (f"a class is named when it lost at least {CLASS_MIN_LOST} texts and more than the average drop explains "
              f"(one-sided binomial test at the overall loss rate, at least {CLASS_FLOOR_RATE:.0%}, p < {CLASS_P})")
NO_CAUTION = f"No class lost more recall than the average accuracy drop explains ({CLASS_RULE})."


def compare(row: dict, teacher: Optional[dict], test_labels) -> dict:
    """What results.json stores for a step against the `teacher` row (None: this is the teacher's): its accuracy
    drop in points, the share of test texts given the teacher's label, and the paired interval and test of the
    drop (shrinkwrap.bench.stats)."""
    import numpy as np

    ref = teacher or row
    out = {"accuracy_drop": round((ref["metrics"]["accuracy"] - row["metrics"]["accuracy"]) * 100, 4),
           "agreement_with_teacher": float(np.mean(np.array(ref["predictions"]) == np.array(row["predictions"])))}
    if teacher is not None:
        from shrinkwrap.bench.stats import compare_to_reference

        out.update(compare_to_reference(test_labels, ref["predictions"], row["predictions"]))
    return out


def artifact_metrics(step: dict) -> dict:
    """The shipped step's quality as an artifact's manifest records it."""
    m = {"accuracy": step["metrics"]["accuracy"], "macro_f1": step["metrics"]["macro_f1"],
         "per_class": step["metrics"]["per_class"], "accuracy_drop_vs_teacher_points": step["accuracy_drop"],
         "agreement_with_teacher": step["agreement_with_teacher"]}
    if "accuracy_drop_ci95" in step:
        m["accuracy_drop_ci95"] = step["accuracy_drop_ci95"]
    if "agreement_with_fp32" in step["info"]:
        m["agreement_with_fp32"] = step["info"]["agreement_with_fp32"]
    return m


def class_changes(results: dict, step: dict) -> list[dict]:
    """Per class, the step's precision and recall and their change vs the teacher, with counts of texts."""
    names = label_names(results)
    ref = teacher_row(results)["metrics"]["per_class"]
    m = step["metrics"]["per_class"]
    out = []
    for i, name in enumerate(names):
        n = int(ref["support"][i])
        lost = round((ref["recall"][i] - m["recall"][i]) * n)
        out.append({"class": name, "support": n, "precision": m["precision"][i], "recall": m["recall"][i],
                    "precision_change_points": (m["precision"][i] - ref["precision"][i]) * 100,
                    "recall_change_points": (m["recall"][i] - ref["recall"][i]) * 100, "lost": lost})
    return out


def lost_too_many(lost: int, support: int, average_drop_points: float) -> tuple[bool, float]:
    from shrinkwrap.bench.exact import binomial_upper_tail

    if lost < CLASS_MIN_LOST or support == 0:
        return False, 1.0
    rate = max(CLASS_FLOOR_RATE, average_drop_points / 100)
    p = binomial_upper_tail(lost, support, min(rate, 1.0))
    return p < CLASS_P, p


def class_caution_list(results: dict) -> list[tuple[str, str]]:
    """(step, one plain line) per step and class that lost much more than the average (CLASS_RULE)."""
    out = []
    for s in rows_after_teacher(results):
        for c in class_changes(results, s):
            flagged, p = lost_too_many(c["lost"], c["support"], s["accuracy_drop"])
            if flagged:
                moved = (f"fell {s['accuracy_drop']:.2f} points" if s["accuracy_drop"] >= 0 else
                         f"rose {-s['accuracy_drop']:.2f} points")
                out.append((s["name"], f"{s['name']}: class '{c['class']}' lost {c['lost']} of {c['support']} texts "
                                       f"(recall {c['recall_change_points']:+.1f} points) while accuracy {moved} — "
                                       f"more than the average explains (binomial p = {p:.2g})"))
    return out


def per_class_cautions(results: dict) -> list[str]:
    """report.md / card bullets of class_caution_list."""
    return [f"- {line}." for _, line in class_caution_list(results)]


CAUTION_RULE = CLASS_RULE
CAUTION_RULE_TITLE = "Rule for classes"
QUALITY, QUALITY_LABEL = "accuracy", "accuracy"   # the figure a step's quality is plotted and ranked by


def headline(row: dict) -> str:
    """A step's quality in a few words (the report's "What shipped")."""
    return f"accuracy {row['metrics']['accuracy']:.4f}"


def cautions(results: dict, budget=None) -> list[tuple[str, str]]:
    """What a classifier's averages hide, as (the step it concerns, one line): a class that lost much more than
    the average (CLASS_RULE), and a drop within the budget that the test split is too small to settle.
    `budget`: a BudgetConfig (else the recipe's)."""
    out = class_caution_list(results)
    if budget is None:
        allowed = (recipe_dump(results).get("budget") or {}).get("accuracy_drop_points")
    else:
        allowed = budget.accuracy_drop_points
    final = final_row(results)
    ci = final.get("accuracy_drop_ci95")
    if allowed is not None and ci and final["accuracy_drop"] <= allowed < ci[1]:
        out.append((final["name"], f"{final['name']}: the accuracy drop {final['accuracy_drop']:.2f} points is "
                                   f"within the budget {allowed:g}, but its 95 % upper bound {ci[1]:.2f} is not — the "
                                   f"test split is too small to show the budget is met"))
    return out


def quality_checks(results: dict, step: dict, budget, where: str) -> list[Check]:
    """The budget's quality limits on one step's row (BUDGET_KEYS), each one verdict."""
    is_reference = step is teacher_row(results)
    checks = []
    if budget.accuracy_drop_points is not None:
        ref = teacher_row(results)["name"]
        if budget.accuracy_drop_upper_bound and not is_reference:
            interval = field(step, "accuracy_drop_ci95", where, "these results predate the bootstrap interval")
            if not (isinstance(interval, list) and len(interval) == 2):
                raise UserError(f"{where}: step {step['name']} accuracy_drop_ci95 = {interval!r} — expected [low, high]")
            lo, hi = interval
            checks.append(check("accuracy_drop_points", f"upper end of the 95 % interval [{num(lo)}, {num(hi)}] "
                                 f"of the drop vs {ref}", budget.accuracy_drop_points, float(hi), "<=", " points"))
        else:
            # The reference's drop against itself is 0 exactly, interval included.
            checks.append(check("accuracy_drop_points", f"accuracy drop vs {ref}", budget.accuracy_drop_points,
                                 number(step, "accuracy_drop", where), "<=", " points"))
    if budget.min_accuracy is not None:
        checks.append(check("min_accuracy", "accuracy on the test split", budget.min_accuracy,
                             number(step, "metrics.accuracy", where), ">="))
    if budget.max_class_recall_drop_points is not None:
        checks.append(_class_recallcheck(results, step, budget.max_class_recall_drop_points, where))
    if budget.min_agreement is not None:
        checks.append(check("min_agreement", f"share of test texts given {teacher_row(results)['name']}'s label",
                             budget.min_agreement, number(step, "agreement_with_teacher", where), ">="))
    if budget.max_ece is not None:
        if "calibration" in step:
            ece = number(step, "calibration.ece", where)
            detail = (f"test ECE, 15 bins, with temperature {num(step['calibration']['temperature'])} fitted on "
                      f"validation (without: {num(step['calibration']['ece_raw'])})")
        else:  # a step that does not ship: its scores as they are
            ece = number(step, "metrics.ece", where, "these results predate calibration figures; run again")
            detail = "test ECE, 15 bins, uncalibrated scores (this step is not the shipped artifact)"
        checks.append(check("max_ece", detail, budget.max_ece, ece, "<="))
    return checks


def _class_recallcheck(results: dict, step: dict, allowed: float, where: str) -> Check:
    """The class with the largest recall loss vs the teacher, named with its counts."""
    ref = teacher_row(results)
    names = label_names(results)
    recall = field(step, "metrics.per_class.recall", where)
    ref_recall = field(ref, "metrics.per_class.recall", where)
    support = field(ref, "metrics.per_class.support", where)
    if not (len(recall) == len(ref_recall) == len(support) == len(names)):
        raise UserError(f"{where}: per-class recall of {step['name']} and {ref['name']} do not cover the "
                        f"{len(names)} classes")
    drops = [(ref_recall[i] - recall[i]) * 100 for i in range(len(names))]
    worst = max(range(len(names)), key=lambda i: drops[i])
    lost = round((ref_recall[worst] - recall[worst]) * support[worst])
    counts = f"lost {lost} of {support[worst]} texts" if lost >= 0 else f"gained {-lost} of {support[worst]} texts"
    return check("max_class_recall_drop_points",
                  f"class {names[worst]!r}: recall {num(ref_recall[worst])} → {num(recall[worst])} vs {ref['name']}, "
                  f"{counts} (largest of {len(names)} classes)", allowed, drops[worst], "<=", " points")


def _mb(n: int) -> str:
    return f"{n / 1e6:.1f}"


def _drop_cell(s: dict) -> str:
    ci = s.get("accuracy_drop_ci95")
    return f"{s['accuracy_drop']:+.2f}" + (f" [{ci[0]:+.2f}, {ci[1]:+.2f}]" if ci else "")


def step_rows(results: dict) -> tuple[list[str], list[list[str]], str]:
    """Header, one row of cells per step, and the caption: the same table for report.md and report.html."""
    steps = steps_of(results)
    ref = teacher_row(results)
    lat = ref["latency_ms"]
    header = ["step", "format", "accuracy", "macro-F1", "drop pts (95 % CI)", "McNemar p", "agreement", "p50 ms",
              "p95 ms", "size MB", "speed-up p50", "smaller"]
    rows = []
    for s in steps:
        m, l = s["metrics"], s["latency_ms"]
        p = s.get("mcnemar", {}).get("p_value")
        rows.append([s["name"], s["format"], f"{m['accuracy']:.4f}", f"{m['macro_f1']:.4f}", _drop_cell(s),
                     "—" if p is None else f"{p:.3g}", f"{s['agreement_with_teacher']:.3f}", f"{l['p50']:.2f}",
                     f"{l['p95']:.2f}", _mb(s["size_bytes"]), f"{lat['p50'] / l['p50']:.2f}×",
                     f"{ref['size_bytes'] / s['size_bytes']:.2f}×"])
    boot = next((s["bootstrap"] for s in steps if "bootstrap" in s), None)
    caption = (f"Latency: batch {lat['batch_size']} × {lat['sequence_length']} tokens, {lat['threads']} threads, "
               f"{lat['n']}+ timed runs after warm-up. Drop and ratios are against `{ref['name']}`; "
               f"agreement is the share of test texts where a step predicts the same label as `{ref['name']}`.")
    if boot:
        caption += (f" The interval is a paired bootstrap percentile interval ({boot['n_resamples']:,} resamples of "
                    f"the test texts, seed {boot['seed']}); McNemar p is the exact two-sided test on the texts where "
                    f"exactly one of the step and `{ref['name']}` is right.")
    return header, rows, caption


def detail_sections(results: dict) -> list[tuple]:
    """The report's sections of a classifier beside its step table (shrinkwrap.outputs.report: (title, parts)): recall
    per class and step, the per-class precision / recall change of the shipped step, calibration per step, and the
    shipped step's accuracy against coverage when abstaining below each threshold."""
    final = final_row(results)
    out: list[tuple] = [("Per-class recall (test split)", [("table", *per_class_rows(results), 1)])]
    if len(steps_of(results)) > 1:
        rows = [[c["class"], str(c["support"]), f"{c['precision']:.3f} ({c['precision_change_points']:+.1f})",
                 f"{c['recall']:.3f} ({c['recall_change_points']:+.1f})",
                 f"lost {c['lost']} of {c['support']}" if c["lost"] >= 0 else f"gained {-c['lost']} of {c['support']}"]
                for c in class_changes(results, final)]
        out.append((f"Per-class change of `{final['name']}` vs `{teacher_row(results)['name']}` (points)",
                    [("table", ["class", "support", "precision", "recall", "texts"], rows, 1)]))
    rows = [[s["name"], *(f"{s['metrics'][k]:.4f}" if k in s["metrics"] else "—" for k in ("ece", "brier", "nll"))]
            for s in steps_of(results)]
    parts: list[tuple] = [("table", ["step", "ECE", "Brier", "NLL"], rows, 1)]
    cal = final.get("calibration")
    if cal:
        parts += [("p", f"Temperature {cal['temperature']:.3f} fitted on {cal['validation_texts']} validation texts: "
                        f"test ECE {cal['ece_raw']:.4f} → {cal['ece']:.4f}. Abstaining below each calibrated top "
                        f"score (`predict --min-confidence`):"),
                  ("table", ["threshold", "coverage", "accuracy"],
                   [[f"{c['threshold']:.2f}", f"{c['coverage']:.3f}",
                     "—" if c["accuracy"] is None else f"{c['accuracy']:.4f}"] for c in cal["coverage"]], 0)]
    out.append(("Calibration (test split, 15-bin ECE, multi-class Brier, NLL)", parts))
    return out


def per_class_rows(results: dict) -> tuple[list[str], list[list[str]]]:
    names = label_names(results)
    steps = steps_of(results)
    support = steps[0]["metrics"]["per_class"]["support"]
    rows = [[n, str(support[i]), *(f"{s['metrics']['per_class']['recall'][i]:.3f}" for s in steps)]
            for i, n in enumerate(names)]
    return ["class", "support", *(s["name"] for s in steps)], rows
