"""`shrinkwrap package MODEL_DIR --out DIR`: an artifact from a transformers classification folder."""
from __future__ import annotations

import argparse
import json
from pathlib import Path

from shrinkwrap.cli.options import (add_signing_key, at_least, field_bounds, logger, positive_int, print_cautions,
                                    signing_key)
from shrinkwrap.serve.errors import EXIT_OK


def add(sub) -> None:
    from shrinkwrap.recipe.schema import ExportConfig

    opset_min, opset_max = field_bounds(ExportConfig, "opset", "ge", "le")
    p = sub.add_parser("package", help="build an artifact from a transformers classification folder",
                       description="Build an artifact folder (model.onnx, tokenizer, labels, manifest.json with "
                                   "hashes, model card README.md) from MODEL_DIR: a transformers classification "
                                   "folder (exported to ONNX, parity-checked against PyTorch, int8 by default) "
                                   "or a folder that already holds model.onnx (packaged as it is).")
    p.add_argument("model_dir", metavar="MODEL_DIR",
                   help="transformers classification folder (safetensors) or a folder with model.onnx")
    p.add_argument("--out", required=True, metavar="DIR", help="artifact folder to write (replaced only if it "
                   "is an artifact or empty)")
    p.add_argument("--data", metavar="FILE", help="labelled table (.csv, .jsonl, .parquet): accuracy on all its "
                   "rows is measured through the artifact and recorded in manifest.json and the model card")
    p.add_argument("--text", default="text", help="text column of --data (default: text)")
    p.add_argument("--label", default="label", help="label column of --data, holding the model's label names "
                   "(default: label)")
    p.add_argument("--max-length", type=positive_int, metavar="N",
                   help="tokens per text after truncation (default: the model's position count, at most 512)")
    p.add_argument("--int8", action=argparse.BooleanOptionalAction, default=True,
                   help="quantise the exported graph to int8, embeddings included, each row's activations "
                        "scaled on their own so that a text's scores do not depend on its batch (default: on; a "
                        "folder with model.onnx is packaged as it is)")
    p.add_argument("--per-channel", action=argparse.BooleanOptionalAction, default=True,
                   help="int8 weights with one scale per output column rather than per tensor (default: on; "
                        "--no-per-channel for one scale per tensor)")
    p.add_argument("--opset", type=at_least(opset_min, opset_max), metavar="N",
                   help="ONNX opset of the export (default: a recipe's export.opset default)")
    p.add_argument("--threads", type=positive_int, default=2, metavar="N",
                   help="ONNX Runtime threads for the parity check and the accuracy pass (default: 2)")
    p.add_argument("--json", action="store_true", help="print manifest.json instead of a summary line")
    add_signing_key(p)
    p.set_defaults(func=main)


def main(args) -> int:
    from shrinkwrap.serve.extras import require_train

    require_train("shrinkwrap package")
    from shrinkwrap.outputs.package import from_folder
    from shrinkwrap.serve.rundir import MANIFEST_FILE, read_json

    key = signing_key(args)
    out = from_folder(Path(args.model_dir), Path(args.out), data=args.data and Path(args.data), text=args.text,
                      label=args.label, max_length=args.max_length, int8=args.int8, per_channel=args.per_channel,
                      opset=args.opset, threads=args.threads, log=logger("package", args.json))
    if key:
        from shrinkwrap.serve.signing import sign_artifact

        sign_artifact(out, key)
    manifest = read_json(out / MANIFEST_FILE, "artifact manifest")
    caution = (manifest.get("data") or {}).get("caution")
    if args.json:
        print(json.dumps(manifest, indent=2))
    else:
        m = manifest.get("metrics")
        timing = (f"; p95 {m['latency_ms']['p95']:.2f} ms against {m['source_latency_ms']['p95']:.2f} ms for the "
                  f"source, {m['speedup_p95']:.2f}× faster, timed together"
                  + (" — unstable: the machine was busy" if m["latency_ms"]["unstable"]
                     or m["source_latency_ms"]["unstable"] else "") if m and "speedup_p95" in m else "")
        if m and "accuracy" in m:
            figures = f"accuracy {m['accuracy']:.4f}, macro-F1 {m['macro_f1']:.4f}"
        elif m:  # a sentence encoder: its vectors against the model it was made from
            figures = f"cosine {m['cosine_to_teacher']:.4f} to {m['reference']}'s vectors, neighbour recall at 10 " \
                      f"{m['neighbour_recall_at_10']:.3f}"
        print(f"artifact: {out}" + (f"  ({figures} on {m['texts']} texts{timing})" if m else ""))
    if caution:
        print_cautions([caution])
    return EXIT_OK
