"""How candidates are compared: which trained candidates no other beats (the frontier), which one wins, and
how far a candidate misses a limit.

The winner is chosen on the validation split, never on the test split the gate reads: picking the best of
several test accuracies makes the winner's test accuracy optimistic (selection on the test set), and one test
text more or less would decide a speed-up of twice. Among the candidates that meet the budget, those the
validation split cannot tell apart from the most accurate one (TIE_RULE) are tied, and the fastest of them
ships."""
from __future__ import annotations

from dataclasses import dataclass
from typing import Optional

from shrinkwrap.outputs.checks import Check


@dataclass(frozen=True)
class Measure:
    """What candidates of a task are ranked by: the search.json row keys of the test figure, its drop against the
    teacher (points) and the validation figure, and the figure's name in words."""
    score: str
    drop: str
    validation: str
    label: str


MEASURES = {
    "classification": Measure("accuracy", "accuracy_drop", "validation_accuracy", "accuracy"),
    # an encoder: the share of each text's 10 nearest neighbours (teacher's vectors) it finds again
    "embedding": Measure("neighbour_recall_at_10", "neighbour_recall_drop", "validation_neighbour_recall_at_10",
                         "neighbour recall at 10"),
}
ACCURACY = MEASURES["classification"]


def miss(c: Check) -> str:
    """A failed limit in words: measured, the limit, and by how much."""
    short = (c.measured - c.allowed) if c.comparison == "<=" else (c.allowed - c.measured)
    return (f"{c.name}: {c.measured:.4g}{c.unit} is {'above' if c.comparison == '<=' else 'below'} the limit "
            f"{c.allowed:.4g}{c.unit} by {short:.4g}{c.unit}")


def relative_miss(c: Check) -> float:
    """How far a limit is missed, as a share of the limit (0 when met)."""
    short = (c.measured - c.allowed) if c.comparison == "<=" else (c.allowed - c.measured)
    return max(0.0, short) / c.allowed if c.allowed else max(0.0, short)


def pareto_frontier(rows: list[dict], m: Measure = ACCURACY) -> list[int]:
    """Indices of the trained candidates no other trained candidate dominates: at least as accurate (the task's
    figure `m`), as fast (p95) and as small, and strictly better in one of the three (Pareto dominance)."""
    points = [(i, r[m.score], r["latency_ms"]["p95"], r["size_bytes"]) for i, r in enumerate(rows)
              if r[m.score] is not None and r["latency_ms"] is not None]

    def beats(a, b) -> bool:
        return a[1] >= b[1] and a[2] <= b[2] and a[3] <= b[3] and (a[1] > b[1] or a[2] < b[2] or a[3] < b[3])

    return [p[0] for p in points if not any(beats(q, p) for q in points if q is not p)]


# McNemar's exact test (McNemar 1947) on the validation texts, paired: p at or above this, the two candidates'
# accuracies cannot be told apart (5 %, common practice). For an encoder the same exact sign test on the texts
# whose neighbour recall differs between the two (McNemar's test is the sign test on the discordant texts).
TIE_P = 0.05
TIE_RULE = (f"tied with the best on validation when McNemar's exact test on the validation texts cannot tell them "
            f"apart (p ≥ {TIE_P:g}; for an encoder, the same exact sign test on the texts whose neighbour recall "
            f"differs) and its validation accuracy is within the budget's accuracy_drop_points of the best's (when "
            f"the budget sets it, so that a small split cannot tie everything)")


def discordant(best: list[float], other: list[float]) -> tuple[int, int]:
    """(texts the best does better on, texts the other does better on), text by text: with 1/0 per text for right
    and wrong, McNemar's discordant pairs (Dietterich 1998)."""
    return (sum(a > b for a, b in zip(best, other)), sum(b > a for a, b in zip(best, other)))


def per_text_scores(val: dict[int, list], labels: Optional[list]) -> Optional[dict[int, list[float]]]:
    """What each candidate got on each validation text: 1/0 for its predicted class right or wrong (`labels`
    given: a classifier), else the per-text figures as they are (an encoder's neighbour recall)."""
    if labels is None:
        return {i: [float(x) for x in v] for i, v in val.items()}
    return {i: [float(p == y) for p, y in zip(v, labels)] for i, v in val.items()}


def tied(rows: list[dict], val: dict[int, list], labels: Optional[list], drop_points: Optional[float],
         m: Measure = ACCURACY) -> list[int]:
    """The candidates meeting the budget that are tied with the best one on validation (TIE_RULE), the best first.
    `val`: each candidate's per-text validation answers (a classifier's predicted class, with the true `labels`;
    an encoder's neighbour recall, labels None)."""
    from shrinkwrap.bench.stats import mcnemar_exact_p

    ok = [i for i, r in enumerate(rows) if r["meets_budget"]]
    if not ok:
        return []
    if (labels is None and m is ACCURACY) or any(i not in val for i in ok):
        # results without validation predictions: the test figure
        best = min(ok, key=lambda i: (-rows[i][m.score], rows[i]["latency_ms"]["p95"]))
        return [best]
    score = {i: rows[i][m.validation] for i in ok}
    texts = per_text_scores({i: val[i] for i in ok}, labels)
    best = min(ok, key=lambda i: (-score[i], rows[i]["latency_ms"]["p95"]))
    out = [best]
    for i in ok:
        if i == best:
            continue
        p = mcnemar_exact_p(*discordant(texts[best], texts[i]))
        close = drop_points is None or (score[best] - score[i]) * 100 <= drop_points
        if p >= TIE_P and close:
            out.append(i)
    return out


def pick_winner(rows: list[dict], val: Optional[dict[int, list]] = None, labels: Optional[list] = None,
                drop_points: Optional[float] = None, m: Measure = ACCURACY) -> Optional[int]:
    """The fastest (lowest p95) of the candidates meeting every limit that are tied with the best of them on
    validation (TIE_RULE); None when none meets the budget. Without validation predictions: the best on the test
    split, ties to the lower p95."""
    group = tied(rows, val or {}, labels, drop_points, m)
    if not group:
        return None
    return min(group, key=lambda i: (rows[i]["latency_ms"]["p95"], -rows[i][m.score]))
