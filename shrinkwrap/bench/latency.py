"""Latency protocol: warm up (by count and by time), then time many calls (at least `repeats`, and for at
least `min_time_s`), and summarise them as percentiles and a mean with its 95 % confidence interval."""
from __future__ import annotations

import math
import time
from typing import Callable, Optional

import numpy as np

PERCENTILES = (50, 90, 95, 99)


def time_calls(fn: Callable[[], object], warmup: int, repeats: int, min_time_s: float,
               max_repeats: int = 100_000, warmup_s: float = 0.0,
               pause: Optional[Callable[[], None]] = None, pause_every_s: float = 0.25) -> np.ndarray:
    """Wall-clock milliseconds of each timed call of `fn`: at least `repeats` calls, and calls until
    their own time adds up to `min_time_s`.

    Warm-up lasts `warmup` calls and at least `warmup_s` seconds: the count pays first-call costs
    (memory arenas, lazy kernels), the time lets thread pools wake and the CPU clock settle, which
    a few calls of a fast model do not.

    `pause`, when given, runs untimed before the first timed call, after every `pause_every_s`
    seconds of timed calls, and after the last; each pause but the last is followed by one untimed
    call, so that no timed call pays for the caches or sleeping threads a pause left behind.
    """
    started = time.perf_counter()
    done = 0
    while done < warmup or (time.perf_counter() - started < warmup_s and done < max_repeats):
        fn()
        done += 1
    samples: list[float] = []
    timed = 0.0
    next_pause = pause_every_s
    if pause is not None:
        pause()
        fn()
    while len(samples) < repeats or (timed < min_time_s and len(samples) < max_repeats):
        t0 = time.perf_counter()
        fn()
        dt = time.perf_counter() - t0
        samples.append(dt * 1000.0)
        timed += dt
        if pause is not None and timed >= next_pause:
            pause()
            fn()
            next_pause = timed + pause_every_s
    if pause is not None:
        pause()
    return np.asarray(samples)


def summarize(samples_ms: np.ndarray) -> dict:
    """Percentiles (numpy's default linear interpolation), mean with a 95 % confidence interval."""
    s = np.asarray(samples_ms, dtype=float)
    out = {f"p{q}": float(np.percentile(s, q)) for q in PERCENTILES}
    mean = float(s.mean())
    if len(s) > 1:
        from shrinkwrap.bench.exact import t_quantile

        # Student's t interval of the mean; successive calls are not fully independent (caches,
        # clock), so read it as a lower bound on the true uncertainty.
        half = float(t_quantile(0.975, len(s) - 1) * s.std(ddof=1) / math.sqrt(len(s)))
    else:
        half = float("nan")
    out.update(mean=mean, mean_ci95=[mean - half, mean + half], n=int(len(s)),
               min=float(s.min()), max=float(s.max()))
    return out


def throughput_per_s(batch_size: int, mean_ms: float) -> float:
    """Sequences per second at this batch size, from the mean call time."""
    return batch_size * 1000.0 / mean_ms


def graph_p50_ms(path, batch: dict, threads: int) -> float:
    """Median ms of one ONNX graph on `batch`, briefly (3 warm-up runs, at least 20 timed and 0.5 s): the
    record of how fast each graph an export considered was, not a benchmark."""
    from shrinkwrap.serve.sessions import run_outputs, session

    sess = session(path, threads)
    return summarize(time_calls(lambda: run_outputs(sess, batch), warmup=3, repeats=20, min_time_s=0.5))["p50"]
