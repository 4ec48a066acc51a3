"""How candidates are compared: which trained candidates no other beats (the frontier), which one wins, and
how far a candidate misses a limit.

The winner is chosen on the validation split, never on the test split the gate reads: picking the best of
several test accuracies makes the winner's test accuracy optimistic (selection on the test set), and one test
text more or less would decide a speed-up of twice. Among the candidates that meet the budget, those the
validation split cannot tell apart from the most accurate one (TIE_RULE) are tied, and the fastest of them
ships."""
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


# McNemar's exact test (McNemar 1947) on the validation texts, paired: p at or above this, the two candidates'
# accuracies cannot be told apart (5 %, common practice).
TIE_P = 0.05
TIE_RULE = (f"tied with the best on validation when McNemar's exact test on the validation texts cannot tell them "
            f"apart (p ≥ {TIE_P:g}) and its validation accuracy is within the budget's accuracy_drop_points of the "
            f"best's (when the budget sets it, so that a small split cannot tie everything)")


def tied(rows: list[dict], val: dict[int, list], labels: Optional[list], drop_points: Optional[float]) -> list[int]:
    """The candidates meeting the budget that are tied with the most accurate one on validation (TIE_RULE),
    the best first. `val`: each candidate's predicted class per validation text; `labels` the true ones."""
    from shrinkwrap.bench.stats import discordant_pairs, mcnemar_exact_p

    ok = [i for i, r in enumerate(rows) if r["meets_budget"]]
    if not ok:
        return []
    if labels is None or any(i not in val for i in ok):  # results without validation predictions: test accuracy
        best = min(ok, key=lambda i: (-rows[i]["accuracy"], rows[i]["latency_ms"]["p95"]))
        return [best]
    score = {i: rows[i]["validation_accuracy"] for i in ok}
    best = min(ok, key=lambda i: (-score[i], rows[i]["latency_ms"]["p95"]))
    out = [best]
    for i in ok:
        if i == best:
            continue
        p = mcnemar_exact_p(*discordant_pairs(labels, val[best], val[i]))
        close = drop_points is None or (score[best] - score[i]) * 100 <= drop_points
        if p >= TIE_P and close:
            out.append(i)
    return out


def pick_winner(rows: list[dict], val: Optional[dict[int, list]] = None, labels: Optional[list] = None,
                drop_points: Optional[float] = None) -> Optional[int]:
    """The fastest (lowest p95) of the candidates meeting every limit that are tied with the most accurate of
    them on validation (TIE_RULE); None when none meets the budget. Without validation predictions: the most
    accurate on the test split, ties to the lower p95."""
    group = tied(rows, val or {}, labels, drop_points)
    if not group:
        return None
    return min(group, key=lambda i: (rows[i]["latency_ms"]["p95"], -rows[i]["accuracy"]))
