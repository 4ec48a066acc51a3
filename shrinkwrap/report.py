"""results.json -> report.md and a self-contained report.html (tables, plots, cautions where an average can mislead)."""
from __future__ import annotations

import base64
import html
import io
import re
from pathlib import Path

from shrinkwrap.errors import UserError
from shrinkwrap.results import load, teacher_row
from shrinkwrap.rundir import REPORT_FILE, REPORT_HTML_FILE, check_out_dir, write_text_atomic

# A class whose recall fell this many points more than the average did is called out (common practice
# in model reviews: look at the worst class, not only the mean).
CLASS_DROP_POINTS = 5.0
NO_CAUTION = "No class lost much more recall than the average accuracy did."


def _mb(n: int) -> str:
    return f"{n / 1e6:.1f}"


def _drop_cell(s: dict) -> str:
    ci = s.get("accuracy_drop_ci95")
    return f"{s['accuracy_drop']:+.2f}" + (f" [{ci[0]:+.2f}, {ci[1]:+.2f}]" if ci else "")


def step_rows(results: dict) -> tuple[list[str], list[list[str]], str]:
    """Header, one row of cells per step, and the caption: the same table for report.md and report.html."""
    steps = results["steps"]
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


def _md_table(header: list[str], rows: list[list[str]], left: int) -> str:
    """`left` leading columns are text (left-aligned), the rest numbers."""
    align = "|" + "---|" * left + "---:|" * (len(header) - left)
    return "\n".join(["| " + " | ".join(header) + " |", align, *("| " + " | ".join(r) + " |" for r in rows)])


def step_table(results: dict) -> str:
    header, rows, caption = step_rows(results)
    return "\n".join([_md_table(header, rows, 2), "", caption])


def class_cautions(results: dict) -> list[str]:
    """Lines naming each step's class whose recall fell much more than the accuracy did."""
    names = results["data"]["label_names"]
    ref = teacher_row(results)
    ref_recall = ref["metrics"]["per_class"]["recall"]
    out = []
    for s in results["steps"][1:]:
        recall = s["metrics"]["per_class"]["recall"]
        drops = [(ref_recall[i] - recall[i]) * 100 for i in range(len(names))]
        worst = max(range(len(names)), key=lambda i: drops[i])
        if drops[worst] >= max(CLASS_DROP_POINTS, s["accuracy_drop"] + CLASS_DROP_POINTS):
            out.append(f"- **{s['name']}**: recall of class `{names[worst]}` fell {drops[worst]:.1f} points "
                       f"({ref_recall[worst]:.3f} → {recall[worst]:.3f}) while accuracy fell {s['accuracy_drop']:.2f}: "
                       f"the average hides it.")
    return out


def per_class_rows(results: dict) -> tuple[list[str], list[list[str]]]:
    names = results["data"]["label_names"]
    steps = results["steps"]
    support = steps[0]["metrics"]["per_class"]["support"]
    rows = [[n, str(support[i]), *(f"{s['metrics']['per_class']['recall'][i]:.3f}" for s in steps)]
            for i, n in enumerate(names)]
    return ["class", "support", *(s["name"] for s in steps)], rows


def per_class_table(results: dict) -> str:
    return _md_table(*per_class_rows(results), 1)


def setup_lines(results: dict) -> list[str]:
    machine = results["machine"]
    sizes = results["data"]["sizes"]
    return [
        f"data: {results['data']['path']} — train {sizes['train']}, validation {sizes['validation']}, "
        f"test {sizes['test']}; {len(results['data']['label_names'])} classes",
        f"machine: {machine['cpu']}, {machine['cores_available']} cores available",
        "versions: " + ", ".join(f"{k} {val}" for k, val in machine["versions"].items()),
        "step wall time (s): " + ", ".join(f"{s['name']} {s['seconds']:.0f}" for s in results["steps"]),
    ]


def int8_agreement_lines(results: dict) -> list[str]:
    """One line per int8 ONNX step: how often it predicts what the fp32 graph it came from predicts."""
    return [f"- `{s['name']}` predicts the same label as the fp32 ONNX graph it was quantised from on "
            f"{s['agreement_with_fp32'] * 100:.1f} % of the test texts."
            for s in results["steps"] if "agreement_with_fp32" in s]


def markdown_report(results: dict) -> str:
    agreement = int8_agreement_lines(results)
    lines = [
        f"# shrinkwrap report — {results['recipe']['name']}",
        "",
        step_table(results),
        "",
        *(agreement + [""] if agreement else []),
        "## Per-class recall (test split)",
        "",
        per_class_table(results),
        "",
    ]
    cautions = class_cautions(results)
    lines += ["## Cautions", ""] + (cautions or [f"- {NO_CAUTION}"]) + [""]
    if results["data"]["notes"]:
        lines += ["## Data notes", ""] + [f"- {n}" for n in results["data"]["notes"]] + [""]
    lines += ["## Setup", "", *(f"- {line}" for line in setup_lines(results)), ""]
    return "\n".join(lines)


# ---- report.html: the same tables plus plots, in one file with nothing outside it -----------------------------


def _png(fig) -> str:
    """A figure as a base64 PNG data URI (Agg canvas: no display, no global pyplot state)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100, bbox_inches="tight")
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def plots(results: dict) -> list[tuple[str, str]]:
    """(caption, PNG data URI) of each plot."""
    from matplotlib.figure import Figure

    steps = results["steps"]
    names = [s["name"] for s in steps]
    lat = steps[0]["latency_ms"]
    out = []

    fig = Figure(figsize=(7.5, 4.2))
    ax = fig.add_subplot()
    x = [s["latency_ms"]["p95"] for s in steps]
    y = [s["metrics"]["accuracy"] for s in steps]
    # A legend rather than labels beside the points: steps of similar speed would print over each other.
    for i, (xi, yi, n) in enumerate(zip(x, y, names)):
        ax.plot([xi], [yi], "osD^vP*X"[i % 8], markersize=8, label=n, alpha=0.85)
    ax.set_xscale("log")  # steps differ by factors, not by milliseconds
    ax.set_xlabel(f"p95 latency, ms, log scale (batch {lat['batch_size']} × {lat['sequence_length']} tokens, "
                  f"{lat['threads']} threads)")
    ax.set_ylabel("accuracy (test split)")
    ax.set_ylim(max(0.0, min(y) - 0.05), min(1.005, max(y) + 0.03))
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=8, loc="lower right")
    out.append(("Accuracy against p95 latency, one point per step: up and to the left is better.", _png(fig)))

    fig = Figure(figsize=(7.5, 0.6 + 0.45 * len(steps)))
    ax = fig.add_subplot()
    mb = [s["size_bytes"] / 1e6 for s in steps]
    ax.barh(names, mb, color="tab:green")
    ax.invert_yaxis()  # chain order from the top
    for i, v in enumerate(mb):
        ax.text(v, i, f" {v:.1f}", va="center", fontsize=9)
    ax.set_xlabel("size on disk, MB (10^6 bytes)")
    ax.set_xlim(0, max(mb) * 1.15)
    out.append(("Size of each step's output.", _png(fig)))

    if len(steps) > 1:
        import numpy as np

        labels = results["data"]["label_names"]
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
        out.append((f"Per-class recall drop against {steps[0]['name']} (above 0 = the class lost recall).", _png(fig)))
    return out


def _inline(md: str) -> str:
    """The two bits of Markdown our lines use (**bold**, `code`), as HTML, after escaping."""
    text = html.escape(md)
    text = re.sub(r"\*\*(.+?)\*\*", r"<strong>\1</strong>", text)
    return re.sub(r"`(.+?)`", r"<code>\1</code>", text)


def _html_table(header: list[str], rows: list[list[str]], left: int) -> str:
    def cells(tag: str, row: list[str]) -> str:
        return "".join(f'<{tag}{"" if i < left else " class=num"}>{html.escape(c)}</{tag}>' for i, c in enumerate(row))

    body = "".join(f"<tr>{cells('td', r)}</tr>" for r in rows)
    return f"<div class=wide><table><thead><tr>{cells('th', header)}</tr></thead><tbody>{body}</tbody></table></div>"


_STYLE = """
body { font: 15px/1.45 system-ui, sans-serif; margin: 2rem auto; max-width: 1100px; padding: 0 1rem; color: #222; }
table { border-collapse: collapse; margin: .5rem 0; font-size: 13px; }
.wide { overflow-x: auto; }
th, td { border-bottom: 1px solid #ddd; padding: .3rem .5rem; text-align: left; white-space: nowrap; }
th { background: #f4f4f4; white-space: normal; vertical-align: bottom; } td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; }
.caption, figcaption { color: #555; font-size: 13px; max-width: 60rem; }
figure { margin: 1rem 0 2rem; } img { max-width: 100%; height: auto; }
code { background: #f4f4f4; padding: 0 .2rem; }
"""

# Marks the page once every image has decoded, so a headless browser (and a test) can tell.
_CHECK_IMAGES = """
window.addEventListener("load", function () {
  var imgs = Array.prototype.slice.call(document.images);
  var ok = imgs.filter(function (i) { return i.complete && i.naturalWidth > 0; }).length;
  document.body.setAttribute("data-images-decoded", ok + "/" + imgs.length);
});
"""


def html_report(results: dict) -> str:
    title = f"shrinkwrap report — {results['recipe']['name']}"
    header, rows, caption = step_rows(results)
    figures = "".join(f'<figure><img src="{uri}" alt="{html.escape(cap)}"><figcaption>{html.escape(cap)}</figcaption>'
                      f"</figure>" for cap, uri in plots(results))
    cautions = [c.removeprefix("- ") for c in class_cautions(results)] or [NO_CAUTION]
    parts = [
        f"<h1>{html.escape(title)}</h1>",
        "<h2>Steps</h2>", _html_table(header, rows, 2), f"<p class=caption>{_inline(caption)}</p>",
        "<h2>Plots</h2>", figures,
        "<h2>Per-class recall (test split)</h2>", _html_table(*per_class_rows(results), 1),
        "<h2>Cautions</h2>", "<ul>" + "".join(f"<li>{_inline(c)}</li>" for c in cautions) + "</ul>",
    ]
    if results["data"]["notes"]:
        parts += ["<h2>Data notes</h2>", "<ul>" + "".join(f"<li>{_inline(n)}</li>" for n in results["data"]["notes"]) + "</ul>"]
    parts += ["<h2>Setup</h2>", "<ul>" + "".join(f"<li>{html.escape(l)}</li>" for l in setup_lines(results)) + "</ul>"]
    return (f'<!doctype html>\n<html lang="en"><head><meta charset="utf-8"><title>{html.escape(title)}</title>'
            f"<style>{_STYLE}</style></head>\n<body data-images-decoded=\"pending\">\n" + "\n".join(parts)
            + f"\n<script>{_CHECK_IMAGES}</script>\n</body></html>\n")


def _write(out: Path, md: str, page: str) -> tuple[Path, Path]:
    write_text_atomic(out / REPORT_FILE, md)
    write_text_atomic(out / REPORT_HTML_FILE, page)
    return out / REPORT_FILE, out / REPORT_HTML_FILE


def write_reports(results: dict, out: Path) -> tuple[Path, Path]:
    """report.md and report.html into `out`; both are rendered before either is written."""
    return _write(out, markdown_report(results), html_report(results))


def report_from_file(results_path: Path, out: Path | None = None) -> tuple[Path, Path]:
    """`shrinkwrap report`: both reports again from a results.json, beside it unless `out` is given."""
    results_path = Path(results_path)
    results = load(results_path)
    out = Path(out) if out is not None else results_path.parent
    check_out_dir(out)
    try:
        md, page = markdown_report(results), html_report(results)
    except (KeyError, IndexError, TypeError, ValueError, ZeroDivisionError) as e:
        raise UserError(f"{results_path}: a field the report needs is missing or malformed "
                        f"({type(e).__name__}: {e})") from None
    out.mkdir(parents=True, exist_ok=True)
    return _write(out, md, page)
