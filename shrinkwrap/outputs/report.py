"""results.json -> report.md and a self-contained report.html (tables, plots, cautions where an average can mislead)."""
from __future__ import annotations

import html
from pathlib import Path

from shrinkwrap.outputs.findings import cautions
from shrinkwrap.outputs.html import inline, page, table
from shrinkwrap.outputs.results import (
    data_info,
    data_notes,
    final_row,
    label_names,
    load,
    machine_of,
    run_name,
    steps_of,
    teacher_row,
)
from shrinkwrap.outputs.tasks import of_results
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.rundir import REPORT_FILE, REPORT_HTML_FILE, check_out_dir, write_text_atomic


def md_table(header: list[str], rows: list[list[str]], left: int) -> str:
    """`left` leading columns are text (left-aligned), the rest numbers."""
    align = "|" + "---|" * left + "---:|" * (len(header) - left)
    return "\n".join(["| " + " | ".join(header) + " |", align, *("| " + " | ".join(r) + " |" for r in rows)])


def step_table(results: dict) -> str:
    header, rows, caption = of_results(results).step_rows(results)
    return "\n".join([md_table(header, rows, 2), "", caption])


def per_class_table(results: dict) -> str:
    return md_table(*of_results(results).per_class_rows(results), 1)


def setup_lines(results: dict) -> list[str]:
    machine = machine_of(results)
    data = data_info(results)
    sizes = data["sizes"]
    return [
        f"data: {data['path']} — train {sizes['train']}, validation {sizes['validation']}, "
        f"test {sizes['test']}; {len(label_names(results))} classes",
        f"machine: {machine['cpu']}, {machine['cores_available']} cores available",
        "versions: " + ", ".join(f"{k} {val}" for k, val in machine["versions"].items()),
        "step wall time (s): " + ", ".join(f"{s['name']} {s['seconds']:.0f}" for s in steps_of(results)),
    ]


def batch_dependent(step: dict) -> bool:
    """Whether the step's int8 scales activations over the whole batch (a run made before per-row int8 records no
    `batch_independent`: its dynamic method says it)."""
    info = step.get("info") or {}
    return not info.get("batch_independent", "dynamic" not in info.get("method", ""))


def int8_agreement_lines(results: dict) -> list[str]:
    """One line per int8 ONNX step: how often it predicts what the fp32 graph it came from predicts, and whether
    its answers depend on the batch."""
    return [f"- `{s['name']}` predicts the same label as the fp32 ONNX graph it was quantised from on "
            f"{s['agreement_with_fp32'] * 100:.1f} % of the test texts."
            + (" **Batch-dependent**: it scales activations over the whole batch, so a text's scores change with "
               "the texts batched with it; its accuracy is each test text classified alone." if batch_dependent(s)
               else "")
            for s in steps_of(results) if "agreement_with_fp32" in s]


def calibration_lines(results: dict) -> list[str]:
    """report.md: per-class precision / recall change of the shipped step, calibration per step, and the
    shipped step's accuracy against coverage when abstaining below each threshold."""
    final = final_row(results)
    out = []
    if len(steps_of(results)) > 1:
        rows = [[c["class"], str(c["support"]), f"{c['precision']:.3f} ({c['precision_change_points']:+.1f})",
                 f"{c['recall']:.3f} ({c['recall_change_points']:+.1f})",
                 f"lost {c['lost']} of {c['support']}" if c["lost"] >= 0 else f"gained {-c['lost']} of {c['support']}"]
                for c in of_results(results).class_changes(results, final)]
        out += [f"## Per-class change of `{final['name']}` vs `{teacher_row(results)['name']}` (points)", "",
                md_table(["class", "support", "precision", "recall", "texts"], rows, 1), ""]
    rows = [[s["name"], *(f"{s['metrics'][k]:.4f}" if k in s["metrics"] else "—" for k in ("ece", "brier", "nll"))]
            for s in steps_of(results)]
    out += ["## Calibration (test split, 15-bin ECE, multi-class Brier, NLL)", "", md_table(["step", "ECE", "Brier", "NLL"], rows, 1), ""]
    cal = final.get("calibration")
    if cal:
        out += [f"Temperature {cal['temperature']:.3f} fitted on {cal['validation_texts']} validation texts: test ECE "
                f"{cal['ece_raw']:.4f} → {cal['ece']:.4f}. Abstaining below each calibrated top score "
                f"(`predict --min-confidence`):", "",
                md_table(["threshold", "coverage", "accuracy"],
                          [[f"{c['threshold']:.2f}", f"{c['coverage']:.3f}",
                            "—" if c["accuracy"] is None else f"{c['accuracy']:.4f}"] for c in cal["coverage"]], 0), ""]
    return out


def markdown_report(results: dict) -> str:
    agreement = int8_agreement_lines(results)
    lines = [
        f"# shrinkwrap report — {run_name(results)}",
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
    task = of_results(results)
    lines += ["## Cautions", ""] + (found or [f"- {task.NO_CAUTION}"]) + [f"- Rule for classes: {task.CAUTION_RULE}.", ""]
    if data_notes(results):
        lines += ["## Data notes", ""] + [f"- {n}" for n in data_notes(results)] + [""]
    lines += ["## Setup", "", *(f"- {line}" for line in setup_lines(results)), ""]
    return "\n".join(lines)


# ---- report.html: the same tables plus plots, in one file with nothing outside it -----------------------------


NO_PLOTS = "No plots: matplotlib is not installed (pip install matplotlib, or the [train] extra)."


def _has_matplotlib() -> bool:
    import importlib.util

    try:
        return importlib.util.find_spec("matplotlib") is not None
    except (ImportError, ValueError):
        return False


def html_report(results: dict) -> str:
    title = f"shrinkwrap report — {run_name(results)}"
    header, rows, caption = of_results(results).step_rows(results)
    if _has_matplotlib():
        from shrinkwrap.outputs.plots import plots

        figures = "".join(f'<figure><img src="{uri}" alt="{html.escape(cap)}"><figcaption>{html.escape(cap)}'
                          f"</figcaption></figure>" for cap, uri in plots(results))
    else:  # the plain (serving) install: the tables alone, and how to get the plots
        figures = f"<p>{html.escape(NO_PLOTS)}</p>"
    found = cautions(results) or [of_results(results).NO_CAUTION]
    parts = [
        f"<h1>{html.escape(title)}</h1>",
        "<h2>Steps</h2>", table(header, rows, 2), f"<p class=caption>{inline(caption)}</p>",
        "<h2>Plots</h2>", figures,
        "<h2>Per-class recall (test split)</h2>", table(*of_results(results).per_class_rows(results), 1),
        "<h2>Cautions</h2>", "<ul>" + "".join(f"<li>{inline(c)}</li>" for c in found) + "</ul>",
    ]
    if data_notes(results):
        parts += ["<h2>Data notes</h2>", "<ul>" + "".join(f"<li>{inline(n)}</li>" for n in data_notes(results)) + "</ul>"]
    parts += ["<h2>Setup</h2>", "<ul>" + "".join(f"<li>{html.escape(l)}</li>" for l in setup_lines(results)) + "</ul>"]
    return page(title, parts, check_images=True)


def _write(out: Path, md: str, html_page: str) -> tuple[Path, Path]:
    write_text_atomic(out / REPORT_FILE, md)
    write_text_atomic(out / REPORT_HTML_FILE, html_page)
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
        md, html_page = markdown_report(results), html_report(results)
    except (KeyError, IndexError, TypeError, ValueError, ZeroDivisionError) as e:
        raise UserError(f"{results_path}: a field the report needs is missing or malformed "
                        f"({type(e).__name__}: {e})") from None
    out.mkdir(parents=True, exist_ok=True)
    return _write(out, md, html_page)
