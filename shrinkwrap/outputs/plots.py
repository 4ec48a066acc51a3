"""The report's plots, as PNG data URIs for report.html: quality (a classifier's accuracy, an encoder's neighbour
recall) against latency, size, per-class recall drop, reliability diagrams and accuracy against coverage, an
encoder's cosine to the teacher per step. matplotlib is imported only here, and only when called (the
plain serving install has none; report.py then writes the tables alone)."""
from __future__ import annotations

import base64
import io


def png_data_uri(fig) -> str:
    """A figure as a base64 PNG data URI (Agg canvas: no display, no global pyplot state)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100, bbox_inches="tight")
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def plots(results: dict) -> list[tuple[str, str]]:
    """(caption, PNG data URI) of each plot."""
    from matplotlib.figure import Figure

    from shrinkwrap.outputs.results import label_names, steps_of
    from shrinkwrap.outputs.tasks import of_results

    task = of_results(results)
    steps = steps_of(results)
    names = [s["name"] for s in steps]
    lat = steps[0]["latency_ms"]
    out = []

    fig = Figure(figsize=(7.5, 4.2))
    ax = fig.add_subplot()
    x = [s["latency_ms"]["p95"] for s in steps]
    y = [s["metrics"][task.QUALITY] for s in steps]
    # A legend rather than labels beside the points: steps of similar speed would print over each other.
    for i, (xi, yi, n) in enumerate(zip(x, y, names)):
        ax.plot([xi], [yi], "osD^vP*X"[i % 8], markersize=8, label=n, alpha=0.85)
    ax.set_xscale("log")  # steps differ by factors, not by milliseconds
    ax.set_xlabel(f"p95 latency, ms, log scale (batch {lat['batch_size']} × {lat['sequence_length']} tokens, "
                  f"{lat['threads']} threads)")
    ax.set_ylabel(f"{task.QUALITY_LABEL} (test split)")
    ax.set_ylim(max(0.0, min(y) - 0.05), min(1.005, max(y) + 0.03))
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=8, loc="lower right")
    out.append((f"{task.QUALITY_LABEL[0].upper()}{task.QUALITY_LABEL[1:]} against p95 latency, one point per step: "
                f"up and to the left is better.", png_data_uri(fig)))

    fig = Figure(figsize=(7.5, 0.6 + 0.45 * len(steps)))
    ax = fig.add_subplot()
    mb = [s["size_bytes"] / 1e6 for s in steps]
    ax.barh(names, mb, color="tab:green")
    ax.invert_yaxis()  # chain order from the top
    for i, v in enumerate(mb):
        ax.text(v, i, f" {v:.1f}", va="center", fontsize=9)
    ax.set_xlabel("size on disk, MB (10^6 bytes)")
    ax.set_xlim(0, max(mb) * 1.15)
    out.append(("Size of each step's output.", png_data_uri(fig)))

    if len(steps) > 1 and "per_class" in steps[0]["metrics"]:
        import numpy as np

        labels = label_names(results)
        ref = np.asarray(steps[0]["metrics"]["per_class"]["recall"])
        fig = Figure(figsize=(max(7.5, 0.9 * len(labels) * (len(steps) - 1) / 2), 4.2))
        ax = fig.add_subplot()
        width = 0.8 / (len(steps) - 1)
        for j, s in enumerate(steps[1:]):
            drop = (ref - np.asarray(s["metrics"]["per_class"]["recall"])) * 100
            ax.bar(np.arange(len(labels)) + (j - (len(steps) - 2) / 2) * width, drop, width, label=s["name"])
        ax.axhline(0, color="black", linewidth=0.8)
        if all(np.allclose(ref, s["metrics"]["per_class"]["recall"]) for s in steps[1:]):
            ax.text(0.5, 0.75, "every class kept its recall in every step", transform=ax.transAxes, ha="center",
                    color="#555")
        ax.set_xticks(range(len(labels)), labels, rotation=30 if len(labels) > 6 else 0, ha="right" if len(labels) > 6 else "center")
        ax.set_ylabel(f"recall drop vs {steps[0]['name']}, points")
        ax.legend(fontsize=8)
        ax.grid(axis="y", alpha=0.3)
        out.append((f"Per-class recall drop against {steps[0]['name']} (above 0 = the class lost recall).", png_data_uri(fig)))
    out += calibration_plots(results) + cosine_plots(results)
    return out


def cosine_plots(results: dict) -> list[tuple[str, str]]:
    """An encoder's cosine to the teacher over the test texts, per step: its percentiles (0, 5, 10, ..., 100)."""
    from matplotlib.figure import Figure

    from shrinkwrap.outputs.results import rows_after_teacher

    rows = [s for s in rows_after_teacher(results) if s["metrics"].get("cosine_deciles")]
    if not rows:
        return []
    fig = Figure(figsize=(7.5, 4.2))
    ax = fig.add_subplot()
    for i, s in enumerate(rows):
        m = s["metrics"]
        x = [0, 5, *range(10, 101, 10)]
        y = [m["cosine_deciles"][0], m["cosine_to_teacher_p5"], *m["cosine_deciles"][1:]]
        ax.plot(x, y, "-" + "osD^vP*X"[i % 8], markersize=5, label=s["name"])
    ax.set_xlabel("percentile of the test texts")
    ax.set_ylabel("cosine to the teacher's vector")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, loc="lower right")
    return [("Cosine of each step's vector to the teacher's vector of the same test text, by percentile: the left "
             "end is the tail the mean hides.", png_data_uri(fig))]


def calibration_plots(results: dict) -> list[tuple[str, str]]:
    """A reliability diagram per step (its metrics' `reliability` bins) and, for the shipped step, accuracy
    against coverage when abstaining below each calibrated top score (its `calibration` block)."""
    from matplotlib.figure import Figure

    from shrinkwrap.outputs.results import final_row, steps_of

    out = []
    final = final_row(results)
    for s in steps_of(results):
        bins = s["metrics"].get("reliability")
        cal = s.get("calibration") if s is final else None
        if cal and cal.get("reliability"):  # the shipped step's scores as predict gives them: calibrated
            bins = cal["reliability"]
        if not bins:
            continue
        fig = Figure(figsize=(5.5, 4.2))
        ax = fig.add_subplot()
        ax.plot([0, 1], [0, 1], "--", color="#888", linewidth=1, label="perfect calibration")
        ax.bar([b["lo"] for b in bins], [b["accuracy"] for b in bins], [b["hi"] - b["lo"] for b in bins],
               align="edge", alpha=0.6, edgecolor="black", label="accuracy in the bin")
        ax.plot([b["confidence"] for b in bins], [b["accuracy"] for b in bins], "o", color="tab:red",
                markersize=4, label="mean confidence")
        for b in bins:
            ax.text((b["lo"] + b["hi"]) / 2, min(b["accuracy"] + 0.02, 1.0), str(b["count"]), ha="center", fontsize=7)
        ax.set_xlim(0, 1)
        ax.set_ylim(0, 1.08)
        ax.set_xlabel("top-label confidence (softmax score)")
        ax.set_ylabel("accuracy (test split)")
        ax.legend(fontsize=8, loc="upper left")
        ece = cal["ece"] if cal else s["metrics"].get("ece")
        scores = (f"its calibrated scores, softmax(logits / {cal['temperature']:.3f}), as predict gives them"
                  if cal else "its scores")
        out.append((f"Reliability diagram of {s['name']}: test texts binned by the top one of {scores} (count above "
                    f"each bar)" + (f"; ECE {ece:.4f}" if ece is not None else "") + ". Bars below the diagonal: "
                    f"over-confident.", png_data_uri(fig)))
    cal = final.get("calibration")
    if cal and cal.get("coverage"):
        pts = [c for c in cal["coverage"] if c["accuracy"] is not None]
        fig = Figure(figsize=(5.5, 4.2))
        ax = fig.add_subplot()
        ax.plot([c["coverage"] for c in pts], [c["accuracy"] for c in pts], "o-", color="tab:blue")
        for c in pts:
            ax.annotate(f"{c['threshold']:.2f}", (c["coverage"], c["accuracy"]), fontsize=7,
                        textcoords="offset points", xytext=(3, 3))
        ax.set_xlim(0, 1.05)
        ax.set_xlabel("coverage (share of test texts answered)")
        ax.set_ylabel("accuracy on the answered texts")
        ax.grid(alpha=0.3)
        out.append((f"Accuracy against coverage of {final['name']} when abstaining below each calibrated top score "
                    f"(threshold beside each point; temperature {cal['temperature']:.3f}).", png_data_uri(fig)))
    return out
