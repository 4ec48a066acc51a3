"""How candidates are compared: which trained candidates no other beats (the frontier), which one wins, and
how far a candidate misses a limit."""
from __future__ import annotations

from typing import Optional

from shrinkwrap.outputs.checks import Check


def miss(c: Check) -> str:
    """A failed limit in words: measured, the limit, and by how much."""
    short = (c.measured - c.allowed) if c.comparison == "<=" else (c.allowed - c.measured)
    return (f"{c.name}: {c.measured:.4g}{c.unit} is {'above' if c.comparison == '<=' else 'below'} the limit "
            f"{c.allowed:.4g}{c.unit} by {short:.4g}{c.unit}")


def relative_miss(c: Check) -> float:
    """How far a limit is missed, as a share of the limit (0 when met)."""
    short = (c.measured - c.allowed) if c.comparison == "<=" else (c.allowed - c.measured)
    return max(0.0, short) / c.allowed if c.allowed else max(0.0, short)


def pareto_frontier(rows: list[dict]) -> list[int]:
    """Indices of the trained candidates no other trained candidate dominates: at least as accurate,
    as fast (p95) and as small, and strictly better in one of the three (Pareto dominance)."""
    points = [(i, r["accuracy"], r["latency_ms"]["p95"], r["size_bytes"]) for i, r in enumerate(rows)
              if r["accuracy"] is not None and r["latency_ms"] is not None]

    def beats(a, b) -> bool:
        return a[1] >= b[1] and a[2] <= b[2] and a[3] <= b[3] and (a[1] > b[1] or a[2] < b[2] or a[3] < b[3])

    return [p[0] for p in points if not any(beats(q, p) for q in points if q is not p)]


def pick_winner(rows: list[dict]) -> Optional[int]:
    """The most accurate candidate meeting every limit; ties go to the lower p95."""
    ok = [i for i, r in enumerate(rows) if r["meets_budget"]]
    return min(ok, key=lambda i: (-rows[i]["accuracy"], rows[i]["latency_ms"]["p95"])) if ok else None
