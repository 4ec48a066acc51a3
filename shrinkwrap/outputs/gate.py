"""Release gate: a budget and a results.json -> one verdict per limit -> an exit code and JUnit XML.

Reads only results.json (and, in regression mode, a baseline results.json). A limit the results
cannot answer (a field missing, latency measured at another shape) is bad input, never a pass.
"""
from __future__ import annotations

import xml.etree.ElementTree as ET
from dataclasses import asdict, dataclass
from dataclasses import field as dataclass_field
from pathlib import Path
from typing import Callable, Optional

from shrinkwrap.bench.rounds import STEADY_RULE
from shrinkwrap.outputs.checks import FAIL, PASS, SKIP, Check, check, field, num, number
from shrinkwrap.outputs.findings import cautions
from shrinkwrap.outputs.results import final_row, load, recipe_dump, recipe_of, step_named, steps_of, teacher_row
from shrinkwrap.outputs.tasks import of_results
from shrinkwrap.recipe.budget import BudgetConfig, RegressionTolerance, validate_budget
from shrinkwrap.serve.errors import EXIT_BUDGET, EXIT_OK, UserError


@dataclass
class Verdict:
    results_path: str
    step: str
    budget_source: str
    checks: list[Check]
    cautions: list = dataclass_field(default_factory=list)   # report.cautions: what the averages hide, one line each

    @property
    def failed(self) -> list[Check]:
        return [c for c in self.checks if c.verdict == FAIL]

    @property
    def exit_code(self) -> int:
        return EXIT_BUDGET if self.failed else EXIT_OK

    def as_dict(self) -> dict:
        return {"results": self.results_path, "step": self.step, "budget": self.budget_source,
                "passed": not self.failed, "checks": [asdict(c) for c in self.checks], "cautions": self.cautions}

    @classmethod
    def from_dict(cls, d: dict) -> "Verdict":
        return cls(d["results"], d["step"], d["budget"], [Check(**c) for c in d["checks"]], d.get("cautions", []))


def pick_step(results: dict, name: Optional[str], where: str) -> dict:
    steps = steps_of(results)
    if not steps:
        raise UserError(f"{where}: no steps recorded — nothing to gate")
    if name is None:
        return final_row(results)  # the final step is what ships
    step = step_named(results, name)
    if step is not None:
        return step
    raise UserError(f"{where}: --step {name} — steps in this run: {', '.join(s.get('name', '?') for s in steps)}")


def budget_of_results(results: dict, where: str) -> BudgetConfig:
    """The budget: section of the recipe the run used (results.json keeps the recipe)."""
    recipe = recipe_dump(results)
    if not isinstance(recipe, dict) or not recipe:
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
    lat = field(step, "latency_ms", where)
    batch, length = lat.get("batch_size"), lat.get("sequence_length")
    for key, want, have in (("batch_size", budget.batch_size, batch), ("sequence_length", budget.sequence_length, length)):
        if want is not None and want != have:
            raise UserError(f"{where}: step {step['name']} latency was measured at {key} {have} — the budget's "
                            f"{key} is {want}; benchmark at {want} (recipe bench.{key}) or change the budget")
    if length is None:   # bench.sequence_length unset: each model read its own length, recorded as tokens_read
        return f"batch {batch} × {lat.get('tokens_read', 'its max_length')} tokens"
    return f"batch {batch} × {length} tokens"


def speed_size_checks(budget: BudgetConfig, p95_ms: float, size_bytes: float, teacher_p95_ms: float,
                      teacher_size_bytes: float, p95_over_reference: Optional[float] = None, shape: str = "",
                      teacher: str = "teacher") -> list[Check]:
    """The limits a model's shapes decide, from its p95 and size and the teacher's, timed in the same run
    (shared by the gate and `shrinkwrap search`, which checks them before training anything)."""
    out, at = [], f", {shape}" if shape else ""
    if budget.latency_p95_ms is not None:
        out.append(check("latency_p95_ms", f"p95 latency{at}", budget.latency_p95_ms, p95_ms, "<=", " ms"))
    if budget.latency_p95_over_reference is not None:
        out.append(check("latency_p95_over_reference", f"p95 / reference matrix-product workload{at}",
                          budget.latency_p95_over_reference, p95_over_reference, "<=", "×"))
    if budget.size_mb is not None:
        out.append(check("size_mb", "size on disk, MB = 10^6 bytes", budget.size_mb, size_bytes / 1e6, "<=", " MB"))
    if budget.min_speedup is not None:
        out.append(check("min_speedup", f"{teacher} p95 {num(teacher_p95_ms)} ms / this p95 {num(p95_ms)} ms, "
                          f"same run{at}", budget.min_speedup, teacher_p95_ms / p95_ms, ">=", "×"))
    if budget.min_shrink is not None:
        out.append(check("min_shrink", f"{teacher} size {num(teacher_size_bytes / 1e6)} MB / this size "
                          f"{num(size_bytes / 1e6)} MB", budget.min_shrink, teacher_size_bytes / size_bytes, ">=", "×"))
    return out


def _regression_checks(step: dict, base: dict, budget: BudgetConfig, where: str, base_where: str,
                       task=None) -> list[Check]:
    """Limits against the baseline's same step; accuracy_points judges the task's quality figure (a classifier's
    accuracy, an encoder's neighbour recall at 10)."""
    out, tol = [], budget.regression
    quality, label = (task.QUALITY, task.QUALITY_LABEL) if task is not None else ("accuracy", "accuracy")
    if tol.p95_percent is not None:
        shape = _latency_shape(step, budget, where)
        base_lat, lat = field(base, "latency_ms", base_where), step["latency_ms"]
        if (base_lat.get("batch_size"), base_lat.get("sequence_length")) != (lat.get("batch_size"), lat.get("sequence_length")):
            raise UserError(f"{base_where}: step {base['name']} latency was measured at batch {base_lat.get('batch_size')} "
                            f"× {base_lat.get('sequence_length')} tokens, this run at {shape} — not comparable")
        # Absolute times drift between runs; the ratio to the reference workload of the same run does much less,
        # so it is compared whenever both runs have it.
        if "p95_over_reference" in lat and "p95_over_reference" in base_lat:
            key, what = "p95_over_reference", "p95 / reference workload"
        else:
            key, what = "p95", "p95 ms"
        now, then = number(step, f"latency_ms.{key}", where), number(base, f"latency_ms.{key}", base_where)
        rise = (now / then - 1) * 100
        out.append(check("regression.p95_percent", f"{what} {num(now)} vs baseline {num(then)}, {shape}",
                          tol.p95_percent, rise, "<=", " %"))
    if tol.accuracy_points is not None:
        now = number(step, f"metrics.{quality}", where)
        then = number(base, f"metrics.{quality}", base_where)
        out.append(check("regression.accuracy_points", f"{label} {num(now)} vs baseline {num(then)}",
                          tol.accuracy_points, (then - now) * 100, "<=", " points"))
    if tol.size_percent is not None:
        now = number(step, "size_bytes", where)
        then = number(base, "size_bytes", base_where)
        out.append(check("regression.size_percent", f"{num(now / 1e6)} MB vs baseline {num(then / 1e6)} MB",
                          tol.size_percent, (now / then - 1) * 100, "<=", " %"))
    return out


# Latency-based limits: never passed on a timing STEADY_RULE calls unstable.
TIMED_LIMITS = ("latency_p95_ms", "latency_p95_over_reference", "min_speedup")
MAX_RETIMES = 3


def retime_from_results(results: dict) -> Callable[[list[Path]], list[dict]]:
    """Times step folders together again as the run did (its bench settings, on the batches they keep)."""
    from shrinkwrap.bench.rounds import time_folders

    bench = recipe_of(results).bench
    return lambda folders: time_folders(folders, bench, bench.rounds)


def steady_latency(results: dict, step: dict, with_teacher: bool, retime) -> tuple[dict, dict, Optional[str], int]:
    """(the step's latency, the teacher's, why they cannot be trusted or None, how many times they were timed
    again). A figure marked unstable is timed again (`retime(folders) -> latencies`, the step with the teacher),
    at most MAX_RETIMES times."""
    ref = teacher_row(results)
    lat = {"step": step["latency_ms"], "teacher": ref["latency_ms"]}
    names = {"step": step["name"], "teacher": ref["name"]}
    watched = ["step"] + (["teacher"] if with_teacher and ref is not step else [])

    def unsteady() -> list[str]:
        return [k for k in watched if lat[k].get("unstable")]

    attempts, failure = 0, None
    while unsteady() and retime is not None and attempts < MAX_RETIMES and failure is None:
        attempts += 1
        try:
            timed = retime([Path(step["path"])] + ([Path(ref["path"])] if "teacher" in watched else []))
        except UserError as e:
            failure = str(e)
            break
        lat.update(zip(watched, timed))
    if ref is step:
        lat["teacher"] = lat["step"]
    bad = unsteady()
    if not bad:
        return lat["step"], lat["teacher"], None, attempts
    why = "; ".join(f"{names[k]}: {lat[k].get('unstable_why', 'unstable')}" for k in bad)
    tried = (f"timed again {attempts} time(s), still so" if attempts else "not timed again")
    return lat["step"], lat["teacher"], (f"the measurement could not be trusted — {why} ({tried}"
                                         + (f": {failure}" if failure else "") + f"; {STEADY_RULE})"), attempts


def evaluate(results: dict, budget: BudgetConfig, step_name: Optional[str] = None, baseline: Optional[dict] = None,
             where: str = "results.json", baseline_where: str = "baseline", budget_source: str = "recipe",
             retime=True, served: Optional[dict] = None, served_where: str = "--load") -> Verdict:
    """Every limit the budget sets, checked against one step (and min_capacity_rps against bench --load's
    figures, `served`). Raises UserError when results cannot answer one.
    A latency limit judged on an unstable timing is timed again first (`retime`: True, the run's own way;
    False, never; or a function of the folders), and fails, saying why, while the timing stays unstable."""
    step = pick_step(results, step_name, where)
    checks = []
    limits = budget.speed_size_limits()
    if limits:
        timed = set(limits) & set(TIMED_LIMITS)
        shape = _latency_shape(step, budget, where) if timed else ""
        ref = teacher_row(results)
        if "min_speedup" in limits:
            _latency_shape(ref, budget, where)
        if "latency_p95_over_reference" in limits:
            number(step, "latency_ms.p95_over_reference", where,
                   "these results predate the reference workload; benchmark again with this version")
        lat, ref_lat, untrusted, again = (step["latency_ms"], ref["latency_ms"], None, 0)
        if timed:
            retime = retime_from_results(results) if retime is True else (retime or None)
            lat, ref_lat, untrusted, again = steady_latency(results, step, "min_speedup" in limits, retime)
        checks += speed_size_checks(budget, float(lat["p95"]), number(step, "size_bytes", where),
                                    float(ref_lat["p95"]), number(ref, "size_bytes", where),
                                    lat.get("p95_over_reference"), shape, ref["name"])
        if untrusted:
            checks = [Check(c.name, untrusted, c.allowed, c.measured, c.comparison, c.unit, FAIL)
                      if c.name in TIMED_LIMITS else c for c in checks]
        elif again:
            note = f"; timed again {again} time(s): results.json's figure was unstable"
            checks = [Check(c.name, c.detail + note, c.allowed, c.measured, c.comparison, c.unit, c.verdict)
                      if c.name in TIMED_LIMITS else c for c in checks]
    task = of_results(results)
    foreign = [k for k in budget.quality_keys() if k not in task.BUDGET_KEYS]
    if foreign:
        raise UserError(f"{budget_source}: {', '.join(foreign)} — not a limit of {task.ARTICLE} {task.NAME} run; its "
                        f"quality limits are {', '.join(task.BUDGET_KEYS)}")
    checks += task.quality_checks(results, step, budget, where)
    tol = budget.regression
    tolerances = {k: v for k, v in tol.model_dump().items() if v is not None}
    if baseline is not None:
        if not tolerances:
            raise UserError(f"--baseline {baseline_where}: the budget sets no regression tolerance — add e.g. "
                            f"--tolerance p95_percent=10 --tolerance accuracy_points=1")
        if of_results(baseline).NAME != task.NAME:
            raise UserError(f"--baseline {baseline_where}: a {of_results(baseline).NAME} run, this one is a {task.NAME} "
                            f"run — they cannot be compared")
        checks += _regression_checks(step, pick_step(baseline, step["name"], baseline_where), budget, where,
                                     baseline_where, task)
    else:
        checks += [Check(f"regression.{k}", "no --baseline to compare with", v, None, "<=",
                         " points" if k.endswith("points") else " %", SKIP) for k, v in tolerances.items()]
    checks += load_checks(served, budget, served_where)
    if all(c.verdict == SKIP for c in checks):
        keys = [k for k in BudgetConfig.model_fields if k not in ("batch_size", "sequence_length", "accuracy_drop_upper_bound")]
        raise UserError(f"{budget_source}: the budget sets no limit to check" + (" without --baseline" if checks else "")
                        + f" — set at least one of {', '.join(keys)}")
    return Verdict(where, step["name"], budget_source, checks, cautions(results, budget))


def read_load(path: Path) -> dict:
    """The `load` figures of a `shrinkwrap bench ARTIFACT --load --out FILE.json` (or --json) file."""
    from shrinkwrap.serve.rundir import read_json

    data = read_json(path, "bench --load figures")
    load = data.get("load") if isinstance(data, dict) else None
    if not isinstance(load, dict) or "capacity_rps" not in load or not isinstance(load.get("max_p95_ms"), (int, float)):
        raise UserError(f"--load {path}: not the JSON of `shrinkwrap bench ARTIFACT --load` (no load.capacity_rps "
                        f"and load.max_p95_ms) — write it with --out FILE.json")
    if load["capacity_rps"] is not None and not isinstance(load["capacity_rps"], (int, float)):
        raise UserError(f"--load {path}: load.capacity_rps = {load['capacity_rps']!r} — expected a number or null")
    return load


def load_checks(load: Optional[dict], budget: BudgetConfig, where: str) -> list[Check]:
    """min_capacity_rps against bench --load's capacity (skipped without --load)."""
    if budget.min_capacity_rps is None:
        return []
    if load is None:
        return [Check("min_capacity_rps", "no --load FILE.json to check", budget.min_capacity_rps, None, ">=",
                      " req/s", SKIP)]
    cap = load["capacity_rps"]
    detail = (f"{where}: the highest rate bench --load held with p95 ≤ {num(load['max_p95_ms'])} ms and no errors"
              if cap is not None else f"{where}: no rate held p95 ≤ {num(load['max_p95_ms'])} ms without errors")
    return [check("min_capacity_rps", detail, budget.min_capacity_rps, float(cap or 0.0), ">=", " req/s")]


def format_table(verdict: Verdict) -> str:
    rows = [("limit", "allowed", "measured", "verdict", "what")]
    for c in verdict.checks:
        sign = "≤" if c.comparison == "<=" else "≥"
        rows.append((c.name, f"{sign} {num(c.allowed)}{c.unit}", num(c.measured) + (c.unit if c.measured is not None else ""), c.verdict,
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


def gate_results(results_path: Optional[Path], budget_path: Optional[Path] = None, step: Optional[str] = None,
                 baseline_path: Optional[Path] = None, tolerances: list[str] = (),
                 load_path: Optional[Path] = None) -> Verdict:
    """What `shrinkwrap gate` checks: all inputs are read and validated before any verdict. With `load_path` alone
    (no results), the budget file's min_capacity_rps against bench --load's figures."""
    from shrinkwrap.recipe.budget import load_budget

    if results_path is None and load_path is None:
        raise UserError("gate needs RESULTS (a run's results.json), --load FILE.json, or both")
    if tolerances and baseline_path is None:
        raise UserError(f"--tolerance {tolerances[0]} — tolerances are against a baseline; add --baseline OLD_RESULTS")
    served = read_load(load_path) if load_path is not None else None
    results = load(results_path) if results_path is not None else None
    if budget_path is not None:
        budget, source = load_budget(budget_path), str(budget_path)
    elif results is not None:
        budget, source = budget_of_results(results, str(results_path)), f"{results_path}: recipe.budget"
    else:
        raise UserError(f"--load {load_path} without RESULTS: give the budget with --budget FILE (min_capacity_rps)")
    if served is not None and budget.min_capacity_rps is None:
        raise UserError(f"{source}: no min_capacity_rps — the limit --load {load_path} is checked against")
    budget = with_tolerances(budget, list(tolerances))
    if results is None:
        return Verdict(str(load_path), "served artifact", source, load_checks(served, budget, str(load_path)))
    baseline = load(baseline_path) if baseline_path is not None else None
    return evaluate(results, budget, step, baseline, str(results_path), str(baseline_path), source, served,
                    str(load_path))
