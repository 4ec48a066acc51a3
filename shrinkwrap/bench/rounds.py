"""Several models timed together, in interleaved rounds: each round times every model in turn (the
order rotating from round to round), so that the machine's drift over minutes — other work, the
clock, the heat — hits them alike and their ratios hold. Used by `shrinkwrap search`.

Every ONNX session is opened with spinning off: idle ONNX Runtime threads otherwise busy-wait after
a call and take the cores from the next model timed (measured here: 32 ms p50 with spinning on
against 11 ms with it off, three int8 sessions interleaved at batch 1 × 128).
"""
from __future__ import annotations

import gc
import math
from pathlib import Path
from typing import Callable

import numpy as np

from shrinkwrap.bench.latency import summarize, time_calls
from shrinkwrap.bench.reference import Reference, normalise
from shrinkwrap.bench.targets import load_target


def time_in_rounds(models: list[tuple[Path, dict]], cfg, rounds: int,
                   log: Callable[[str], None] = lambda message: None) -> list[dict]:
    """Latency of each (path, batch) in `models`, as bench's rows are (percentiles, mean, n, and the
    reference workload of the same run). `cfg`: a recipe's bench section; its repeats and timed_seconds are
    shared out over the rounds, its warm-up is repeated before each model's turn in every round."""
    reference = Reference(cfg.threads)
    targets = [load_target(path, cfg.threads, spin=False) for path, _ in models]
    samples: list[list[float]] = [[] for _ in models]
    repeats = max(3, math.ceil(cfg.repeats / rounds))
    try:
        for r in range(rounds):
            log(f"timing round {r + 1} of {rounds}: {len(models)} models")
            for k in range(len(models)):
                i = (k + r) % len(models)
                batch, target = models[i][1], targets[i]
                samples[i] += time_calls(lambda: target.outputs(batch), max(1, cfg.warmup), repeats,
                                         cfg.timed_seconds / rounds, warmup_s=cfg.warm_seconds).tolist()
            reference.burst()
    finally:
        for t in targets:
            t.release()
        del targets
        gc.collect()
    ref_ms = float(np.median(reference.samples))
    rows = []
    for (path, batch), s in zip(models, samples):
        row = summarize(np.asarray(s))
        row.update(batch_size=int(batch["input_ids"].shape[0]), tokens_read=int(batch["input_ids"].shape[1]),
                   threads=cfg.threads, rounds=rounds)
        rows.append(normalise(row, ref_ms))
    return rows
