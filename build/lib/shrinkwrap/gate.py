"""Release gate: a budget and a results.json -> one verdict per limit -> an exit code and JUnit XML.

Reads only results.json (and, in regression mode, a baseline results.json). A limit the results
cannot answer (a field missing, latency measured at another shape) is bad input, never a pass.
"""
from __future__ import annotations

import xml.etree.ElementTree as ET
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Optional

from shrinkwrap.errors import EXIT_BUDGET, EXIT_OK, UserError
from shrinkwrap.recipe import BudgetConfig, RegressionTolerance, validate_budget
from shrinkwrap.results import final_step, load, step_named, teacher_row

PASS, FAIL, SKIP = "pass", "FAIL", "skipped"


@dataclass
class Check:
    name: str                 # the budget key, e.g. "latency_p95_ms" or "regression.p95_percent"
    detail: str               # what exactly was measured
    allowed: float
    measured: Optional[float]
    comparison: str           # "<=" or ">="
    unit: str
    verdict: str

    def line(self) -> str:
        if self.verdict == SKIP:
            return f"{self.name}: skipped — {self.detail}"
        word = "above" if self.comparison == "<=" else "below"
        state = "within" if self.verdict == PASS else word
        return (f"{self.name}: {_num(self.measured)}{self.unit} is {state} the limit {_num(self.allowed)}{self.unit} "
                f"({self.detail})")


@dataclass
class Verdict:
    results_path: str
    step: str
    budget_source: str
    checks: list[Check]
    cautions: list = field(default_factory=list)   # report.cautions: what the averages hide, one line each

    @property
    def failed(self) -> list[Check]:
        return [c for c in self.checks if c.verdict == FAIL]

    @property
    def exit_code(self) -> int:
        return EXIT_BUDGET if self.failed else EXIT_OK

    def as_dict(self) -> dict:
        return {"results": self.results_path, "step": self.step, "budget": self.budget_source,
                "passed": not self.failed, "checks": [asdict(c) for c in self.checks], "cautions": self.cautions}


def _num(x: Optional[float]) -> str:
    if x is None:
        return "—"
    return f"{x:.4f}".rstrip("0").rstrip(".") if abs(x) < 1e6 else f"{x:.4g}"


def _check(name: str, detail: str, allowed: float, measured: float, comparison: str, unit: str = "") -> Check:
    ok = measured <= allowed if comparison == "<=" else measured >= allowed
    return Check(name, detail, allowed, measured, comparison, unit, PASS if ok else FAIL)


def _field(entry: dict, path: str, where: str, hint: str = ""):
    node = entry
    for part in path.split("."):
        if not isinstance(node, dict) or part not in node:
            raise UserError(f"{where}: step {entry.get('name', '?')} has no {path}" + (f" — {hint}" if hint else ""))
        node = node[part]
    return node


def _number(entry: dict, path: str, where: str, hint: str = "") -> float:
    value = _field(entry, path, where, hint)
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise UserError(f"{where}: step {entry.get('name', '?')} {path} = {value!r} — expected a number")
    return float(value)


def pick_step(results: dict, name: Optional[str], where: str) -> dict:
    steps = results.get("steps")
    if not isinstance(steps, list) or not steps:
        raise UserError(f"{where}: no steps recorded — nothing to gate")
    if name is None:
        return final_step(results)  # the final step is what ships
    step = step_named(results, name)
    if step is not None:
        return step
    raise UserError(f"{where}: --step {name} — steps in this run: {', '.join(s.get('name', '?') for s in steps)}")


def budget_of_results(results: dict, where: str) -> BudgetConfig:
    """The budget: section of the recipe the run used (results.json keeps the recipe)."""
    recipe = results.get("recipe")
    if not isinstance(recipe, dict):
        raise UserError(f"{where}: no recipe recorded — pass --budget FILE")
    return validate_budget(recipe.get("budget") or {}, f"{where}: recipe.budget")


def with_tolerances(budget: BudgetConfig, items: list[str]) -> BudgetConfig:
    """`--tolerance p95_percent=10` sets the budget's regression.p95_percent (command line wins over the file)."""
    if not items:
        return budget
    names = ", ".join(RegressionTolerance.model_fields)
    raw = budget.model_dump()
    for item in items:
        key, sep, value = item.partition("=")
        if not sep or not key.strip():
            raise UserError(f"--tolerance {item} — expected NAME=VALUE with NAME one of {names}")
        try:
            number = float(value.strip().removesuffix("%"))
        except ValueError:
            raise UserError(f"--tolerance {item} — {value!r} is not a number") from None
        raw["regression"][key.strip()] = number
    return validate_budget(raw, "--tolerance")


def _latency_shape(step: dict, budget: BudgetConfig, where: str) -> str:
    lat = _field(step, "latency_ms", where)
    batch, length = lat.get("batch_size"), lat.get("sequence_length")
    for key, want, have in (("batch_size", budget.batch_size, batch), ("sequence_length", budget.sequence_length, length)):
        if want is not None and want != have:
            raise UserError(f"{where}: step {step['name']} latency was measured at {key} {have} — the budget's "
                            f"{key} is {want}; benchmark at {want} (recipe bench.{key}) or change the budget")
    return f"batch {batch} × {length} tokens"


def _regression_checks(step: dict, base: dict, budget: BudgetConfig, where: str, base_where: str) -> list[Check]:
    out, tol = [], budget.regression
    if tol.p95_percent is not None:
        shape = _latency_shape(step, budget, where)
        base_lat, lat = _field(base, "latency_ms", base_where), step["latency_ms"]
        if (base_lat.get("batch_size"), base_lat.get("sequence_length")) != (lat.get("batch_size"), lat.get("sequence_length")):
            raise UserError(f"{base_where}: step {base['name']} latency was measured at batch {base_lat.get('batch_size')} "
                            f"× {base_lat.get('sequence_length')} tokens, this run at {shape} — not comparable")
        # Absolute times drift between runs; the ratio to the reference workload of the same run does much less,
        # so it is compared whenever both runs have it.
        if "p95_over_reference" in lat and "p95_over_reference" in base_lat:
            key, what = "p95_over_reference", "p95 / reference workload"
        else:
            key, what = "p95", "p95 ms"
        now, then = _number(step, f"latency_ms.{key}", where), _number(base, f"latency_ms.{key}", base_where)
        rise = (now / then - 1) * 100
        out.append(_check("regression.p95_percent", f"{what} {_num(now)} vs baseline {_num(then)}, {shape}",
                          tol.p95_percent, rise, "<=", " %"))
    if tol.accuracy_points is not None:
        now = _number(step, "metrics.accuracy", where)
        then = _number(base, "metrics.accuracy", base_where)
        out.append(_check("regression.accuracy_points", f"accuracy {_num(now)} vs baseline {_num(then)}",
                          tol.accuracy_points, (then - now) * 100, "<=", " points"))
    if tol.size_percent is not None:
        now = _number(step, "size_bytes", where)
        then = _number(base, "size_bytes", base_where)
        out.append(_check("regression.size_percent", f"{_num(now / 1e6)} MB vs baseline {_num(then / 1e6)} MB",
                          tol.size_percent, (now / then - 1) * 100, "<=", " %"))
    return out


def _class_recall_check(results: dict, step: dict, allowed: float, where: str) -> Check:
    """The class with the largest recall loss vs the teacher, named with its counts."""
    ref = teacher_row(results)
    names = (results.get("data") or {}).get("label_names") or []
    recall = _field(step, "metrics.per_class.recall", where)
    ref_recall = _field(ref, "metrics.per_class.recall", where)
    support = _field(ref, "metrics.per_class.support", where)
    if not (len(recall) == len(ref_recall) == len(support) == len(names)):
        raise UserError(f"{where}: per-class recall of {step['name']} and {ref['name']} do not cover the "
                        f"{len(names)} classes")
    drops = [(ref_recall[i] - recall[i]) * 100 for i in range(len(names))]
    worst = max(range(len(names)), key=lambda i: drops[i])
    lost = round((ref_recall[worst] - recall[worst]) * support[worst])
    counts = f"lost {lost} of {support[worst]} texts" if lost >= 0 else f"gained {-lost} of {support[worst]} texts"
    return _check("max_class_recall_drop_points",
                  f"class {names[worst]!r}: recall {_num(ref_recall[worst])} → {_num(recall[worst])} vs {ref['name']}, "
                  f"{counts} (largest of {len(names)} classes)", allowed, drops[worst], "<=", " points")


def evaluate(results: dict, budget: BudgetConfig, step_name: Optional[str] = None, baseline: Optional[dict] = None,
             where: str = "results.json", baseline_where: str = "baseline", budget_source: str = "recipe") -> Verdict:
    """Every limit the budget sets, checked against one step. Raises UserError when results cannot answer one."""
    step = pick_step(results, step_name, where)
    is_reference = step is teacher_row(results)
    checks = []
    if budget.latency_p95_ms is not None:
        shape = _latency_shape(step, budget, where)
        checks.append(_check("latency_p95_ms", f"p95 latency, {shape}", budget.latency_p95_ms,
                             _number(step, "latency_ms.p95", where), "<=", " ms"))
    if budget.latency_p95_over_reference is not None:
        shape = _latency_shape(step, budget, where)
        ratio = _number(step, "latency_ms.p95_over_reference", where,
                        "these results predate the reference workload; benchmark again with this version")
        checks.append(_check("latency_p95_over_reference", f"p95 / reference matrix-product workload, {shape}",
                             budget.latency_p95_over_reference, ratio, "<=", "×"))
    if budget.size_mb is not None:
        checks.append(_check("size_mb", "size on disk, MB = 10^6 bytes", budget.size_mb,
                             _number(step, "size_bytes", where) / 1e6, "<=", " MB"))
    if budget.accuracy_drop_points is not None:
        ref = teacher_row(results)["name"]
        if budget.accuracy_drop_upper_bound and not is_reference:
            interval = _field(step, "accuracy_drop_ci95", where, "these results predate the bootstrap interval")
            if not (isinstance(interval, list) and len(interval) == 2):
                raise UserError(f"{where}: step {step['name']} accuracy_drop_ci95 = {interval!r} — expected [low, high]")
            lo, hi = interval
            checks.append(_check("accuracy_drop_points", f"upper end of the 95 % interval [{_num(lo)}, {_num(hi)}] "
                                 f"of the drop vs {ref}", budget.accuracy_drop_points, float(hi), "<=", " points"))
        else:
            # The reference's drop against itself is 0 exactly, interval included.
            checks.append(_check("accuracy_drop_points", f"accuracy drop vs {ref}", budget.accuracy_drop_points,
                                 _number(step, "accuracy_drop", where), "<=", " points"))
    if budget.min_accuracy is not None:
        checks.append(_check("min_accuracy", "accuracy on the test split", budget.min_accuracy,
                             _number(step, "metrics.accuracy", where), ">="))
    if budget.max_class_recall_drop_points is not None:
        checks.append(_class_recall_check(results, step, budget.max_class_recall_drop_points, where))
    if budget.min_agreement is not None:
        checks.append(_check("min_agreement", f"share of test texts given {teacher_row(results)['name']}'s label",
                             budget.min_agreement, _number(step, "agreement_with_teacher", where), ">="))
    if budget.max_ece is not None:
        if "calibration" in step:
            ece = _number(step, "calibration.ece", where)
            detail = (f"test ECE, 15 bins, with temperature {_num(step['calibration']['temperature'])} fitted on "
                      f"validation (without: {_num(step['calibration']['ece_raw'])})")
        else:  # a step that does not ship: its scores as they are
            ece = _number(step, "metrics.ece", where, "these results predate calibration figures; run again")
            detail = "test ECE, 15 bins, uncalibrated scores (this step is not the shipped artifact)"
        checks.append(_check("max_ece", detail, budget.max_ece, ece, "<="))
    tol = budget.regression
    tolerances = {k: v for k, v in tol.model_dump().items() if v is not None}
    if baseline is not None:
        if not tolerances:
            raise UserError(f"--baseline {baseline_where}: the budget sets no regression tolerance — add e.g. "
                            f"--tolerance p95_percent=10 --tolerance accuracy_points=1")
        checks += _regression_checks(step, pick_step(baseline, step["name"], baseline_where), budget, where,
                                     baseline_where)
    else:
        checks += [Check(f"regression.{k}", "no --baseline to compare with", v, None, "<=",
                         " points" if k.endswith("points") else " %", SKIP) for k, v in tolerances.items()]
    if all(c.verdict == SKIP for c in checks):
        keys = [k for k in BudgetConfig.model_fields if k not in ("batch_size", "sequence_length", "accuracy_drop_upper_bound")]
        raise UserError(f"{budget_source}: the budget sets no limit to check" + (" without --baseline" if checks else "")
                        + f" — set at least one of {', '.join(keys)}")
    from shrinkwrap.report import cautions

    return Verdict(where, step["name"], budget_source, checks, cautions(results, budget))


def format_table(verdict: Verdict) -> str:
    rows = [("limit", "allowed", "measured", "verdict", "what")]
    for c in verdict.checks:
        sign = "≤" if c.comparison == "<=" else "≥"
        rows.append((c.name, f"{sign} {_num(c.allowed)}{c.unit}", _num(c.measured) + (c.unit if c.measured is not None else ""), c.verdict,
                     c.detail))
    widths = [max(len(r[i]) for r in rows) for i in range(5)]
    lines = [f"gate: step {verdict.step} of {verdict.results_path} (budget: {verdict.budget_source})"]
    lines += ["  ".join(cell.ljust(w) for cell, w in zip(r, widths)).rstrip() for r in rows]
    lines.append("")
    if verdict.failed:
        lines += [f"gate FAILED — {c.line()}" for c in verdict.failed]
    else:
        met = sum(c.verdict == PASS for c in verdict.checks)
        lines.append(f"gate passed: {met} of {met} limits met")
    lines += [f"note: {c.line()}" for c in verdict.checks if c.verdict == SKIP]
    return "\n".join(lines)


def junit_xml(verdict: Verdict) -> str:
    """One testsuite, one testcase per limit: CI systems list each limit as a test."""
    n_fail = len(verdict.failed)
    n_skip = sum(c.verdict == SKIP for c in verdict.checks)
    counts = {"tests": str(len(verdict.checks)), "failures": str(n_fail), "errors": "0", "skipped": str(n_skip)}
    root = ET.Element("testsuites", name="shrinkwrap gate", **counts)
    suite = ET.SubElement(root, "testsuite", name=f"shrinkwrap gate: {verdict.step}", **counts)
    ET.SubElement(ET.SubElement(suite, "properties"), "property", name="results", value=verdict.results_path)
    for c in verdict.checks:
        case = ET.SubElement(suite, "testcase", classname=f"shrinkwrap.gate.{verdict.step}", name=c.name)
        if c.verdict == FAIL:
            ET.SubElement(case, "failure", message=c.line(), type="budget").text = c.line()
        elif c.verdict == SKIP:
            ET.SubElement(case, "skipped", message=c.detail)
        else:
            ET.SubElement(case, "system-out").text = c.line()
    ET.indent(root)
    return '<?xml version="1.0" encoding="UTF-8"?>\n' + ET.tostring(root, encoding="unicode") + "\n"


def gate_results(results_path: Path, budget_path: Optional[Path] = None, step: Optional[str] = None,
                 baseline_path: Optional[Path] = None, tolerances: list[str] = ()) -> Verdict:
    """What `shrinkwrap gate` checks: all inputs are read and validated before any verdict."""
    from shrinkwrap.recipe import load_budget

    if tolerances and baseline_path is None:
        raise UserError(f"--tolerance {tolerances[0]} — tolerances are against a baseline; add --baseline OLD_RESULTS")
    results = load(results_path)
    if budget_path is not None:
        budget, source = load_budget(budget_path), str(budget_path)
    else:
        budget, source = budget_of_results(results, str(results_path)), f"{results_path}: recipe.budget"
    budget = with_tolerances(budget, list(tolerances))
    baseline = load(baseline_path) if baseline_path is not None else None
    return evaluate(results, budget, step, baseline, str(results_path), str(baseline_path), source)
