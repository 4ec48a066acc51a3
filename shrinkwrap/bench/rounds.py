"""Several models timed together, in interleaved rounds: each round times every model in turn (the
order rotating from round to round), so that the machine's drift over minutes — other work, the
clock, the heat — hits them alike and their ratios hold. `shrinkwrap run` times the teacher and every
step so after the chain, `shrinkwrap search` its candidates with the teacher, the gate re-times what it
cannot trust.

Each model's figures say how steady they were (STEADY_RULE): the spread of its per-round medians, and its
p95 against its p50. A model's work on a fixed batch is fixed, so a steady machine gives rounds that agree
and a p95 close to the p50; a busy one shows in either — or, when the other work never lets go, in neither,
hence the third rule: the share of the machine other processes used while the rounds ran (bench.contention).

Every ONNX session is opened with spinning off: idle ONNX Runtime threads otherwise busy-wait after
a call and take the cores from the next model timed (measured here: 32 ms p50 with spinning on
against 11 ms with it off, three int8 sessions interleaved at batch 1 × 128).
"""
from __future__ import annotations

import gc
import math
from pathlib import Path
from typing import Callable, Optional

import numpy as np

from shrinkwrap.bench import contention
from shrinkwrap.bench.latency import summarize, time_calls
from shrinkwrap.bench.reference import Reference, normalise
from shrinkwrap.bench.targets import load_target

# A timing is unstable when its rounds' medians spread over more than MAX_SPREAD of their median, or its p95 is
# more than MAX_TAIL times its p50 — each by at least MIN_GAP_MS: a busy neighbour takes whole scheduler slices
# (milliseconds), while a sub-millisecond model's own jitter (timer, interpreter) is a fraction of one and says
# nothing about the machine. The limits are this project's rule of thumb, from its own runs on 2-core machines
# (benchmarks/noisy_neighbour.py).
MAX_SPREAD = 0.25
MAX_TAIL = 1.5
MIN_GAP_MS = 0.5
STEADY_RULE = (f"a timing is unstable when its rounds' medians spread over more than {MAX_SPREAD:.0%} of their "
               f"median, or its p95 is more than {MAX_TAIL:g}× its p50 (the model's work is fixed), each by more "
               f"than {MIN_GAP_MS:g} ms, or when other processes used more than "
               f"{contention.MAX_OTHERS_SHARE:.0%} of the machine's CPU while it was timed")


def steadiness(round_samples: list[list[float]], p50: float, p95: float, others: Optional[float] = None) -> dict:
    """How steady one model's timing was: each round's median, their spread (max − min over their median),
    p95 / p50, the share of the machine other processes used meanwhile (`others`, None when unknown), and
    whether STEADY_RULE calls it unstable (with why)."""
    medians = [float(np.median(s)) for s in round_samples if len(s)]
    mid = float(np.median(medians)) if medians else float("nan")
    spread = (max(medians) - min(medians)) / mid if len(medians) > 1 and mid > 0 else 0.0
    tail = p95 / p50 if p50 > 0 else float("inf")
    why = []
    if spread > MAX_SPREAD and spread * mid > MIN_GAP_MS:
        why.append(f"its rounds' medians spread over {spread:.0%} of their median (limit {MAX_SPREAD:.0%})")
    if tail > MAX_TAIL and p95 - p50 > MIN_GAP_MS:
        why.append(f"its p95 is {tail:.1f}× its p50 (limit {MAX_TAIL:g}×)")
    busy = contention.verdict(others)
    if busy:
        why.append(busy)
    return {"round_p50": [round(m, 4) for m in medians], "spread": round(spread, 4), "p95_over_p50": round(tail, 4),
            "others_cpu_share": None if others is None else round(others, 4),
            "unstable": bool(why), **({"unstable_why": "; ".join(why)} if why else {})}


def time_in_rounds(models: list[tuple[Path, dict]], cfg, rounds: int,
                   log: Callable[[str], None] = lambda message: None) -> list[dict]:
    """Latency of each (path, batch) in `models`, as bench's rows are (percentiles, mean, n, and the
    reference workload of the same run), with how steady it was (steadiness). `cfg`: a recipe's bench
    section; its repeats and timed_seconds are shared out over the rounds, its warm-up is repeated before each
    model's turn in every round."""
    reference = Reference(cfg.threads)
    targets = [load_target(path, cfg.threads, spin=False) for path, _ in models]
    samples: list[list[list[float]]] = [[] for _ in models]   # model -> round -> ms
    repeats = max(3, math.ceil(cfg.repeats / rounds))
    before = contention.snapshot()
    try:
        for r in range(rounds):
            log(f"timing round {r + 1} of {rounds}: {len(models)} models")
            for k in range(len(models)):
                i = (k + r) % len(models)
                batch, target = models[i][1], targets[i]
                samples[i].append(time_calls(lambda: target.outputs(batch), max(1, cfg.warmup), repeats,
                                             cfg.timed_seconds / rounds, warmup_s=cfg.warm_seconds).tolist())
            reference.burst()
        others = contention.others_share(before, contention.snapshot())
    finally:
        for t in targets:
            t.release()
        del targets
        gc.collect()
    ref_ms = float(np.median(reference.samples))
    rows = []
    for (path, batch), per_round in zip(models, samples):
        row = summarize(np.concatenate([np.asarray(s) for s in per_round]))
        row.update(batch_size=int(batch["input_ids"].shape[0]), tokens_read=int(batch["input_ids"].shape[1]),
                   threads=cfg.threads, rounds=rounds, **steadiness(per_round, row["p50"], row["p95"], others))
        rows.append(normalise(row, ref_ms))
    return rows


def time_folders(folders: list[Path], cfg, rounds: int, log: Callable[[str], None] = lambda message: None) -> list[dict]:
    """time_in_rounds of step folders, each on the batch it keeps (timing.json). A one-line UserError for a
    folder without one (made before the batch was kept: run its recipe again)."""
    from shrinkwrap.bench.timing import read_timing_batch
    from shrinkwrap.serve.errors import UserError

    models = []
    for folder in folders:
        batch = read_timing_batch(folder)
        if batch is None:
            raise UserError(f"{folder}: no timing.json — the run predates it; run its recipe again to time it")
        models.append((Path(folder), batch))
    return time_in_rounds(models, cfg, rounds, log)
