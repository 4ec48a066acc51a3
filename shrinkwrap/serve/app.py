"""The HTTP service of one worker process, as an ASGI application (the server, uvicorn, parses HTTP and calls it):

    POST /predict   {"texts": [...]} (and "text_pairs": [...] for a pair artifact) -> {"predictions": [...]},
                    each row as `shrinkwrap predict` prints it; a bad body -> 4xx {"error": "one line"};
                    a full queue -> 503 with Retry-After
    GET  /health    200 once the model is loaded
    GET  /metrics   the Prometheus text format (shrinkwrap.serve.metrics)

The worker's settings come from the environment variable SETTINGS_ENV (JSON, set by shrinkwrap.serve.service
before it starts the workers). The model is loaded, and the artifact checked again, before the worker answers
anything; on shutdown every accepted request is answered before the worker exits.
"""
from __future__ import annotations

import json
import os
import sys
import time
from dataclasses import dataclass
from typing import Optional

from shrinkwrap.serve.batcher import Batcher
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.metrics import CONTENT_TYPE, Metrics, exposition

SETTINGS_ENV = "SHRINKWRAP_SERVE_SETTINGS"
RETRY_AFTER_S = 1
KEYS = ("texts", "text_pairs")


@dataclass
class Settings:
    artifact: str
    threads: int
    max_batch: int
    max_wait_ms: float
    max_queue: int
    max_body_bytes: int
    min_confidence: float
    metrics_dir: str
    trusted_key: Optional[str] = None


class BadRequest(Exception):
    def __init__(self, status: int, message: str):
        super().__init__(message)
        self.status = status


def parse_body(body: bytes, pairs: bool, max_texts: int) -> tuple[list[str], Optional[list[str]]]:
    """(texts, pairs or None) of a /predict body; BadRequest with one line for anything else."""
    try:
        obj = json.loads(body)
    except (json.JSONDecodeError, UnicodeDecodeError) as e:
        raise BadRequest(400, f"malformed JSON — {e}") from None
    if not isinstance(obj, dict):
        raise BadRequest(400, f"the body is a JSON {type(obj).__name__}, not an object — send "
                              f"{{\"texts\": [...]}}" + (' with "text_pairs": [...]' if pairs else ""))
    unknown = [k for k in obj if k not in KEYS]
    if unknown:
        raise BadRequest(400, f"unknown key {unknown[0]!r} — the body takes \"texts\""
                              + (' and "text_pairs"' if pairs else ""))
    if "texts" not in obj:
        raise BadRequest(400, 'no "texts" — send {"texts": ["a text", ...]}')
    texts = _strings(obj["texts"], "texts", max_texts)
    if pairs and "text_pairs" not in obj:
        raise BadRequest(400, 'this model classifies pairs of texts: send "text_pairs" beside "texts", one per text')
    if not pairs and "text_pairs" in obj:
        raise BadRequest(400, 'this model classifies single texts: "text_pairs" is not taken')
    second = _strings(obj["text_pairs"], "text_pairs", max_texts) if pairs else None
    if second is not None and len(second) != len(texts):
        raise BadRequest(400, f'"texts" has {len(texts)} items and "text_pairs" {len(second)} — one pair text per text')
    return texts, second


def _strings(value, key: str, max_texts: int) -> list[str]:
    if not isinstance(value, list):
        raise BadRequest(400, f'"{key}" is a JSON {type(value).__name__} — expected a list of strings')
    if not value:
        raise BadRequest(400, f'"{key}" is empty — give at least one text')
    if len(value) > max_texts:
        raise BadRequest(413, f'"{key}" has {len(value)} texts — at most {max_texts} per request (--max-batch)')
    for i, text in enumerate(value):
        if not isinstance(text, str):
            raise BadRequest(400, f'"{key}"[{i}] is a JSON {type(text).__name__} — expected a string')
        if not text.strip():
            raise BadRequest(400, f'"{key}"[{i}] is empty — every text needs at least one character')
    return value


class Service:
    """One worker: the loaded artifact, its batcher and its metrics; `__call__` is the ASGI application."""

    def __init__(self, settings: Settings):
        self.settings = settings
        self.model = None
        self.batcher: Optional[Batcher] = None
        self.metrics: Optional[Metrics] = None

    def load(self) -> None:
        from pathlib import Path

        from shrinkwrap.serve.artifact import load

        s = self.settings
        if s.trusted_key:
            from shrinkwrap.serve.signing import check_signature

            check_signature(Path(s.artifact), Path(s.trusted_key))
        # idle ONNX Runtime threads that spin would take the cores the event loop answers HTTP on
        self.model = load(s.artifact, s.threads, spin=False)
        self.metrics = Metrics(s.metrics_dir)
        self.batcher = Batcher(self._predict, s.max_batch, s.max_wait_ms / 1000, s.max_queue,
                               on_batch=self._counted, on_queue=self.metrics.queue)
        self.batcher.start()

    def _counted(self, texts: int, rows: list[dict]) -> None:
        self.metrics.batch(texts, sum(1 for r in rows if r.get("truncated")))

    def _predict(self, texts: list[str], pairs: Optional[list[str]]) -> list[dict]:
        # One call for the whole batch: padded to its longest text (the artifact's int8 answers alike in any batch).
        return self.model.predict(texts, len(texts), self.settings.min_confidence, pairs=pairs)

    async def __call__(self, scope, receive, send) -> None:
        if scope["type"] == "lifespan":
            await self._lifespan(receive, send)
            return
        if scope["type"] != "http":
            return
        started = time.perf_counter()
        path, method = scope["path"], scope["method"]
        route = path if path in ("/predict", "/health", "/metrics") else "other"
        allowed = {"/predict": "POST", "/health": "GET", "/metrics": "GET"}.get(path)
        try:
            if allowed is None:
                raise BadRequest(404, f"no such path {path!r} — POST /predict, GET /health, GET /metrics")
            if method != allowed:
                raise BadRequest(405, f"{method} {path} — {path} takes {allowed}")
            if path == "/health":
                status = await _send(send, 200, b'{"status": "ok"}\n', "application/json")
            elif path == "/metrics":
                status = await _send(send, 200, exposition(self.settings.metrics_dir).encode(), CONTENT_TYPE)
            else:
                status = await self._predict_request(scope, receive, send)
        except BadRequest as e:
            extra = [(b"allow", allowed.encode())] if e.status == 405 else []
            status = await _send_error(send, e.status, str(e), extra)
        except Exception as e:  # a bug: the caller gets one line, the log the rest
            print(f"serve: internal error on {method} {path}: {type(e).__name__}: {e}", file=sys.stderr, flush=True)
            status = await _send_error(send, 500, f"internal error ({type(e).__name__})")
        self.metrics.request(route, status, time.perf_counter() - started)

    async def _predict_request(self, scope, receive, send) -> int:
        s = self.settings
        declared = dict(scope["headers"]).get(b"content-length")
        if declared is not None and declared.isdigit() and int(declared) > s.max_body_bytes:
            raise BadRequest(413, f"the body is {int(declared)} bytes — at most {s.max_body_bytes} (--max-body-mb)")
        body = bytearray()
        while True:
            message = await receive()
            if message["type"] == "http.disconnect":
                return 499   # the caller went away before sending its body: nothing to answer
            body += message.get("body", b"")
            if len(body) > s.max_body_bytes:
                raise BadRequest(413, f"the body is over {s.max_body_bytes} bytes (--max-body-mb)")
            if not message.get("more_body"):
                break
        texts, pairs = parse_body(bytes(body), self.model.reads_pairs, s.max_batch)
        answer = self.batcher.submit(texts, pairs)
        if answer is None:
            return await _send_error(send, 503, f"the queue is full ({s.max_queue} texts, --max-queue) — retry in "
                                               f"{RETRY_AFTER_S} s", [(b"retry-after", str(RETRY_AFTER_S).encode())])
        rows = await answer
        return await _send(send, 200, json.dumps({"predictions": rows}, ensure_ascii=False).encode(), "application/json")

    async def _lifespan(self, receive, send) -> None:
        while True:
            message = await receive()
            if message["type"] == "lifespan.startup":
                try:
                    self.load()
                except UserError as e:
                    await send({"type": "lifespan.startup.failed", "message": str(e)})
                    return
                await send({"type": "lifespan.startup.complete"})
            elif message["type"] == "lifespan.shutdown":
                if self.batcher is not None:
                    await self.batcher.drain()
                if self.metrics is not None:
                    self.metrics.close()
                await send({"type": "lifespan.shutdown.complete"})
                return


async def _send(send, status: int, body: bytes, content_type: str, extra: list = ()) -> int:
    await send({"type": "http.response.start", "status": status,
                "headers": [(b"content-type", content_type.encode()), (b"content-length", str(len(body)).encode()),
                            *extra]})
    await send({"type": "http.response.body", "body": body})
    return status


async def _send_error(send, status: int, message: str, extra: list = ()) -> int:
    return await _send(send, status, json.dumps({"error": message}).encode() + b"\n", "application/json", extra)


def from_environment() -> Service:
    """The application factory uvicorn calls in each worker process."""
    return Service(Settings(**json.loads(os.environ[SETTINGS_ENV])))
