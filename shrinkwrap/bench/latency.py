"""Latency protocol: warm up, then time many calls (at least `repeats`, and for at least `min_time_s`)."""
from __future__ import annotations

import math
import time
from typing import Callable

import numpy as np

PERCENTILES = (50, 90, 95, 99)


def time_calls(fn: Callable[[], object], warmup: int, repeats: int, min_time_s: float,
               max_repeats: int = 100_000) -> np.ndarray:
    """Wall-clock milliseconds of each timed call of `fn`."""
    for _ in range(warmup):
        fn()
    samples = []
    started = time.perf_counter()
    while len(samples) < repeats or (time.perf_counter() - started < min_time_s and len(samples) < max_repeats):
        t0 = time.perf_counter()
        fn()
        samples.append((time.perf_counter() - t0) * 1000.0)
    return np.asarray(samples)


def summarize(samples_ms: np.ndarray) -> dict:
    """Percentiles (numpy's default linear interpolation), mean with a 95 % confidence interval."""
    s = np.asarray(samples_ms, dtype=float)
    out = {f"p{q}": float(np.percentile(s, q)) for q in PERCENTILES}
    mean = float(s.mean())
    if len(s) > 1:
        from scipy import stats

        half = float(stats.t.ppf(0.975, len(s) - 1) * s.std(ddof=1) / math.sqrt(len(s)))
    else:
        half = float("nan")
    out.update(mean=mean, mean_ci95=[mean - half, mean + half], n=int(len(s)),
               min=float(s.min()), max=float(s.max()))
    return out
