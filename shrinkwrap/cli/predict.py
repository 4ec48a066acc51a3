"""`shrinkwrap predict ARTIFACT [TEXT ...]`: JSON lines from an artifact, with the plain install alone."""
from __future__ import annotations

from pathlib import Path

from shrinkwrap.cli.options import add_min_confidence, add_trusted_key, count, positive_int


def add(sub) -> None:
    p = sub.add_parser("predict", help="classify or embed texts with an artifact (needs only onnxruntime, tokenizers, "
                                       "numpy)",
                       description="Print one JSON line per text: {\"text\", \"label\", \"scores\"} from a "
                                   "classifier, {\"text\", \"embedding\"} from a sentence encoder. Every file of "
                                   "ARTIFACT is checked against its manifest.json first; a modified or incomplete "
                                   "artifact is refused (exit 2).")
    p.add_argument("artifact", metavar="ARTIFACT",
                   help="artifact folder (run_dir/artifact, or one written by `shrinkwrap package`)")
    p.add_argument("texts", nargs="*", metavar="TEXT",
                   help="texts to classify (none: one per line from --file or stdin)")
    p.add_argument("--file", metavar="FILE", help="UTF-8 file: one text per line; .jsonl/.ndjson: JSON lines "
                   "{\"text\": ..., \"text_pair\": ...}; .csv/.tsv: a table with a header (columns --text, --text-pair)")
    p.add_argument("--text", default="text", metavar="NAME",
                   help="key (JSON lines) or column (CSV/TSV) holding the text (default: text)")
    p.add_argument("--text-pair", metavar="NAME",
                   help="key or column holding the second text, for a model that classifies pairs "
                        "(default: text_pair)")
    p.add_argument("--batch-size", type=positive_int, metavar="N",
                   help="texts per model call; texts are grouped by length (default: 32; an artifact made by "
                        "this version gives every text the same answer at any batch size)")
    p.add_argument("--threads", type=count, default=0, metavar="N",
                   help="ONNX Runtime intra-op threads (default: 0 = its own choice)")
    p.add_argument("--id", metavar="NAME",
                   help="key (JSON lines) or column (CSV/TSV) of --file holding each row's id: printed first in its "
                        "output line, under that name, so that results join back to the rows")
    p.add_argument("--npy", metavar="FILE",
                   help="a sentence encoder's artifact: write its vectors to FILE (.npy) as one float32 matrix, row k "
                        "for input k, instead of JSON lines")
    add_trusted_key(p)
    add_min_confidence(p, "printed (default: 0, always answer; the report plots accuracy against coverage)")
    p.set_defaults(func=main)


def main(args) -> int:
    # Only torch-free modules on this path: an artifact must run in a slim image (tests/test_predict.py).
    from shrinkwrap.serve.artifact import DEFAULT_BATCH_SIZE
    from shrinkwrap.serve.predict import run_predict

    return run_predict(args.artifact, args.texts, args.file, args.batch_size or DEFAULT_BATCH_SIZE, args.threads,
                       trusted_key=args.trusted_key and Path(args.trusted_key),
                       min_confidence=args.min_confidence, text_col=args.text, pair_col=args.text_pair,
                       id_col=args.id, npy=args.npy)
