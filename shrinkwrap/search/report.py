"""DIR/report.html of `shrinkwrap search`: the frontier plot (accuracy, or an encoder's neighbour recall, against
p95, the budget's lines drawn, the winner marked) and the candidates table, in one file with nothing outside it."""
from __future__ import annotations

import html
import json
from pathlib import Path

from shrinkwrap.outputs.html import page, table
from shrinkwrap.outputs.plots import png_data_uri
from shrinkwrap.search.ranking import ACCURACY, TIE_RULE, Measure
from shrinkwrap.serve.rundir import REPORT_HTML_FILE, write_text_atomic


def _fmt(x, spec: str = ".4f") -> str:
    return "—" if x is None else format(x, spec)


def frontier_plot(summary: dict, budget, teacher: dict, m: Measure = ACCURACY) -> str:
    """Accuracy against p95 of the trained candidates; the frontier joined, the winner ringed; the
    latency limits as vertical lines (min_speedup at teacher p95 / min_speedup), the accuracy limits
    as horizontal ones (accuracy_drop_points below the teacher's accuracy, min_accuracy, min_neighbour_recall).
    `m`: the figure candidates are ranked by."""
    from matplotlib.figure import Figure

    rows, frontier, winner = summary["candidates"], summary["frontier"], summary["winner"]
    fig = Figure(figsize=(7.5, 4.8))
    ax = fig.add_subplot()
    trained = [i for i, r in enumerate(rows) if r[m.score] is not None]
    untrained = [i for i, r in enumerate(rows) if r[m.score] is None and r["latency_ms"]]
    ax.scatter([rows[i]["latency_ms"]["p95"] for i in trained], [rows[i][m.score] for i in trained],
               color="#1f77b4", label="trained candidate", zorder=3)
    for i in trained:
        ax.annotate(str(i), (rows[i]["latency_ms"]["p95"], rows[i][m.score]), textcoords="offset points",
                    xytext=(4, 4), fontsize=8)
    front = sorted(frontier, key=lambda i: rows[i]["latency_ms"]["p95"])
    if front:
        ax.plot([rows[i]["latency_ms"]["p95"] for i in front], [rows[i][m.score] for i in front],
                color="#1f77b4", alpha=.5, label="frontier")
    if untrained:
        low = min([rows[i][m.score] for i in trained] or [0.0])
        ax.scatter([rows[i]["latency_ms"]["p95"] for i in untrained], [low] * len(untrained), marker="|",
                   color="#999", s=200, label="not trained (untrained p95)")
    if winner is not None:
        w = rows[winner]
        ax.scatter([w["latency_ms"]["p95"]], [w[m.score]], s=220, facecolors="none", edgecolors="#d62728",
                   linewidths=2, label=f"winner (candidate {winner})", zorder=4)
    if budget.latency_p95_ms is not None:
        ax.axvline(budget.latency_p95_ms, color="#d62728", ls="--", label=f"latency_p95_ms {budget.latency_p95_ms:g}")
    if budget.min_speedup is not None and teacher:
        ax.axvline(teacher["p95"] / budget.min_speedup, color="#ff7f0e", ls="--",
                   label=f"min_speedup {budget.min_speedup:g}× (teacher p95 {teacher['p95']:.1f} ms)")
    teacher_acc = summary.get("teacher_accuracy")
    if budget.accuracy_drop_points is not None and teacher_acc is not None:
        ax.axhline(teacher_acc - budget.accuracy_drop_points / 100, color="#2ca02c", ls="--",
                   label=f"accuracy_drop_points {budget.accuracy_drop_points:g}")
    if getattr(budget, "min_neighbour_recall", None) is not None and m.score == "neighbour_recall_at_10":
        ax.axhline(budget.min_neighbour_recall, color="#9467bd", ls="--",
                   label=f"min_neighbour_recall {budget.min_neighbour_recall:g}")
    if budget.min_accuracy is not None:
        ax.axhline(budget.min_accuracy, color="#9467bd", ls="--", label=f"min_accuracy {budget.min_accuracy:g}")
    ax.set_xscale("log")  # candidates and the teacher lie orders of magnitude apart
    ax.set_xlabel("p95 latency, ms, log scale (int8 ONNX, interleaved rounds)")
    ax.set_ylabel(f"{m.label} (test split)")
    ax.grid(alpha=.3)
    ax.legend(fontsize=8, loc="lower right")
    return png_data_uri(fig)


def write_search_report(summary: dict, budget, teacher: dict, out: Path, candidates, teacher_accuracy=None,
                        m: Measure = ACCURACY) -> Path:
    head = ["#", "settings", "trained", "meets budget", f"validation {m.label}", "tied with the winner",
            f"{m.label} (test)", "drop (points)", "p50 ms", "p95 ms", "× teacher", "MB", "frontier", "reason"]
    body = []
    for i, r in enumerate(summary["candidates"]):
        lat = r["latency_ms"] or {}
        body.append([str(i) + (" ★" if i == summary["winner"] else ""),
                     ", ".join(f"{k}={json.dumps(v)}" for k, v in r["settings"].items()),
                     "yes" if r["trained"] else "no", "yes" if r["meets_budget"] else "no",
                     _fmt(r.get(m.validation)), "yes" if r.get("tied_with_winner") else "", _fmt(r[m.score]),
                     _fmt(r[m.drop], ".2f"), _fmt(lat.get("p50"), ".2f"), _fmt(lat.get("p95"), ".2f"),
                     _fmt(r["speedup"], ".2f"), _fmt(r["size_bytes"] and r["size_bytes"] / 1e6, ".2f"),
                     "yes" if i in summary["frontier"] else "", r["reason"] or ""])
    plot = frontier_plot({**summary, "teacher_accuracy": teacher_accuracy}, budget, teacher, m)
    limits = {k: v for k, v in budget.model_dump().items() if v not in (None, False) and k != "regression"}
    winner = summary["winner"]
    verdict = (f"Winner: candidate {winner}, the fastest of the candidates meeting the budget that are tied with "
               f"the best of them by validation {m.label} ({TIE_RULE}); "
               f"its artifact is in artifact/." if winner is not None else "No candidate meets every limit.")
    parts = ["<h1>shrinkwrap search</h1>", f"<p>{html.escape(verdict)} Budget: "
             f"{html.escape(', '.join(f'{k} = {v}' for k, v in limits.items()) or 'none')}. Teacher p95 "
             f"{_fmt(teacher.get('p95') if teacher else None, '.2f')} ms in the same rounds.</p>",
             f'<figure><img src="{plot}" alt="frontier"><figcaption>{m.label[0].upper()}{m.label[1:]} against p95 latency of the '
             f"trained candidates; the line joins the frontier (no other candidate is at least as accurate, fast and small "
             f"and better in one); dashed lines are the budget's limits.</figcaption></figure>",
             "<h2>Candidates</h2>", table(head, body, 2)]
    write_text_atomic(out / REPORT_HTML_FILE, page("shrinkwrap search", parts))
    return out / REPORT_HTML_FILE
