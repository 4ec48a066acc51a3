"""`shrinkwrap serve ARTIFACT`: the artifact behind an HTTP endpoint, with the plain install and uvicorn."""
from __future__ import annotations

import argparse

from shrinkwrap.cli.options import add_min_confidence, add_trusted_key, finite, positive_int
from shrinkwrap.serve.errors import UserError

# Defaults under which 16 concurrent clients of one text each never see a 503 (tests/test_serve.py: they cannot
# have more than 16 texts waiting). The queue is kept short, a fraction of a second of work on a small model, so
# that a service pushed past its capacity refuses at once (503) and is answering in time again within a second of
# the load dropping, rather than working off seconds of backlog (benchmarks/serving.py).
MAX_BATCH, MAX_WAIT_MS, MAX_QUEUE, MAX_BODY_MB = 16, 5.0, 64, 1.0


milliseconds = finite("a finite number of milliseconds, 0 or more")
megabytes = finite("a number of megabytes above 0", above_zero=True)


def port(text: str) -> int:
    if not text.isdigit() or int(text) > 65535:
        raise argparse.ArgumentTypeError(f"{text!r} — a port number from 0 (any free one) to 65535")
    return int(text)


def add_server_options(p, workers_help: str) -> None:
    """The options that shape the service (but --threads, which bench has already): serve's, and bench --load's
    for the server it starts."""
    p.add_argument("--workers", type=positive_int, metavar="N", help=workers_help)
    p.add_argument("--max-batch", type=positive_int, default=MAX_BATCH, metavar="N",
                   help=f"most texts in one model call, and in one request (default: {MAX_BATCH}; 1: no batching)")
    p.add_argument("--max-wait-ms", type=milliseconds, default=MAX_WAIT_MS, metavar="MS",
                   help=f"how long the oldest waiting text waits for others to fill its batch (default: {MAX_WAIT_MS:g})")
    p.add_argument("--max-queue", type=positive_int, default=MAX_QUEUE, metavar="N",
                   help=f"texts a worker holds waiting; more are refused with 503 and Retry-After (default: {MAX_QUEUE})")
    p.add_argument("--max-body-mb", type=megabytes, default=MAX_BODY_MB, metavar="MB",
                   help=f"largest request body; a larger one is refused with 413 (default: {MAX_BODY_MB:g})")


def add(sub) -> None:
    p = sub.add_parser("serve", help="serve an artifact over HTTP: POST /predict, GET /health, GET /metrics",
                       description="Serve ARTIFACT over HTTP (uvicorn). POST /predict {\"texts\": [...]} (with "
                                   "\"text_pairs\" for a pair model) answers {\"predictions\": [...]}, each row as "
                                   "`shrinkwrap predict` prints it; GET /health is 200 once the model is loaded; "
                                   "GET /metrics is the Prometheus text format. The artifact is verified before "
                                   "anything listens (exit 2 otherwise); SIGTERM stops accepting, answers what "
                                   "was accepted and exits 0.")
    p.add_argument("artifact", metavar="ARTIFACT", help="artifact folder (run_dir/artifact, or one written by "
                   "`shrinkwrap package`)")
    p.add_argument("--host", default="127.0.0.1", help="address to listen on (default: 127.0.0.1, this machine "
                   "only; 0.0.0.0 for every interface)")
    p.add_argument("--port", type=port, default=8000, help="port to listen on (default: 8000; 0: any free port, "
                   "printed at start)")
    p.add_argument("--threads", type=positive_int, metavar="N",
                   help="ONNX Runtime intra-op threads of each worker (default: 2)")
    add_server_options(p, "worker processes behind the one port, each with its own model session (default: the "
                          "machine's cores divided by --threads, printed at start)")
    add_trusted_key(p)
    add_min_confidence(p, "given (default: 0, always answer)")
    p.set_defaults(func=main)


def settings_of(args, artifact: str):
    """The workers' settings from the options (serve's, or bench --load's)."""
    from shrinkwrap.serve.app import Settings
    from shrinkwrap.serve.service import DEFAULT_THREADS

    return Settings(artifact=artifact, threads=args.threads or DEFAULT_THREADS, max_batch=args.max_batch,
                    max_wait_ms=args.max_wait_ms, max_queue=args.max_queue,
                    max_body_bytes=int(args.max_body_mb * 1_000_000), min_confidence=getattr(args, "min_confidence", 0.0),
                    metrics_dir="", trusted_key=args.trusted_key)


def main(args) -> int:
    from shrinkwrap.serve.service import default_workers, serve

    if args.max_queue < args.max_batch:
        raise UserError(f"--max-queue {args.max_queue} is below --max-batch {args.max_batch}: a full batch could "
                        f"never wait")
    settings = settings_of(args, args.artifact)
    return serve(settings, args.host, args.port, args.workers or default_workers(settings.threads))
