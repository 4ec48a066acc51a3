"""results.json -> the per-step table (report.md), with cautions where an average can mislead."""
from __future__ import annotations

# A class whose recall fell this many points more than the average did is called out (common practice
# in model reviews: look at the worst class, not only the mean).
CLASS_DROP_POINTS = 5.0


def _mb(n: int) -> str:
    return f"{n / 1e6:.1f}"


def step_table(results: dict) -> str:
    steps = results["steps"]
    ref = steps[0]
    lat = ref["latency_ms"]
    head = (f"| step | format | accuracy | macro-F1 | drop (pts) | agreement | p50 ms | p95 ms | size MB | "
            f"speed-up p50 | smaller |\n|---|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|")
    rows = []
    for s in steps:
        m, l = s["metrics"], s["latency_ms"]
        rows.append(
            f"| {s['name']} | {s['format']} | {m['accuracy']:.4f} | {m['macro_f1']:.4f} | {s['accuracy_drop']:+.2f} | "
            f"{s['agreement_with_teacher']:.3f} | {l['p50']:.2f} | {l['p95']:.2f} | {_mb(s['size_bytes'])} | "
            f"{lat['p50'] / l['p50']:.2f}× | {ref['size_bytes'] / s['size_bytes']:.2f}× |")
    caption = (f"Latency: batch {lat['batch_size']} × {lat['sequence_length']} tokens, {lat['threads']} threads, "
               f"{lat['n']}+ timed runs after warm-up. Drop and ratios are against `{ref['name']}`; "
               f"agreement is the share of test texts where a step predicts the same label as `{ref['name']}`.")
    return "\n".join([head, *rows, "", caption])


def class_cautions(results: dict) -> list[str]:
    """Lines naming each step's class whose recall fell much more than the accuracy did."""
    names = results["data"]["label_names"]
    ref = results["steps"][0]
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


def per_class_table(results: dict) -> str:
    names = results["data"]["label_names"]
    steps = results["steps"]
    head = "| class | support | " + " | ".join(s["name"] for s in steps) + " |\n|---|---:|" + "---:|" * len(steps)
    support = steps[0]["metrics"]["per_class"]["support"]
    rows = [f"| {n} | {support[i]} | " + " | ".join(f"{s['metrics']['per_class']['recall'][i]:.3f}" for s in steps) + " |"
            for i, n in enumerate(names)]
    return "\n".join([head, *rows])


def markdown_report(results: dict) -> str:
    machine = results["machine"]
    v = machine["versions"]
    lines = [
        f"# shrinkwrap report — {results['recipe']['name']}",
        "",
        step_table(results),
        "",
        "## Per-class recall (test split)",
        "",
        per_class_table(results),
        "",
    ]
    cautions = class_cautions(results)
    lines += ["## Cautions", ""] + (cautions or ["- No class lost much more recall than the average accuracy did."]) + [""]
    if results["data"]["notes"]:
        lines += ["## Data notes", ""] + [f"- {n}" for n in results["data"]["notes"]] + [""]
    sizes = results["data"]["sizes"]
    lines += [
        "## Setup",
        "",
        f"- data: {results['data']['path']} — train {sizes['train']}, validation {sizes['validation']}, "
        f"test {sizes['test']}; {len(results['data']['label_names'])} classes",
        f"- machine: {machine['cpu']}, {machine['cores_available']} cores available",
        "- versions: " + ", ".join(f"{k} {val}" for k, val in v.items()),
        f"- step wall time (s): " + ", ".join(f"{s['name']} {s['seconds']:.0f}" for s in results["steps"]),
        "",
    ]
    return "\n".join(lines)
