"""A budget limit checked: its verdict (pass, FAIL, skipped), what was measured and in what words, and the
helpers every check reads a step's row with (a missing or malformed field is bad input, never a pass)."""
from __future__ import annotations

from dataclasses import dataclass
from typing import Optional

from shrinkwrap.serve.errors import UserError

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
        return (f"{self.name}: {num(self.measured)}{self.unit} is {state} the limit {num(self.allowed)}{self.unit} "
                f"({self.detail})")


def num(x: Optional[float]) -> str:
    if x is None:
        return "—"
    return f"{x:.4f}".rstrip("0").rstrip(".") if abs(x) < 1e6 else f"{x:.4g}"


def check(name: str, detail: str, allowed: float, measured: float, comparison: str, unit: str = "") -> Check:
    ok = measured <= allowed if comparison == "<=" else measured >= allowed
    return Check(name, detail, allowed, measured, comparison, unit, PASS if ok else FAIL)


def field(entry: dict, path: str, where: str, hint: str = ""):
    node = entry
    for part in path.split("."):
        if not isinstance(node, dict) or part not in node:
            raise UserError(f"{where}: step {entry.get('name', '?')} has no {path}" + (f" — {hint}" if hint else ""))
        node = node[part]
    return node


def number(entry: dict, path: str, where: str, hint: str = "") -> float:
    value = field(entry, path, where, hint)
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise UserError(f"{where}: step {entry.get('name', '?')} {path} = {value!r} — expected a number")
    return float(value)
