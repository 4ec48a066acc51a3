"""The server's figures, shared by its worker processes: requests by path and status, request latency and batch
sizes as histograms, texts waiting, texts truncated. Each worker counts into its own small file of float64 slots
(a numpy memmap in a folder the parent made); GET /metrics, answered by whichever worker gets it, adds every
worker's file up and writes the Prometheus text exposition format (prometheus.io, "Exposition formats", text
format version 0.0.4). Counters of a worker that has exited stay in the sum, so counters never go back.
"""
from __future__ import annotations

import os
from pathlib import Path

import numpy as np

CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"
PATHS = ("/predict", "/health", "/metrics", "other")
STATUSES = (200, 400, 404, 405, 413, 500, 503)
LATENCY_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0)   # seconds
BATCH_BUCKETS = (1, 2, 4, 8, 16, 32, 64, 128, 256)                                           # texts

# The slots of a worker's file, in order.
_LAYOUT = {
    "requests": len(PATHS) * (len(STATUSES) + 1),     # the last status slot of a path: any other status
    "latency": len(LATENCY_BUCKETS) + 1 + 2,          # counts per bucket (+Inf last), then sum and count
    "batch": len(BATCH_BUCKETS) + 1 + 2,
    "queue": 1,
    "truncated": 1,
    "texts": 1,
}
_START = dict(zip(_LAYOUT, np.cumsum([0, *_LAYOUT.values()])[:-1].tolist()))
SLOTS = sum(_LAYOUT.values())


class Metrics:
    """One worker's counters, in `folder`/worker-<pid>.bin. Updated from the worker's event loop only."""

    def __init__(self, folder: str | Path):
        self.folder = Path(folder)
        self.path = self.folder / f"worker-{os.getpid()}.bin"
        self.slots = np.memmap(self.path, dtype=np.float64, mode="w+", shape=(SLOTS,))

    def request(self, path: str, status: int, seconds: float) -> None:
        p = PATHS.index(path) if path in PATHS else PATHS.index("other")
        s = STATUSES.index(status) if status in STATUSES else len(STATUSES)
        self.slots[_START["requests"] + p * (len(STATUSES) + 1) + s] += 1
        if path == "/predict":
            _observe(self.slots, _START["latency"], LATENCY_BUCKETS, seconds)

    def batch(self, texts: int, truncated: int) -> None:
        _observe(self.slots, _START["batch"], BATCH_BUCKETS, texts)
        self.slots[_START["truncated"]] += truncated
        self.slots[_START["texts"]] += texts

    def queue(self, texts: int) -> None:
        self.slots[_START["queue"]] = texts

    def close(self) -> None:
        """At exit: no texts wait here any more (the counters stay, for the sum)."""
        self.queue(0)
        self.slots.flush()


def _observe(slots: np.ndarray, start: int, buckets: tuple, value: float) -> None:
    slots[start + int(np.searchsorted(buckets, value, side="left"))] += 1   # the first bucket with value <= le
    slots[start + len(buckets) + 1] += value
    slots[start + len(buckets) + 2] += 1


def total(folder: str | Path) -> np.ndarray:
    """Every worker's slots added up (a file being created right now may be shorter: it is skipped)."""
    out = np.zeros(SLOTS)
    for path in Path(folder).glob("worker-*.bin"):
        got = np.fromfile(path, dtype=np.float64)
        if got.shape == (SLOTS,):
            out += got
    return out


def _number(x: float) -> str:
    return str(int(x)) if float(x).is_integer() else repr(float(x))


def _histogram(name: str, help_text: str, slots: np.ndarray, start: int, buckets: tuple) -> list[str]:
    counts = np.cumsum(slots[start:start + len(buckets) + 1])   # buckets are cumulative in the format
    lines = [f"# HELP {name} {help_text}", f"# TYPE {name} histogram"]
    lines += [f'{name}_bucket{{le="{_number(le)}"}} {_number(c)}' for le, c in zip(buckets, counts)]
    lines += [f'{name}_bucket{{le="+Inf"}} {_number(counts[-1])}',
              f"{name}_sum {_number(slots[start + len(buckets) + 1])}",
              f"{name}_count {_number(slots[start + len(buckets) + 2])}"]
    return lines


def exposition(folder: str | Path) -> str:
    """The Prometheus text format of every worker's figures together."""
    slots = total(folder)
    lines = ["# HELP shrinkwrap_requests_total HTTP requests answered, by path and status.",
             "# TYPE shrinkwrap_requests_total counter"]
    for p, path in enumerate(PATHS):
        for s, status in enumerate((*STATUSES, "other")):
            value = slots[_START["requests"] + p * (len(STATUSES) + 1) + s]
            if value:
                lines.append(f'shrinkwrap_requests_total{{path="{path}",status="{status}"}} {_number(value)}')
    lines += _histogram("shrinkwrap_request_duration_seconds", "Time from a /predict request's arrival to its answer.",
                        slots, _START["latency"], LATENCY_BUCKETS)
    lines += _histogram("shrinkwrap_batch_texts", "Texts per model call.", slots, _START["batch"], BATCH_BUCKETS)
    lines += ["# HELP shrinkwrap_queue_texts Texts accepted and waiting for a model call.",
              "# TYPE shrinkwrap_queue_texts gauge", f"shrinkwrap_queue_texts {_number(slots[_START['queue']])}",
              "# HELP shrinkwrap_texts_total Texts classified.", "# TYPE shrinkwrap_texts_total counter",
              f"shrinkwrap_texts_total {_number(slots[_START['texts']])}",
              "# HELP shrinkwrap_texts_truncated_total Texts longer than the model reads, cut by its truncation rule.",
              "# TYPE shrinkwrap_texts_truncated_total counter",
              f"shrinkwrap_texts_truncated_total {_number(slots[_START['truncated']])}"]
    return "\n".join(lines) + "\n"


def summary(folder: str | Path) -> dict:
    """The totals the minute's log line reports: requests by status class, texts, batches, queue."""
    slots = total(folder)
    per_status = slots[_START["requests"]:_START["requests"] + _LAYOUT["requests"]].reshape(len(PATHS), -1)
    predict = per_status[PATHS.index("/predict")]
    b = _START["batch"] + len(BATCH_BUCKETS) + 1
    return {"requests": float(predict.sum()), "ok": float(predict[STATUSES.index(200)]),
            "rejected_503": float(predict[STATUSES.index(503)]),
            "client_errors": float(sum(predict[STATUSES.index(s)] for s in STATUSES if 400 <= s < 500)),
            "server_errors": float(predict[STATUSES.index(500)] + predict[-1]),
            "texts": float(slots[_START["texts"]]), "batches": float(slots[b + 1]), "queue": float(slots[_START["queue"]])}
