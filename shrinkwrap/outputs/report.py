"""results.json -> report.md and a self-contained report.html (tables, plots, cautions where an average can mislead).

Both are rendered from one list of sections, so the page carries what the Markdown carries; the page adds the
plots. The report opens with what shipped: the step, the artifact, the budget's verdict per limit and the
cautions that concern the release; cautions about steps only measured stand under those steps.
"""
from __future__ import annotations

import html
from pathlib import Path

from shrinkwrap.outputs.findings import cautions_by_step, concern_release
from shrinkwrap.outputs.html import inline, page, table
from shrinkwrap.outputs.results import (artifact_path, data_info, data_notes, final_row, label_names, load, machine_of,
                                        recipe_dump, run_name, steps_of, verdict_of)
from shrinkwrap.outputs.tasks import of_results
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.rundir import REPORT_FILE, REPORT_HTML_FILE, check_out_dir, write_text_atomic

# A section: (title, parts); a part is ("p", text), ("list", [lines]) or ("table", header, rows, left columns).
Section = tuple[str, list[tuple]]


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
    n = len(label_names(results))
    return [
        f"data: {data['path']} — train {sizes['train']}, validation {sizes['validation']}, "
        f"test {sizes['test']}; " + (f"{n} classes" if n else "no labels"),
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
    """One line per int8 ONNX step: how close it stays to the fp32 graph it came from (a classifier: how often it
    predicts the same label; an encoder: the mean cosine of their vectors), and whether its answers depend on the
    batch."""
    def close(s: dict) -> str:
        if "agreement_with_fp32" in s:
            return f"predicts the same label as the fp32 ONNX graph it was quantised from on " \
                   f"{s['agreement_with_fp32'] * 100:.1f} % of the test texts."
        return (f"gives vectors at a mean cosine of {s['cosine_with_fp32']:.4f} to the fp32 ONNX graph's it was "
                f"quantised from (lowest {s['info'].get('min_cosine_with_fp32', float('nan')):.4f}) on the test texts.")

    return [f"- `{s['name']}` " + close(s)
            + (" **Batch-dependent**: it scales activations over the whole batch, so a text's outputs change with "
               "the texts batched with it; its figures are each test text taken alone." if batch_dependent(s)
               else "")
            for s in steps_of(results) if "agreement_with_fp32" in s or "cosine_with_fp32" in s]


def _what_shipped(results: dict) -> Section:
    final, path = final_row(results), artifact_path(results)
    lat = final["latency_ms"]
    if path:
        shipped = (f"Step `{final['name']}` ships as `{path}`: {of_results(results).headline(final)}, p95 "
                   f"{lat['p95']:.2f} ms (timed with the teacher and every step in interleaved rounds"
                   + (", unstable: the machine was busy" if lat.get("unstable") else "") + f"), "
                   f"{final['size_bytes'] / 1e6:.1f} MB.")
    else:
        shipped = f"Nothing shipped: the chain ended at step `{final['name']}`, which makes no artifact."
    parts: list[tuple] = [("p", shipped)]
    verdict = verdict_of(results)
    if verdict is not None:
        parts += [("p", f"Budget ({verdict['budget']}), checked on `{verdict['step']}`: "
                        + ("every limit met." if verdict["passed"] else "**a limit failed**.")),
                  ("table", ["limit", "allowed", "measured", "verdict", "what"],
                   [[c["name"], f"{'≤' if c['comparison'] == '<=' else '≥'} {c['allowed']:.4g}{c['unit']}",
                     "—" if c["measured"] is None else f"{c['measured']:.4g}{c['unit']}",
                     c["verdict"].lower(), c["detail"]] for c in verdict["checks"]], 1)]
    elif any(v not in (None, False) for k, v in (recipe_dump(results).get("budget") or {}).items() if k != "regression"):
        parts.append(("p", "Budget: not checked (the chain was stopped early)."))
    else:
        parts.append(("p", "No budget: the recipe sets no limit."))
    release = [line for step, line in cautions_by_step(results) if concern_release(results, step)]
    parts.append(("p", "Cautions that concern the release:" if release else
                  f"Cautions that concern the release: none. {of_results(results).NO_CAUTION}"))
    if release:
        parts.append(("list", [f"{line}." for line in release]))
    return "What shipped", parts


def _measured_only_cautions(results: dict) -> Section:
    task = of_results(results)
    by_step: dict[str, list[str]] = {}
    for step, line in cautions_by_step(results):
        if not concern_release(results, step):
            by_step.setdefault(step, []).append(f"{line}.")
    parts: list[tuple] = []
    for step, lines in by_step.items():
        parts += [("p", f"`{step}` (measured only, it does not ship):"), ("list", lines)]
    if not parts:
        parts.append(("p", "None."))
    return "Cautions about steps only measured", parts + [("p", f"{task.CAUTION_RULE_TITLE}: {task.CAUTION_RULE}.")]


def sections(results: dict) -> list[Section]:
    task = of_results(results)
    header, rows, caption = task.step_rows(results)
    agreement = int8_agreement_lines(results)
    out: list[Section] = [
        _what_shipped(results),
        ("Steps", [("table", header, rows, 2), ("p", caption)]
         + ([("list", [line[2:] for line in agreement])] if agreement else [])),
        *task.detail_sections(results),   # a classifier's per-class and calibration tables; an encoder's cosines
        _measured_only_cautions(results),
    ]
    if data_notes(results):
        out.append(("Data notes", [("list", list(data_notes(results)))]))
    out.append(("Setup", [("list", setup_lines(results))]))
    return out


def markdown_report(results: dict) -> str:
    lines = [f"# shrinkwrap report — {run_name(results)}", ""]
    for title, parts in sections(results):
        lines += [f"## {title}", ""]
        for part in parts:
            if part[0] == "p":
                lines += [part[1], ""]
            elif part[0] == "list":
                lines += [f"- {item}" for item in part[1]] + [""]
            else:
                lines += [md_table(*part[1:]), ""]
    return "\n".join(lines)


# ---- report.html: the same sections plus plots, in one file with nothing outside it ---------------------------


NO_PLOTS = "No plots: matplotlib is not installed (pip install matplotlib, or the [train] extra)."


def _has_matplotlib() -> bool:
    import importlib.util

    try:
        return importlib.util.find_spec("matplotlib") is not None
    except (ImportError, ValueError):
        return False


def _html_part(part: tuple) -> str:
    if part[0] == "p":
        return f"<p>{inline(part[1])}</p>"
    if part[0] == "list":
        return "<ul>" + "".join(f"<li>{inline(item)}</li>" for item in part[1]) + "</ul>"
    return table(*part[1:])


def html_report(results: dict) -> str:
    title = f"shrinkwrap report — {run_name(results)}"
    if _has_matplotlib():
        from shrinkwrap.outputs.plots import plots

        figures = "".join(f'<figure><img src="{uri}" alt="{html.escape(cap)}"><figcaption>{html.escape(cap)}'
                          f"</figcaption></figure>" for cap, uri in plots(results))
    else:  # the plain (serving) install: the tables alone, and how to get the plots
        figures = f"<p>{html.escape(NO_PLOTS)}</p>"
    parts = [f"<h1>{html.escape(title)}</h1>"]
    for name, section in sections(results):
        parts += [f"<h2>{inline(name)}</h2>", *(_html_part(p) for p in section)]
        if name == "Steps":
            parts += ["<h2>Plots</h2>", figures]
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
