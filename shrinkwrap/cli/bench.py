"""`shrinkwrap bench TARGET`: latency, size and memory of any model (accuracy too with --data)."""
from __future__ import annotations

import argparse
import json
from pathlib import Path

from shrinkwrap.cli.options import (RENAMED_OPTIONS, Renamed, add_trusted_key, at_least, count, field_bounds, finite,
                                    logger, positive_int, seconds)
from shrinkwrap.cli.serve import add_server_options, milliseconds
from shrinkwrap.serve.errors import EXIT_OK, UserError


def add(sub) -> None:
    from shrinkwrap.bench.grid import parse_length
    from shrinkwrap.recipe.schema import BenchConfig

    default = {k: f.default for k, f in BenchConfig.model_fields.items()}
    # The schema's own floor (percentiles need a few runs), so that the option and the recipe key agree.
    (repeats_min,) = field_bounds(BenchConfig, "repeats", "ge")
    p = sub.add_parser("bench", help="measure latency, size and memory (and accuracy with --data) of any model",
                       description="Benchmark TARGET: a transformers classification folder, a folder with "
                                   "model.onnx, a bare .onnx file (an encoder without a head is fine: latency "
                                   "and size from synthetic token ids), or a shrinkwrap artifact.")
    p.add_argument("target", help="model folder, .onnx file or artifact folder")
    p.add_argument("--data", metavar="FILE", help="labelled table (.csv, .jsonl, .parquet; or a datasets folder's "
                   "test split): every row is a test text; adds accuracy and real-text lengths")
    p.add_argument("--text", default="text", help="text column of --data (default: text)")
    p.add_argument("--text-pair", metavar="COLUMN", help="second text column of --data, for pair inputs")
    p.add_argument("--label", default="label", help="label column of --data, holding the model's label names "
                   "(default: label; optional for a sentence encoder, whose kNN accuracy it enables)")
    p.add_argument("--reference", metavar="MODEL",
                   help="a sentence encoder (e.g. the teacher) whose vectors of the --data texts the target's are "
                        "compared with: cosine, neighbour and cross recall at 10")
    p.add_argument("--max-length", type=positive_int, metavar="N",
                   help="cut --data texts at N tokens (default: the most the model takes, else 512)")
    p.add_argument("--batch-size", type=positive_int, nargs="+", default=[default["batch_size"]], metavar="N",
                   help=f"batch sizes to time (default: {default['batch_size']})")
    p.add_argument("--sequence-length", type=parse_length, nargs="+", default=[default["sequence_length"]],
                   metavar="L", help=f"tokens per text to time; `real` = texts of --data padded to their batch's "
                   f"longest (default: {default['sequence_length']})")
    p.add_argument("--threads", type=positive_int,
                   help=f"intra-op threads of the model and of the reference workload (default: {default['threads']}; "
                        f"with --load, of each server worker, as serve's)")
    p.add_argument("--warmup", type=count, default=default["warmup"], metavar="N",
                   help=f"untimed runs before each row (default: {default['warmup']})")
    p.add_argument("--warm-seconds", type=seconds, default=default["warm_seconds"], metavar="SECONDS",
                   help=f"and keep warming up at least this long (default: {default['warm_seconds']})")
    p.add_argument("--repeats", type=at_least(repeats_min), default=default["repeats"], metavar="N",
                   help=f"timed runs per row, at least (default: {default['repeats']})")
    p.add_argument("--timed-seconds", type=seconds, default=default["timed_seconds"], metavar="SECONDS",
                   help=f"keep timing each row at least this long (default: {default['timed_seconds']})")
    for old, new in RENAMED_OPTIONS.items():
        p.add_argument(old, action=Renamed, new=new, help=argparse.SUPPRESS)
    p.add_argument("--eval-batch-size", type=positive_int, default=default["eval_batch_size"], metavar="N",
                   help=f"batch size of the accuracy pass (default: {default['eval_batch_size']})")
    p.add_argument("--json", action="store_true", help="print the figures as JSON instead of the table")
    p.add_argument("--out", metavar="FILE.json", help="also write the figures as JSON to this file")
    add_trusted_key(p)
    load = p.add_argument_group("serving under load (--load; TARGET must be an artifact)")
    load.add_argument("--load", type=rate, nargs="*", metavar="RATE",
                      help="serve TARGET with `shrinkwrap serve` on a loopback port and send it one-text requests at "
                           "these rates (requests per second, Poisson arrivals, open loop); without rates, step the "
                           "rate up until p95 passes --max-p95-ms and report capacity_rps. --data gives the texts "
                           "(else words of the artifact's vocabulary, --sequence-length tokens)")
    load.add_argument("--load-seconds", type=seconds, default=10.0, metavar="SECONDS",
                      help="how long each rate is sent (default: 10)")
    load.add_argument("--max-p95-ms", type=milliseconds, default=50.0, metavar="MS",
                      help="the p95 latency, as the client sees it, that capacity_rps is measured at (default: 50)")
    load.add_argument("--load-minutes", type=seconds, default=5.0, metavar="MINUTES",
                      help="time limit of the stepped search for capacity_rps (default: 5)")
    add_server_options(load, "server worker processes (default: the machine's cores divided by --threads)")
    p.set_defaults(func=main)


rate = finite("requests per second, above 0", above_zero=True)


def main(args) -> int:
    if args.load is not None:
        return main_load(args)
    from shrinkwrap.bench.grid import bench_text, grid
    from shrinkwrap.bench.machine import describe
    from shrinkwrap.bench.measure import bench_target
    from shrinkwrap.bench.testset import inputs_for, read_table
    from shrinkwrap.recipe.schema import BenchConfig
    from shrinkwrap.serve.rundir import check_out_file, write_json_atomic

    if args.out:  # checked first, so that a bad path fails before minutes of measuring
        check_out_file(Path(args.out))
    if args.trusted_key:
        from shrinkwrap.serve.artifact import is_artifact
        from shrinkwrap.serve.signing import check_signature

        if not is_artifact(args.target):
            raise UserError(f"--trusted-key: {args.target} is not an artifact folder — only artifacts carry signatures")
        check_signature(Path(args.target), Path(args.trusted_key))
    if args.data:  # reading a table and the model's tokenizer is the training side's code
        from shrinkwrap.serve.extras import require_train

        require_train("bench --data")
    if "real" in args.sequence_length and not args.data:
        raise UserError("--sequence-length real needs --data: real lengths come from real texts")
    if args.reference and not args.data:
        raise UserError("--reference needs --data: the two encoders are compared on its texts")
    table = read_table(Path(args.data), args.text, args.label, args.text_pair, label_optional=True) if args.data else None
    reference = None
    threads = args.threads or BenchConfig().threads
    if args.reference:
        from shrinkwrap.bench.testset import reference_vectors

        reference = reference_vectors(Path(args.reference), table, args.max_length, threads)
    cfg = BenchConfig(threads=threads, warmup=args.warmup,
                      warm_seconds=args.warm_seconds, repeats=args.repeats,
                      timed_seconds=args.timed_seconds, eval_batch_size=args.eval_batch_size)
    result = bench_target(args.target, cfg, grid(args.batch_size, args.sequence_length),
                          inputs_for(table, args.max_length, reference), logger("bench", args.json))
    result.pop("predictions", None)
    result["machine"] = describe()
    if result.get("batch_dependent"):
        import sys

        from shrinkwrap.serve.quantization import batch_note

        print(batch_note(args.target, result["batch_dependent"]), file=sys.stderr, flush=True)
    if args.out:
        write_json_atomic(Path(args.out), result)
    print(json.dumps(result, indent=2) if args.json else bench_text(result))
    return EXIT_OK


def main_load(args) -> int:
    """bench --load: the served artifact's latency at each rate, and capacity_rps."""
    from shrinkwrap.bench.capacity import load_table, measure_load, request_texts
    from shrinkwrap.bench.grid import REAL
    from shrinkwrap.bench.machine import describe
    from shrinkwrap.serve.artifact import is_artifact
    from shrinkwrap.serve.rundir import check_out_file, write_json_atomic

    if not is_artifact(args.target):
        raise UserError(f"--load: {args.target} is not an artifact folder — the server serves artifacts")
    if args.out:
        check_out_file(Path(args.out))
    if args.trusted_key:
        from shrinkwrap.serve.signing import check_signature

        check_signature(Path(args.target), Path(args.trusted_key))
    length = next((n for n in args.sequence_length if n != REAL), 128)
    rows, about = request_texts(args.target, args.data, args.text, args.text_pair, length)
    options = [f"--max-batch={args.max_batch}", f"--max-wait-ms={args.max_wait_ms}", f"--max-queue={args.max_queue}",
               f"--max-body-mb={args.max_body_mb}"]
    options += [f"--threads={args.threads}"] if args.threads else []
    options += [f"--workers={args.workers}"] if args.workers else []
    options += [f"--trusted-key={args.trusted_key}"] if args.trusted_key else []
    load = measure_load(args.target, options, rows, args.load, args.load_seconds, args.max_p95_ms,
                        args.load_minutes * 60, logger("bench", args.json))
    load["texts"] = about
    result = {"path": str(args.target), "load": load, "capacity_rps": load["capacity_rps"], "machine": describe()}
    if args.out:
        write_json_atomic(Path(args.out), result)
    print(json.dumps(result, indent=2) if args.json else load_table(load))
    return EXIT_OK
