"""`shrinkwrap serve`: the artifact behind one port, in worker processes that each run the HTTP service
(shrinkwrap.serve.app) under uvicorn, an ASGI server: uvicorn parses HTTP (h11), this package never does.

This process checks the artifact (hashes; signature with a trusted key) and binds the port before anything
listens, then starts `workers` processes (spawned: each has its own ONNX Runtime session of `threads` threads)
that all accept on the one socket, restarts a worker that dies, and logs one line a minute. On SIGTERM it stops
accepting (its copy of the socket is closed, and each worker closes its own), lets every worker answer what it
has accepted, and returns 0 once they have exited.
"""
from __future__ import annotations

import json
import multiprocessing
import os
import shutil
import signal
import socket
import sys
import tempfile
import threading
import time
from dataclasses import asdict, replace
from pathlib import Path
from typing import Callable

from shrinkwrap.serve import tasks
from shrinkwrap.serve.app import SETTINGS_ENV, Settings
from shrinkwrap.serve.errors import EXIT_OK, UserError
from shrinkwrap.serve.metrics import summary

LOG_EVERY_S = 60.0
GRACE_S = 30.0          # the longest a worker may take to answer what it has accepted after SIGTERM
STARTUP_S = 10.0        # a worker that exits sooner after its start is not restarted: the service stops
KEEP_ALIVE_S = 30.0     # an idle kept-alive connection is closed after this (uvicorn's 5 s races busy clients more)
# Two intra-op threads a worker (a 16-core machine: 8 workers): on 2 cores, 1 worker × 2 threads held more than
# 2 workers × 1 thread (benchmarks/serving.py), which also leaves the HTTP work of fewer processes to share them.
DEFAULT_THREADS = 2


def available_cores() -> int:
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)


def default_workers(threads: int) -> int:
    """As many workers as the machine has cores for, `threads` each."""
    return max(1, available_cores() // threads)


def bind(host: str, port: int) -> socket.socket:
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    sock = socket.socket(family, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    try:
        sock.bind((host, port))
    except OSError as e:
        sock.close()
        raise UserError(f"--host {host} --port {port}: cannot listen there — {e.strerror or e}") from None
    sock.listen(2048)
    sock.set_inheritable(True)
    return sock


def _worker(config, sock: socket.socket) -> None:
    """A worker process: uvicorn's server on the shared socket (its settings came in the environment)."""
    import uvicorn

    config.configure_logging()
    uvicorn.Server(config).run(sockets=[sock])


def _log_minutes(folder: str, stop: threading.Event, log: Callable[[str], None]) -> None:
    before = summary(folder)
    while not stop.wait(LOG_EVERY_S):
        now = summary(folder)
        d = {k: now[k] - before[k] for k in now}
        if d["requests"]:
            mean = d["texts"] / d["batches"] if d["batches"] else 0.0
            log(f"serve: last {LOG_EVERY_S:.0f} s: {d['requests']:.0f} requests ({d['ok']:.0f} answered, "
                f"{d['client_errors']:.0f} refused 4xx, {d['rejected_503']:.0f} queue full 503, "
                f"{d['server_errors']:.0f} errors), {d['texts']:.0f} texts in {d['batches']:.0f} batches "
                f"(mean {mean:.1f}), {now['queue']:.0f} waiting")
        before = now


def serve(settings: Settings, host: str, port: int, workers: int,
          log: Callable[[str], None] = lambda m: print(m, file=sys.stderr, flush=True)) -> int:
    """Runs until SIGTERM or SIGINT (the exit code then 0, or 130 for SIGINT). The artifact is checked here first:
    a UserError before anything listens."""
    import uvicorn

    from shrinkwrap.serve.artifact import load
    from shrinkwrap.serve.quantization import batch_note

    if settings.trusted_key:
        from shrinkwrap.serve.signing import check_signature

        check_signature(Path(settings.artifact), Path(settings.trusted_key))
    model = load(settings.artifact, 1)   # hashes, then a session: a graph ONNX Runtime refuses fails here
    dependent = model.batch_dependent
    tasks.check_min_confidence(model.manifest, settings.min_confidence, settings.artifact)
    del model
    sock = bind(host, port)
    settings = replace(settings, metrics_dir=tempfile.mkdtemp(prefix="shrinkwrap-serve-"))
    os.environ[SETTINGS_ENV] = json.dumps(asdict(settings))
    config = uvicorn.Config("shrinkwrap.serve.app:from_environment", factory=True, lifespan="on", http="h11",
                            loop="asyncio", log_level="warning", access_log=False, timeout_graceful_shutdown=GRACE_S,
                            timeout_keep_alive=KEEP_ALIVE_S)
    bound = sock.getsockname()[1]
    log(f"serve: {settings.artifact} on http://{host}:{bound} — {workers} worker(s) × {settings.threads} thread(s), "
        f"batches of up to {settings.max_batch} texts within {settings.max_wait_ms:g} ms, a queue of "
        f"{settings.max_queue} texts per worker, bodies up to {settings.max_body_bytes / 1e6:g} MB; SIGTERM drains "
        f"and exits")
    if dependent:
        log(batch_note(settings.artifact, list(dependent)))

    stopping: list[int] = []
    previous = {sig: signal.signal(sig, lambda s, frame: stopping.append(s)) for sig in (signal.SIGTERM, signal.SIGINT)}
    multiprocessing.allow_connection_pickling()
    spawn = multiprocessing.get_context("spawn")

    def start():
        p = spawn.Process(target=_worker, args=(config, sock), daemon=False)
        p.start()
        p.started = time.monotonic()
        return p

    procs: list = []
    stop_log = threading.Event()
    logger = threading.Thread(target=_log_minutes, args=(settings.metrics_dir, stop_log, log), daemon=True)
    try:
        procs = [start() for _ in range(workers)]
        logger.start()
        while not stopping:
            time.sleep(0.2)
            for i, p in enumerate(procs):
                if p.is_alive() or stopping:
                    continue
                if time.monotonic() - p.started < STARTUP_S:   # it would fail the same way again
                    stopping.append(signal.SIGTERM)
                    raise RuntimeError(f"worker {p.pid} exited with code {p.exitcode} while starting")
                log(f"serve: worker {p.pid} exited with code {p.exitcode}; starting another")
                procs[i] = start()
    finally:
        sock.close()   # stop accepting: the workers close their copies as they shut down
        for p in procs:
            if p.is_alive():
                os.kill(p.pid, signal.SIGTERM)
        for p in procs:
            p.join(GRACE_S + 10)
            if p.is_alive():
                p.kill()
                p.join()
        stop_log.set()
        for sig, handler in previous.items():
            signal.signal(sig, handler)
        shutil.rmtree(settings.metrics_dir, ignore_errors=True)
    return 130 if signal.SIGINT in stopping else EXIT_OK


