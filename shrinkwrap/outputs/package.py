"""Building the artifact folder (see shrinkwrap.serve.artifact for what it holds and how it is read).

Two ways in: `from_run` packages a finished chain's final step (run_dir/artifact/, written by
`shrinkwrap run`); `from_folder` packages any transformers classification folder, or a folder that
already holds model.onnx (`shrinkwrap package`). Either way the folder is built in a scratch folder
beside its destination and renamed into place only once complete, like a step's output.
"""
from __future__ import annotations

import json
import shutil
import sys
import tempfile
import time
from pathlib import Path
from typing import Callable, Optional

from shrinkwrap.outputs.card import folder_card, run_card
from shrinkwrap.outputs.results import (data_info, final_row, label_names, recipe_fingerprint, recipe_of, step_named,
                                        test_labels)
from shrinkwrap.outputs.tasks import of_results
from shrinkwrap.serve import tasks
from shrinkwrap.serve.artifact import DEFAULT_BATCH_SIZE, FORMAT, FORMAT_VERSION, file_entries, is_artifact, open_folder
from shrinkwrap.serve.classification import labels_of_config
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.fingerprint import sha256_file, tokenizer_fingerprint_of_file
from shrinkwrap.serve.rundir import (ARTIFACT_DIR, CARD_FILE, CONFIG_FILE, LABELS_FILE, MANIFEST_FILE, MODEL_FILE,
                                     STEP_FILE, TOKENIZER_FILE, check_out_dir, read_json, read_json_or_none, scratch,
                                     trained_length)

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
    """An existing destination is replaced only when it is an artifact or empty: never a user's folder."""
    check_out_dir(out, replaced=True)
    if out.is_dir() and any(out.iterdir()) and not is_artifact(out):
        raise UserError(f"--out {out}: exists and is not a shrinkwrap artifact — choose a new folder or empty it")


def _graph_facts(path: Path, vocab_size: Optional[int]) -> dict:
    """Read from the graph itself, whatever made it: opset, inputs, outputs, and what is int8."""
    import onnx

    from shrinkwrap.ml.convert import int8_summary

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


def write_artifact(out: Path, src: Path, labels: Optional[list[str]], tokenizer: dict, describe: dict,
                   card: Callable[[dict], str], measure: Optional[Callable[[object], dict]] = None,
                   threads: int = 2) -> Path:
    """Builds the artifact at `out` from `src` (a folder with model.onnx and the tokenizer files); `labels`: a
    classifier's class names (None: a sentence encoder, whose `describe` holds its `vector`).
    `tokenizer` holds max_length, pad_id and text_pair; `describe` the rest of the manifest (source,
    metrics, recipe fingerprint, model facts); `measure(artifact) -> metrics` runs on the loaded
    artifact before it is sealed; `card(manifest)` renders README.md."""
    from shrinkwrap.bench.machine import library_versions
    from shrinkwrap.ml.convert import vocab_size_of

    check_destination(out)
    for name in (MODEL_FILE, TOKENIZER_FILE):
        if not (src / name).is_file():
            raise UserError(f"{src}: no {name} — an artifact needs the model and its tokenizer")
    with scratch(out) as tmp:
        for name in (MODEL_FILE, CONFIG_FILE, *TOKENIZER_FILES):
            if (src / name).is_file():
                shutil.copyfile(src / name, tmp / name)
        if labels is not None:
            (tmp / LABELS_FILE).write_text(json.dumps(labels, ensure_ascii=False, indent=1), encoding="utf-8")
        manifest = {
            "format": FORMAT, "format_version": FORMAT_VERSION, "task": describe.get("task", tasks.DEFAULT),
            "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "model": describe.get("model", {}) | _graph_facts(tmp / MODEL_FILE, vocab_size_of(tmp)),
            "tokenizer": {"file": TOKENIZER_FILE, "fingerprint": tokenizer_fingerprint_of_file(tmp / TOKENIZER_FILE),
                          **tokenizer},
            **({"labels": {"file": LABELS_FILE, "count": len(labels)}} if labels is not None else {}),
            **{k: v for k, v in describe.items() if k != "model"},
            "versions": library_versions(),
        }
        if measure is not None:
            manifest["metrics"] = measure(open_folder(tmp, manifest, threads))
        (tmp / CARD_FILE).write_text(card(manifest), encoding="utf-8")
        manifest["files"] = file_entries(tmp, [p.name for p in tmp.iterdir() if p.is_file()])
        (tmp / MANIFEST_FILE).write_text(json.dumps(manifest, indent=2, ensure_ascii=False), encoding="utf-8")
    return out


# ---- from a finished run ---------------------------------------------------------------------------------


def _step_metrics(results: dict, step: dict) -> dict:
    """The manifest's metrics: the shipped step's quality as its task gives it (outputs.tasks: artifact_metrics),
    latency and size."""
    lat = step["latency_ms"]
    return {"step": step["name"], "split": "test", "texts": len(test_labels(results)),
            **of_results(results).artifact_metrics(step),
            "latency_ms": {k: lat[k] for k in ("p50", "p95", "batch_size", "sequence_length", "threads") if k in lat},
            "size_bytes": step["size_bytes"]}


def _sources(results: dict, row: dict) -> list[tuple[dict, dict]]:
    """(row, step.json) of `row` and of each step it came from, following the `after` each step recorded,
    as far as the results hold rows."""
    out = []
    while row is not None:
        record = read_json_or_none(Path(row["path"]) / STEP_FILE) or {}
        out.append((row, record))
        row = step_named(results, record["after"]) if record.get("after") else None
    return out


def from_run(results: dict, run_dir: Path) -> Path:
    """run_dir/artifact/ from the final step of `results` (which must be an ONNX step)."""
    final = final_row(results)
    src = Path(final["path"])
    recipe = recipe_of(results)
    data = data_info(results)
    lineage = _sources(results, final)
    record = lineage[0][1]
    config = read_json_or_none(src / CONFIG_FILE) or {}
    # An int8 graph keeps the graph kind of the fp32 export it was quantised from.
    graph = next((row["info"]["graph"] for row, _ in lineage if row["info"].get("graph")), None)
    model = {"graph": graph, "layers": config.get("num_hidden_layers"), "hidden_size": config.get("hidden_size")}
    if "method" in final["info"]:
        model["quantization"] = {k: v for k, v in final["info"].items() if not k.startswith("agreement")}
    task = of_results(results)
    describe = {
        "task": task.NAME,
        # Names and fingerprints only: an artifact ships, and the build machine's paths are nobody's business.
        "source": {"kind": "run", "run": Path(run_dir).resolve().name, "step": final["name"],
                   "step_fingerprint": record.get("fingerprint")},
        "model": model,
        "metrics": _step_metrics(results, final),
        "recipe_fingerprint": recipe_fingerprint(results),
        **({"calibration": {k: final["calibration"][k] for k in ("temperature", "fitted_on", "ece", "ece_raw")}}
           if "calibration" in final else {}),
        "data": {"path": Path(data["path"]).name, "sizes": data["sizes"], "fingerprint": data["fingerprint"]},
    }
    labels = label_names(results)
    if task.NAME == "embedding":  # a sentence encoder: its vector, and no classes (labels only measured it)
        describe["vector"] = vector_of(src, config)
        labels = None
    # The artifact is a student: it reads what the student was trained to read (an encoder: one text at a time).
    tokenizer = {"max_length": recipe.student_length, "pad_id": _pad_id(src),
                 "text_pair": recipe.data.text_pair is not None and labels is not None,
                 "truncation": recipe.data.truncation}
    return write_artifact(run_dir / ARTIFACT_DIR, src, labels, tokenizer, describe,
                          lambda manifest: run_card(manifest, results))


def vector_of(folder: Path, config: dict) -> dict:
    """The manifest's `vector` of a sentence encoder's graph: its size, pooling and normalisation."""
    from shrinkwrap.serve.embedding import SENTENCE_OUTPUT, read_pooling

    how = read_pooling(folder)
    if how is None:
        raise UserError(f"{folder}: no pooling.json — the step does not say how its encoder pools")
    return {"size": config.get("hidden_size"), "pooling": how["pooling"], "normalize": how["normalize"],
            "output": SENTENCE_OUTPUT}


def _pad_id(folder: Path) -> int:
    """The pad token's id, read from tokenizer.json (its padding section, else the [PAD]/<pad> token)."""
    tok = read_json(folder / TOKENIZER_FILE, "tokenizer file")
    if tok.get("padding") and "pad_id" in tok["padding"]:
        return int(tok["padding"]["pad_id"])
    special = read_json_or_none(folder / "special_tokens_map.json")
    pad = special.get("pad_token") if isinstance(special, dict) else None
    pad = pad.get("content") if isinstance(pad, dict) else pad
    for t in tok.get("added_tokens", []):
        if t.get("content") in (pad, "[PAD]", "<pad>"):
            return int(t["id"])
    return 0


# ---- from any model folder -------------------------------------------------------------------------------


def _labels_of(config: dict, where: Path) -> list[str]:
    labels = labels_of_config(config)
    if not labels:
        raise UserError(f"{where / CONFIG_FILE}: no id2label — an artifact needs the class names")
    return labels


def from_folder(model_dir: Path, out: Path, data: Optional[Path] = None, text: str = "text", label: str = "label",
                max_length: Optional[int] = None, int8: bool = True, per_channel: bool = True,
                opset: Optional[int] = None,
                threads: int = 2, log: Callable[[str], None] = lambda m: None) -> Path:
    """`shrinkwrap package`: an artifact from a transformers classification folder (exported to ONNX
    here, parity-checked, int8 unless int8=False) or from a folder that already holds model.onnx
    (packaged as it is). With `data`, accuracy on that table is measured through the artifact itself."""
    from pydantic import ValidationError

    from shrinkwrap.recipe.schema import ExportConfig

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
    config = read_json(model_dir / CONFIG_FILE, "model config")
    from shrinkwrap.serve.embedding import is_encoder_folder

    encoder = is_encoder_folder(model_dir)   # a sentence encoder: its pooling config (or a step's pooling.json)
    labels = None if encoder else _labels_of(config, model_dir)
    vector = vector_of(model_dir, config) if encoder else None
    if not (model_dir / TOKENIZER_FILE).is_file():
        raise UserError(f"{model_dir}: no {TOKENIZER_FILE} — the artifact needs the (fast) tokenizer the model "
                        f"was trained with")
    positions = config.get("max_position_embeddings")
    if max_length is not None and positions and max_length > positions:
        raise UserError(f"--max-length {max_length} — the model takes at most {positions} tokens")
    if max_length is None:
        max_length = trained_length(model_dir, positions)
        if max_length is None:
            max_length = min(positions or 512, 512)
            print(f"note: {model_dir} does not record the length it was trained at — texts are cut at {max_length} "
                  f"tokens (its position count, at most 512); give --max-length to choose", file=sys.stderr, flush=True)
    table = None
    if data is not None:
        from shrinkwrap.bench.testset import label_ids, read_table

        table = read_table(Path(data), text, label, label_optional=encoder)
        if not encoder:
            label_ids(table, labels)  # every label one of the model's, before anything is converted

    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        describe: dict = {"source": {"kind": "folder", "path": model_dir.resolve().name}, "recipe_fingerprint": None}
        if encoder:
            describe.update(task="embedding", vector=vector)
        if (model_dir / MODEL_FILE).is_file():
            src = model_dir
            describe["model"] = {"converted": False}
        else:
            src = tmp
            describe["model"] = _convert(model_dir, tmp, table, max_length, int8, per_channel, export_cfg, threads, log)
        if table is not None:
            describe["data"] = {"path": Path(data).name, "rows": len(table.texts),
                                "fingerprint": sha256_file(Path(data)) if Path(data).is_file() else None,
                                "caution": data_caution(len(table.texts), encoder)}
        source = None if (model_dir / MODEL_FILE).is_file() else model_dir  # a PyTorch folder: timed beside it
        if table is None:
            measure = None
        elif encoder:
            measure = lambda art: _vector_metrics(art, table, model_dir, max_length, source, threads, log)  # noqa: E731
        else:
            measure = lambda art: _table_metrics(art, table, labels, source, threads, log)  # noqa: E731
        log(f"writing {out}")
        return write_artifact(out, src, labels, {"max_length": max_length, "pad_id": _pad_id(src), "text_pair": False,
                                                   "truncation": "head"},
                              describe, lambda manifest: folder_card(manifest, labels), measure, threads)


def _vector_metrics(art, table, model_dir: Path, max_length: int, source: Optional[Path], threads: int, log) -> dict:
    """`package --data` of a sentence encoder: the artifact's vectors of the table's texts against those of the
    model it was made from (`model_dir`, read with its own tokenizer), and the kNN vote where the table has labels."""
    import numpy as np

    from shrinkwrap.bench.embedding import quality
    from shrinkwrap.bench.testset import reference_vectors

    log(f"the vectors of {len(table.texts)} --data texts against {model_dir}'s")
    vectors = art.outputs(table.texts)
    names = sorted(set(table.labels)) if table.labels is not None else []
    labels = np.array([names.index(v) for v in table.labels]) if names else None
    m, _ = quality(vectors, labels, reference_vectors(model_dir, table, max_length, threads))
    m.pop("cosine_deciles")
    return {"split": "all rows of --data", "reference": model_dir.resolve().name, **m,
            **_timed_together(art, table, source, threads, log)}


def data_caution(rows: int, encoder: bool = False) -> str:
    """`package --data`: what its figures are and are not (manifest `data.caution`, the card, stderr)."""
    what = "the figures are measured" if encoder else "the accuracy is measured"
    held = "they are not held-out figures" if encoder else "it is not a held-out figure"
    return (f"{what} on the {rows} rows given with --data; {held} unless those rows were held out from the "
            f"model's training")


def _convert(model_dir: Path, tmp: Path, table, max_length: int, int8: bool, per_channel: bool, export_cfg,
             threads: int, log) -> dict:
    """tmp/model.onnx (+ config and tokenizer) from a transformers folder; returns the manifest's model facts."""

    from shrinkwrap.bench.latency import graph_p50_ms
    from shrinkwrap.ml.convert import agreement, export_checked
    from shrinkwrap.ml.int8_rows import METHOD, quantize_rows
    from shrinkwrap.ml.data import Split
    from shrinkwrap.ml.models import load_tokenizer
    from shrinkwrap.ml.tasks import of_folder
    from shrinkwrap.recipe.schema import BenchConfig, OnnxQuantizeConfig
    from shrinkwrap.serve.batches import collate, encode

    log(f"loading {model_dir}")
    task = of_folder(model_dir)
    model = task.load(str(model_dir))
    tokenizer = load_tokenizer(str(model_dir), what=str(model_dir))
    texts = table.texts[:PARITY_TEXTS] if table is not None else PROBE_TEXTS
    examples = encode(tokenizer, Split(texts=texts, labels=None), max_length)
    pad_id = tokenizer.pad_token_id or 0
    # each graph considered is timed, for the record, at the benchmark's default shape
    shape = BenchConfig()
    timing = collate(examples[:1] * shape.batch_size, pad_id, length=min(shape.sequence_length, max_length))
    export_dir = tmp / "fp32"
    export_dir.mkdir()
    log("exporting to ONNX (fp32) and checking parity with PyTorch")
    # int8 scales each row (token) of a product's input by itself, which a fused Attention node would not do: the
    # graph to quantise is the plain export (shrinkwrap.ml.int8_rows)
    cfg = export_cfg.model_copy(update={"optimize": "never"}) if int8 else export_cfg
    info = export_checked(model, examples, pad_id, lambda path: graph_p50_ms(path, timing, threads), cfg,
                          threads, export_dir, task, what=f"package {model_dir}")
    facts = {"converted": True, "graph": info["graph"], "parity": info["parity"]}
    if int8:
        log("quantising to int8 (one activation scale per row)")
        q = OnnxQuantizeConfig(per_channel=per_channel)
        rows = quantize_rows(export_dir / MODEL_FILE, tmp / MODEL_FILE, q.per_channel, q.int8_operators)
        facts.update(quantization={"method": METHOD, "activation_scales": "one per row (token), at run time",
                                   "batch_independent": True, "per_channel": q.per_channel,
                                   "int8_operators": list(q.int8_operators), **rows},
                     **agreement(export_dir / MODEL_FILE, tmp / MODEL_FILE, examples, pad_id, threads,
                                 DEFAULT_BATCH_SIZE, task))
    else:
        shutil.move(str(export_dir / MODEL_FILE), tmp / MODEL_FILE)
    task.save_config(model, tmp)
    tokenizer.save_pretrained(tmp)
    return facts


def _table_metrics(art, table, labels: list[str], source: Optional[Path], threads: int, log) -> dict:
    from shrinkwrap.bench.testset import label_ids
    from shrinkwrap.ml.metrics import classification_metrics

    y = label_ids(table, labels)
    preds = art.outputs(table.texts).argmax(1)
    m = classification_metrics(y, preds, len(labels))
    return {"split": "all rows of --data", "texts": len(y), "accuracy": m["accuracy"], "macro_f1": m["macro_f1"],
            "per_class": m["per_class"], **_timed_together(art, table, source, threads, log)}


def _timed_together(art, table, source: Optional[Path], threads: int, log) -> dict:
    """The artifact's graph, and the PyTorch model it came from (`source`), timed together in interleaved rounds
    on the first --data text at the benchmark's default shape: latency_ms, source_latency_ms, speedup_p95."""
    from shrinkwrap.bench.rounds import time_in_rounds
    from shrinkwrap.recipe.schema import BenchConfig
    from shrinkwrap.serve.batches import collate

    cfg = BenchConfig(threads=threads)
    examples, _ = art.encode(table.texts[:1])
    batch = collate(examples * cfg.batch_size, int(art.manifest["tokenizer"].get("pad_id", 0)),
                    length=min(cfg.sequence_length, art.max_length))
    models = [(art.folder / MODEL_FILE, batch)] + ([(source, batch)] if source is not None else [])
    log(f"timing the artifact{' and its source' if source else ''} together, {cfg.rounds} interleaved rounds")
    timed = time_in_rounds(models, cfg, cfg.rounds)
    out = {"latency_ms": timed[0]}
    if source is not None:
        out.update(source_latency_ms=timed[1], speedup_p95=timed[1]["p95"] / timed[0]["p95"])
    return out
