"""Command line: one function per command; parsing and exit codes only.

Exit codes: 0 ok, 1 a budget failed, 2 bad input, 3 a step failed or an internal error.
"""
from __future__ import annotations

import argparse
import json
import math
import os
import sys
import traceback
from pathlib import Path

from shrinkwrap.errors import EXIT_INTERNAL, EXIT_OK, StepFailed, UserError


def cmd_run(args) -> int:
    from shrinkwrap.extras import require_train

    require_train("shrinkwrap run")
    from shrinkwrap.recipe import load_recipe
    from shrinkwrap.report import step_table
    from shrinkwrap.rundir import REPORT_FILE, REPORT_HTML_FILE, RESULTS_FILE

    recipe = load_recipe(args.recipe, args.set)
    out = Path(args.out) if args.out else Path("runs") / recipe.name
    key = _signing_key(args)
    from shrinkwrap.pipeline import run_recipe

    results = run_recipe(recipe, out, quiet=args.json, until=args.until, signing_key=key)  # steps -> artifact -> reports
    if not results:  # a helper process of a distributed run: the main process reports
        return EXIT_OK
    if args.json:
        print(json.dumps(results, indent=2))
    else:
        print(step_table(results))
        print(f"\nresults: {out / RESULTS_FILE}\nreport:  {out / REPORT_FILE}, {out / REPORT_HTML_FILE}")
        if "artifact" in results:
            path = results["artifact"]["path"]
            print(f"artifact: {path} (run it with: shrinkwrap predict {path} TEXT)")
    if not recipe.budget.limits_set() or args.until:
        _print_cautions(results["cautions"])
    if not recipe.budget.limits_set():
        return EXIT_OK
    if args.until:
        print("note: the recipe's budget is not checked — --until stopped the chain early", file=sys.stderr)
        return EXIT_OK
    from shrinkwrap.gate import evaluate, format_table

    verdict = evaluate(results, recipe.budget, where=str(out / RESULTS_FILE), budget_source="recipe budget")
    print("\n" + format_table(verdict), file=sys.stderr if args.json else sys.stdout)
    _print_cautions(results["cautions"])
    return verdict.exit_code


def _print_cautions(lines: list[str]) -> None:
    """After the table, on stderr: what the averages hide, one line each."""
    sys.stdout.flush()
    for line in lines:
        print(f"caution: {line}", file=sys.stderr)
    sys.stderr.flush()


def cmd_search(args) -> int:
    from shrinkwrap.extras import require_train

    require_train("shrinkwrap search")
    from shrinkwrap.search import SEARCH_FILE, run_search
    from shrinkwrap.search_space import load_search

    space = load_search(args.recipe, args.set)  # every candidate checked before anything runs
    out = Path(args.out) if args.out else Path("runs") / f"{space.recipe.name}-search"
    summary, code, line = run_search(space, out, quiet=args.json)
    if not summary:  # a helper process of a distributed search: the main process reports
        return code
    if args.json:
        print(json.dumps(summary, indent=2))
    else:
        print(f"search: {out / SEARCH_FILE}\nreport: {out / 'report.html'}")
    print(line, file=sys.stderr if args.json else sys.stdout)
    if summary["winner"] is not None:
        _print_cautions(summary["candidates"][summary["winner"]]["cautions"])
    return code


def cmd_gate(args) -> int:
    from shrinkwrap.gate import format_table, gate_results, junit_xml
    from shrinkwrap.rundir import check_out_file, write_text_atomic

    if args.junit:
        check_out_file(Path(args.junit), "--junit")
    verdict = gate_results(Path(args.results), args.budget and Path(args.budget), args.step,
                           args.baseline and Path(args.baseline), args.tolerance)
    if args.junit:
        write_text_atomic(Path(args.junit), junit_xml(verdict))
    print(json.dumps(verdict.as_dict(), indent=2) if args.json else format_table(verdict))
    _print_cautions(verdict.cautions)
    return verdict.exit_code


def cmd_report(args) -> int:
    from shrinkwrap.report import report_from_file

    for path in report_from_file(Path(args.results), args.out and Path(args.out)):
        print(f"report: {path}")
    return EXIT_OK


def cmd_bench(args) -> int:
    from shrinkwrap.bench.grid import bench_text, grid
    from shrinkwrap.bench.machine import describe
    from shrinkwrap.bench.measure import bench_target
    from shrinkwrap.bench.testset import inputs_for, read_table
    from shrinkwrap.recipe import BenchConfig
    from shrinkwrap.rundir import check_out_file, write_json_atomic

    if args.out:  # checked first, so that a bad path fails before minutes of measuring
        check_out_file(Path(args.out))
    if args.trusted_key:
        from shrinkwrap.artifact import is_artifact
        from shrinkwrap.signing import check_signature

        if not is_artifact(args.target):
            raise UserError(f"--trusted-key: {args.target} is not an artifact folder — only artifacts carry signatures")
        check_signature(Path(args.target), Path(args.trusted_key))
    if args.data:  # reading a table and the model's tokenizer is the training side's code
        from shrinkwrap.extras import require_train

        require_train("bench --data")
    if "real" in args.sequence_length and not args.data:
        raise UserError("--sequence-length real needs --data: real lengths come from real texts")
    table = read_table(Path(args.data), args.text, args.label, args.text_pair) if args.data else None
    cfg = BenchConfig(threads=args.threads, warmup=args.warmup, warm_seconds=args.warm_seconds, repeats=args.repeats,
                      timed_seconds=args.timed_seconds, eval_batch_size=args.eval_batch_size)
    log = (lambda m: None) if args.json else (lambda m: print(f"[bench] {m}", file=sys.stderr, flush=True))
    result = bench_target(args.target, cfg, grid(args.batch_size, args.sequence_length),
                          inputs_for(table, args.max_length), log)
    result.pop("predictions", None)
    result["machine"] = describe()
    if args.out:
        write_json_atomic(Path(args.out), result)
    print(json.dumps(result, indent=2) if args.json else bench_text(result))
    return EXIT_OK


def cmd_predict(args) -> int:
    # Only torch-free modules on this path: an artifact must run in a slim image (tests/test_predict.py).
    from shrinkwrap.artifact import DEFAULT_BATCH_SIZE
    from shrinkwrap.predict import run_predict

    return run_predict(args.artifact, args.texts, args.file, args.batch_size or DEFAULT_BATCH_SIZE, args.threads,
                       trusted_key=args.trusted_key and Path(args.trusted_key),
                       min_confidence=args.min_confidence, text_col=args.text, pair_col=args.text_pair)


def cmd_package(args) -> int:
    from shrinkwrap.extras import require_train

    require_train("shrinkwrap package")
    from shrinkwrap.package import from_folder
    from shrinkwrap.rundir import MANIFEST_FILE, read_json

    key = _signing_key(args)
    log = (lambda m: None) if args.json else (lambda m: print(f"[package] {m}", file=sys.stderr, flush=True))
    out = from_folder(Path(args.model_dir), Path(args.out), data=args.data and Path(args.data), text=args.text,
                      label=args.label, max_length=args.max_length, int8=args.int8, per_channel=args.per_channel,
                      opset=args.opset, threads=args.threads, log=log)
    if key:
        from shrinkwrap.signing import sign_artifact

        sign_artifact(out, key)
    manifest = read_json(out / MANIFEST_FILE, "artifact manifest")
    caution = (manifest.get("data") or {}).get("caution")
    if args.json:
        print(json.dumps(manifest, indent=2))
    else:
        m = manifest.get("metrics")
        print(f"artifact: {out}" + (f"  (accuracy {m['accuracy']:.4f}, macro-F1 {m['macro_f1']:.4f} on "
                                    f"{m['texts']} texts)" if m else ""))
    if caution:
        _print_cautions([caution])
    return EXIT_OK


def _signing_key(args) -> Path | None:
    """--signing-key, loaded once before any work so that a bad key fails before minutes of it."""
    if not args.signing_key:
        return None
    from shrinkwrap.signing import load_private_key

    load_private_key(Path(args.signing_key))
    return Path(args.signing_key)


def _count(text: str) -> int:
    if not text.isdigit():
        raise argparse.ArgumentTypeError(f"{text!r} — a whole number, 0 or more")
    return int(text)


def _positive_int(text: str) -> int:
    if not text.isdigit() or int(text) < 1:
        raise argparse.ArgumentTypeError(f"{text!r} — a whole number, 1 or more")
    return int(text)


def _at_least(low: int, high: int | None = None):
    """A whole number in [low, high]: for counts whose floor is not 0 or 1 (timed runs, opsets)."""
    def parse(text: str) -> int:
        if not text.isdigit() or int(text) < low or (high is not None and int(text) > high):
            allowed = f"from {low} to {high}" if high is not None else f"{low} or more"
            raise argparse.ArgumentTypeError(f"{text!r} — a whole number, {allowed}")
        return int(text)
    return parse


def _seconds(text: str) -> float:
    """A finite number of seconds, 0 or more (float() alone takes 'nan', 'inf' and '-1')."""
    try:
        value = float(text)
    except ValueError:
        value = math.nan
    if not math.isfinite(value) or value < 0:
        raise argparse.ArgumentTypeError(f"{text!r} — a finite number of seconds, 0 or more")
    return value


# Options renamed since they first shipped: the old name is refused with the new one.
RENAMED_OPTIONS = {"--warmup-time": "--warm-seconds", "--min-time": "--timed-seconds"}


class _Renamed(argparse.Action):
    def __init__(self, option_strings, dest, new: str, **kwargs):
        self.new = new
        super().__init__(option_strings, dest, nargs="?", **kwargs)

    def __call__(self, parser, namespace, values, option_string=None):
        parser.error(f"{option_string} is now {self.new}")


class _Parser(argparse.ArgumentParser):
    """Bad options end like any other bad input: exit 2 and one line naming the command and the option."""

    def error(self, message: str):
        self.exit(2, f"error: {self.prog}: {message} (see {self.prog} --help)\n")


def _probability(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} — a number from 0 to 1") from None
    if not 0.0 <= value <= 1.0:  # also refuses nan
        raise argparse.ArgumentTypeError(f"{text!r} — a number from 0 to 1")
    return value


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(prog="shrinkwrap", description="Shrink a fine-tuned BERT-family text classifier for CPU "
                                "serving, measuring what every step costs and buys. Exit codes: 0 ok, 1 a budget "
                                "failed, 2 bad input, 3 a step failed or an internal error.")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    run = sub.add_parser("run", help="run a recipe end to end: teacher -> student -> int8 -> ONNX -> ONNX int8",
                         description="Run every step of RECIPE, benchmark each, write results.json and report.md.")
    run.add_argument("recipe", help="recipe YAML file")
    run.add_argument("--out", help="run folder (default: runs/<recipe name>)")
    run.add_argument("--set", action="append", default=[], metavar="KEY.PATH=VALUE",
                     help="override a recipe key, e.g. --set teacher.epochs=1 (repeatable)")
    run.add_argument("--json", action="store_true", help="print results.json to stdout instead of the table")
    run.add_argument("--until", metavar="STEP",
                     help="stop after this step, e.g. --until student (finished later steps are kept on disk)")
    run.add_argument("--signing-key", metavar="PRIVATE.pem", help="Ed25519 private key (PEM) to sign the artifact's manifest with (manifest.sig); an encrypted key "
                     "takes its passphrase from $SHRINKWRAP_SIGNING_PASSPHRASE")
    run.set_defaults(func=cmd_run)

    search = sub.add_parser("search", help="find the most accurate student that meets the recipe's budget",
                            description="Try every combination of the values in RECIPE's search: section (recipe "
                                        "key paths -> lists of values). Candidates that cannot meet the latency or "
                                        "size limits untrained are never trained; the rest are trained cheapest "
                                        "first and timed again with the teacher; the most accurate one meeting "
                                        "every limit gets DIR/artifact. Writes DIR/search.json and DIR/report.html. "
                                        "Exit 0: a winner; 1: no candidate meets the budget; 2: bad input.")
    search.add_argument("recipe", help="recipe YAML file with a search: section")
    search.add_argument("--out", metavar="DIR", help="search folder (default: runs/<recipe name>-search)")
    search.add_argument("--set", action="append", default=[], metavar="KEY.PATH=VALUE",
                        help="override a recipe key, e.g. --set budget.min_speedup=4 or "
                             "--set search.student.num_layers=[2,3] (repeatable)")
    search.add_argument("--json", action="store_true", help="print search.json to stdout instead of a summary")
    search.set_defaults(func=cmd_search)

    gate = sub.add_parser("gate", help="check a run's results against a budget: exit 0 pass, 1 a limit failed, 2 bad input",
                          description="Check one step of RESULTS (the final one by default) against the limits of a "
                                      "budget; print a verdict per limit. Exit 0: every limit met; 1: a limit "
                                      "failed; 2: bad input (budget, results, options).")
    gate.add_argument("results", help="results.json of a run")
    gate.add_argument("--budget", metavar="FILE",
                      help="budget YAML (keys of a recipe's budget: section; default: the budget of the recipe in RESULTS)")
    gate.add_argument("--step", metavar="NAME", help="step to check (default: the final step in RESULTS)")
    gate.add_argument("--baseline", metavar="OLD_RESULTS",
                      help="an earlier results.json: also check that the same step has not regressed beyond the tolerances")
    gate.add_argument("--tolerance", action="append", default=[], metavar="NAME=VALUE",
                      help="regression tolerance with --baseline: p95_percent=10, accuracy_points=0.5, size_percent=5 "
                           "(repeatable; overrides the budget's regression: section)")
    gate.add_argument("--junit", metavar="OUT.xml", help="also write the verdicts as JUnit XML (one testcase per limit)")
    gate.add_argument("--json", action="store_true", help="print the verdicts as JSON instead of the table")
    gate.set_defaults(func=cmd_gate)

    report = sub.add_parser("report", help="write report.md and report.html again from a results.json",
                            description="Render report.md and a self-contained report.html (tables, plots) from RESULTS.")
    report.add_argument("results", help="results.json of a run")
    report.add_argument("--out", metavar="DIR", help="folder for the reports (default: beside RESULTS)")
    report.set_defaults(func=cmd_report)

    from shrinkwrap.bench.grid import parse_length
    from shrinkwrap.recipe import BenchConfig

    default = {k: f.default for k, f in BenchConfig.model_fields.items()}
    # The schema's own floor (percentiles need a few runs), so that the option and the recipe key agree.
    repeats_min = next(m.ge for m in BenchConfig.model_fields["repeats"].metadata if hasattr(m, "ge"))
    bench = sub.add_parser("bench", help="measure latency, size and memory (and accuracy with --data) of any model",
                           description="Benchmark TARGET: a transformers classification folder, a folder with "
                                       "model.onnx, a bare .onnx file (an encoder without a head is fine: latency "
                                       "and size from synthetic token ids), or a shrinkwrap artifact.")
    bench.add_argument("target", help="model folder, .onnx file or artifact folder")
    bench.add_argument("--data", metavar="FILE", help="labelled table (.csv, .jsonl, .parquet; or a datasets folder's "
                       "test split): every row is a test text; adds accuracy and real-text lengths")
    bench.add_argument("--text", default="text", help="text column of --data (default: text)")
    bench.add_argument("--text-pair", metavar="COLUMN", help="second text column of --data, for pair inputs")
    bench.add_argument("--label", default="label", help="label column of --data, holding the model's label names "
                       "(default: label)")
    bench.add_argument("--max-length", type=_positive_int, metavar="N",
                       help="cut --data texts at N tokens (default: the most the model takes, else 512)")
    bench.add_argument("--batch-size", type=_positive_int, nargs="+", default=[default["batch_size"]], metavar="N",
                       help=f"batch sizes to time (default: {default['batch_size']})")
    bench.add_argument("--sequence-length", type=parse_length, nargs="+", default=[default["sequence_length"]],
                       metavar="L", help=f"tokens per text to time; `real` = texts of --data padded to their batch's "
                       f"longest (default: {default['sequence_length']})")
    bench.add_argument("--threads", type=_positive_int, default=default["threads"],
                       help=f"intra-op threads of the model and of the reference workload (default: {default['threads']})")
    bench.add_argument("--warmup", type=_count, default=default["warmup"], metavar="N",
                       help=f"untimed runs before each row (default: {default['warmup']})")
    bench.add_argument("--warm-seconds", type=_seconds, default=default["warm_seconds"], metavar="SECONDS",
                       help=f"and keep warming up at least this long (default: {default['warm_seconds']})")
    bench.add_argument("--repeats", type=_at_least(repeats_min), default=default["repeats"], metavar="N",
                       help=f"timed runs per row, at least (default: {default['repeats']})")
    bench.add_argument("--timed-seconds", type=_seconds, default=default["timed_seconds"], metavar="SECONDS",
                       help=f"keep timing each row at least this long (default: {default['timed_seconds']})")
    for old, new in RENAMED_OPTIONS.items():
        bench.add_argument(old, action=_Renamed, new=new, help=argparse.SUPPRESS)
    bench.add_argument("--eval-batch-size", type=_positive_int, default=default["eval_batch_size"], metavar="N",
                       help=f"batch size of the accuracy pass (default: {default['eval_batch_size']})")
    bench.add_argument("--json", action="store_true", help="print the figures as JSON instead of the table")
    bench.add_argument("--out", metavar="FILE.json", help="also write the figures as JSON to this file")
    bench.add_argument("--trusted-key", metavar="PUBLIC.pem", help="Ed25519 public key (PEM): refuse the artifact unless manifest.sig is its valid signature of "
                     "manifest.json (exit 2)")
    bench.set_defaults(func=cmd_bench)

    predict = sub.add_parser("predict", help="classify texts with an artifact (needs only onnxruntime, tokenizers, numpy)",
                             description="Print one JSON line {\"text\", \"label\", \"scores\"} per text. Every "
                                         "file of ARTIFACT is checked against its manifest.json first; a modified or "
                                         "incomplete artifact is refused (exit 2).")
    predict.add_argument("artifact", metavar="ARTIFACT", help="artifact folder (run_dir/artifact, or one written by `shrinkwrap package`)")
    predict.add_argument("texts", nargs="*", metavar="TEXT",
                         help="texts to classify (none: one per line from --file or stdin)")
    predict.add_argument("--file", metavar="FILE", help="UTF-8 file: one text per line; .jsonl/.ndjson: JSON lines "
                         "{\"text\": ..., \"text_pair\": ...}; .csv/.tsv: a table with a header (columns --text, --text-pair)")
    predict.add_argument("--text", default="text", metavar="NAME",
                         help="key (JSON lines) or column (CSV/TSV) holding the text (default: text)")
    predict.add_argument("--text-pair", metavar="NAME",
                         help="key or column holding the second text, for a model that classifies pairs "
                              "(default: text_pair)")
    predict.add_argument("--batch-size", type=_positive_int, metavar="N",
                         help="texts per model call; texts are grouped by length (default: 32, as in the chain's "
                              "accuracy pass, which gives exactly its predictions)")
    predict.add_argument("--threads", type=_count, default=0, metavar="N",
                         help="ONNX Runtime intra-op threads (default: 0 = its own choice)")
    predict.add_argument("--trusted-key", metavar="PUBLIC.pem", help="Ed25519 public key (PEM): refuse the artifact unless manifest.sig is its valid signature of "
                     "manifest.json (exit 2)")
    predict.add_argument("--min-confidence", type=_probability, default=0.0, metavar="P",
                         help="abstain below this calibrated top score: such a text gets \"label\": null, its scores "
                              "still printed (default: 0, always answer; the report plots accuracy against coverage)")
    predict.set_defaults(func=cmd_predict)

    from shrinkwrap.recipe import ExportConfig

    opset_min, opset_max = (next(getattr(m, k) for m in ExportConfig.model_fields["opset"].metadata if hasattr(m, k))
                            for k in ("ge", "le"))
    package = sub.add_parser("package", help="build an artifact from a transformers classification folder",
                             description="Build an artifact folder (model.onnx, tokenizer, labels, manifest.json with "
                                         "hashes, model card README.md) from MODEL_DIR: a transformers classification "
                                         "folder (exported to ONNX, parity-checked against PyTorch, int8 by default) "
                                         "or a folder that already holds model.onnx (packaged as it is).")
    package.add_argument("model_dir", metavar="MODEL_DIR", help="transformers classification folder (safetensors) or a folder with model.onnx")
    package.add_argument("--out", required=True, metavar="DIR", help="artifact folder to write (replaced only if it "
                         "is an artifact or empty)")
    package.add_argument("--data", metavar="FILE", help="labelled table (.csv, .jsonl, .parquet): accuracy on all its "
                         "rows is measured through the artifact and recorded in manifest.json and the model card")
    package.add_argument("--text", default="text", help="text column of --data (default: text)")
    package.add_argument("--label", default="label", help="label column of --data, holding the model's label names "
                         "(default: label)")
    package.add_argument("--max-length", type=_positive_int, metavar="N",
                         help="tokens per text after truncation (default: the model's position count, at most 512)")
    package.add_argument("--int8", action=argparse.BooleanOptionalAction, default=True,
                         help="quantise the exported graph to int8 with ONNX Runtime, embeddings included "
                              "(default: on; a folder with model.onnx is packaged as it is)")
    package.add_argument("--per-channel", action=argparse.BooleanOptionalAction, default=True,
                         help="int8 weights with one scale per output column rather than per tensor (default: on; "
                              "--no-per-channel for one scale per tensor)")
    package.add_argument("--opset", type=_at_least(opset_min, opset_max), metavar="N", help="ONNX opset of the export (default: a recipe's "
                         "export.opset default)")
    package.add_argument("--threads", type=_positive_int, default=2, metavar="N",
                         help="ONNX Runtime threads for the parity check and the accuracy pass (default: 2)")
    package.add_argument("--json", action="store_true", help="print manifest.json instead of a summary line")
    package.add_argument("--signing-key", metavar="PRIVATE.pem", help="Ed25519 private key (PEM) to sign the artifact's manifest with (manifest.sig); an encrypted key "
                     "takes its passphrase from $SHRINKWRAP_SIGNING_PASSPHRASE")
    package.set_defaults(func=cmd_package)
    return p


def main(argv: list[str] | None = None) -> int:
    os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
    try:
        args = build_parser().parse_args(argv)
    except SystemExit as e:  # a bad option (exit 2, one line) or --help (0): returned like every other outcome
        return e.code if isinstance(e.code, int) else EXIT_INTERNAL
    try:
        return args.func(args)
    except UserError as e:
        print(f"error: {e}", file=sys.stderr)
        return e.exit_code
    except StepFailed as e:
        print(f"step failed: {e}", file=sys.stderr)
        return e.exit_code
    except KeyboardInterrupt:
        print("interrupted: finished steps are kept; run the same command again to resume", file=sys.stderr)
        return 130
    except Exception:  # a bug: say so, with the traceback a maintainer needs
        traceback.print_exc()
        print("internal error: please report it with the traceback above", file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":
    raise SystemExit(main())
