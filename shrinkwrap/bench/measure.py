"""The one benchmark every step gets: accuracy on the test split, latency, size."""
from __future__ import annotations

import time

import numpy as np

from shrinkwrap.bench.accuracy import classification_metrics
from shrinkwrap.bench.latency import summarize, time_calls
from shrinkwrap.bench.targets import load_target
from shrinkwrap.data import all_logits, collate


def latency_batch(examples: list[dict], pad_id: int, batch_size: int, length: int) -> dict[str, np.ndarray]:
    """`batch_size` real texts padded or cut to exactly `length` tokens (reused cyclically if too few)."""
    rows = [examples[i % len(examples)] for i in range(batch_size)]
    return collate(rows, pad_id, length=length)


def measure(path, test: list[dict], labels: np.ndarray, n_labels: int, timing: list[dict], pad_id: int, cfg) -> dict:
    started = time.perf_counter()
    target = load_target(path, cfg.threads)
    load_s = time.perf_counter() - started
    logits = all_logits(target.logits, test, pad_id, n_labels, cfg.eval_batch_size)
    preds = logits.argmax(1)
    batch = latency_batch(timing, pad_id, cfg.batch_size, cfg.sequence_length)
    samples = time_calls(lambda: target.logits(batch), cfg.warmup, cfg.repeats, cfg.min_time_s)
    lat = summarize(samples)
    lat.update(batch_size=cfg.batch_size, sequence_length=cfg.sequence_length, threads=cfg.threads,
               throughput_per_s=cfg.batch_size * 1000.0 / lat["mean"])
    return {"format": target.format, "metrics": classification_metrics(labels, preds, n_labels),
            "latency_ms": lat, "size_bytes": target.size_bytes, "load_seconds": round(load_s, 3),
            "predictions": preds.tolist()}
