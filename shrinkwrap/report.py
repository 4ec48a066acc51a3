"""results.json -> report.md and a self-contained report.html (tables, plots, cautions where an average can mislead)."""
from __future__ import annotations

import html
import re
from pathlib import Path

from shrinkwrap.errors import UserError
from shrinkwrap.results import load, teacher_row
from shrinkwrap.rundir import REPORT_FILE, REPORT_HTML_FILE, check_out_dir, write_text_atomic

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
# Share of test tokens a trimmed vocabulary no longer holds above which the trimming is called out.
OOV_CAUTION = 0.005


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


def class_changes(results: dict, step: dict) -> list[dict]:
    """Per class, the step's precision and recall and their change vs the teacher, with counts of texts."""
    names = results["data"]["label_names"]
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


def _lost_too_many(lost: int, support: int, average_drop_points: float) -> tuple[bool, float]:
    from shrinkwrap.bench.exact import binomial_upper_tail

    if lost < CLASS_MIN_LOST or support == 0:
        return False, 1.0
    rate = max(CLASS_FLOOR_RATE, average_drop_points / 100)
    p = binomial_upper_tail(lost, support, min(rate, 1.0))
    return p < CLASS_P, p


def class_caution_list(results: dict) -> list[str]:
    """One plain line per step and class that lost much more than the average (CLASS_RULE)."""
    out = []
    for s in results["steps"][1:]:
        for c in class_changes(results, s):
            flagged, p = _lost_too_many(c["lost"], c["support"], s["accuracy_drop"])
            if flagged:
                out.append(f"{s['name']}: class '{c['class']}' lost {c['lost']} of {c['support']} texts "
                           f"(recall {c['recall_change_points']:+.1f} points) while accuracy fell "
                           f"{s['accuracy_drop']:.2f} points — more than the average explains (binomial p = {p:.2g})")
    return out


def class_cautions(results: dict) -> list[str]:
    """report.md / card bullets of class_caution_list."""
    return [f"- {line}." for line in class_caution_list(results)]


def cautions(results: dict, budget=None) -> list[str]:
    """Every caution, one line each, for the console (stderr) and results.json `cautions`: what the
    table's averages can hide. `budget`: a BudgetConfig (else the recipe's)."""
    from shrinkwrap.results import final_step

    out = class_caution_list(results)
    if budget is None:
        raw = (results.get("recipe") or {}).get("budget") or {}
        allowed = raw.get("accuracy_drop_points")
    else:
        allowed = budget.accuracy_drop_points
    final = final_step(results)
    ci = final.get("accuracy_drop_ci95")
    if allowed is not None and ci and final["accuracy_drop"] <= allowed < ci[1]:
        out.append(f"{final['name']}: the accuracy drop {final['accuracy_drop']:.2f} points is within the budget "
                   f"{allowed:g}, but its 95 % upper bound {ci[1]:.2f} is not — the test split is too small to show "
                   f"the budget is met")
    overlap = (results.get("data") or {}).get("transfer_in_test")
    if overlap:
        out.append(f"{overlap} transfer texts also occur in the test split: the student saw the teacher's answers "
                   f"on them, so its test accuracy is optimistic")
    overlap = (results.get("data") or {}).get("augmented_in_test")
    if overlap:
        out.append(f"{overlap} augmented copies of training texts are also test texts: the student saw the "
                   f"teacher's answers on them, so its test accuracy is optimistic")
    for s in results["steps"]:
        rate = s["info"].get("test_oov_rate") if isinstance(s.get("info"), dict) else None
        if rate is not None and rate > OOV_CAUTION:
            out.append(f"{s['name']}: {rate * 100:.2f} % of the test tokens ({round(rate * s['info']['test_tokens'])} "
                       f"of {s['info']['test_tokens']}) are no longer in the trimmed vocabulary and fall back to "
                       f"unknown or shorter pieces")
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


def calibration_lines(results: dict) -> list[str]:
    """report.md: per-class precision / recall change of the shipped step, calibration per step, and the
    shipped step's accuracy against coverage when abstaining below each threshold."""
    from shrinkwrap.results import final_step

    final = final_step(results)
    out = []
    if len(results["steps"]) > 1:
        rows = [[c["class"], str(c["support"]), f"{c['precision']:.3f} ({c['precision_change_points']:+.1f})",
                 f"{c['recall']:.3f} ({c['recall_change_points']:+.1f})",
                 f"lost {c['lost']} of {c['support']}" if c["lost"] >= 0 else f"gained {-c['lost']} of {c['support']}"]
                for c in class_changes(results, final)]
        out += [f"## Per-class change of `{final['name']}` vs `{teacher_row(results)['name']}` (points)", "",
                _md_table(["class", "support", "precision", "recall", "texts"], rows, 1), ""]
    rows = [[s["name"], *(f"{s['metrics'][k]:.4f}" if k in s["metrics"] else "—" for k in ("ece", "brier", "nll"))]
            for s in results["steps"]]
    out += ["## Calibration (test split, 15-bin ECE, multi-class Brier, NLL)", "", _md_table(["step", "ECE", "Brier", "NLL"], rows, 1), ""]
    cal = final.get("calibration")
    if cal:
        out += [f"Temperature {cal['temperature']:.3f} fitted on {cal['validation_texts']} validation texts: test ECE "
                f"{cal['ece_raw']:.4f} → {cal['ece']:.4f}. Abstaining below each calibrated top score "
                f"(`predict --min-confidence`):", "",
                _md_table(["threshold", "coverage", "accuracy"],
                          [[f"{c['threshold']:.2f}", f"{c['coverage']:.3f}",
                            "—" if c["accuracy"] is None else f"{c['accuracy']:.4f}"] for c in cal["coverage"]], 0), ""]
    return out


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
    lines += calibration_lines(results)
    found = [f"- {c}." for c in cautions(results)]
    lines += ["## Cautions", ""] + (found or [f"- {NO_CAUTION}"]) + [f"- Rule for classes: {CLASS_RULE}.", ""]
    if results["data"]["notes"]:
        lines += ["## Data notes", ""] + [f"- {n}" for n in results["data"]["notes"]] + [""]
    lines += ["## Setup", "", *(f"- {line}" for line in setup_lines(results)), ""]
    return "\n".join(lines)


# ---- report.html: the same tables plus plots, in one file with nothing outside it -----------------------------


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


NO_PLOTS = "No plots: matplotlib is not installed (pip install matplotlib, or the [train] extra)."


def _has_matplotlib() -> bool:
    import importlib.util

    try:
        return importlib.util.find_spec("matplotlib") is not None
    except (ImportError, ValueError):
        return False


def html_report(results: dict) -> str:
    title = f"shrinkwrap report — {results['recipe']['name']}"
    header, rows, caption = step_rows(results)
    if _has_matplotlib():
        from shrinkwrap.report_plots import plots

        figures = "".join(f'<figure><img src="{uri}" alt="{html.escape(cap)}"><figcaption>{html.escape(cap)}'
                          f"</figcaption></figure>" for cap, uri in plots(results))
    else:  # the plain (serving) install: the tables alone, and how to get the plots
        figures = f"<p>{html.escape(NO_PLOTS)}</p>"
    found = cautions(results) or [NO_CAUTION]
    parts = [
        f"<h1>{html.escape(title)}</h1>",
        "<h2>Steps</h2>", _html_table(header, rows, 2), f"<p class=caption>{_inline(caption)}</p>",
        "<h2>Plots</h2>", figures,
        "<h2>Per-class recall (test split)</h2>", _html_table(*per_class_rows(results), 1),
        "<h2>Cautions</h2>", "<ul>" + "".join(f"<li>{_inline(c)}</li>" for c in found) + "</ul>",
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
