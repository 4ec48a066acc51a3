"""The benchmark of one target, in one run: load time, peak memory, size, accuracy when a labelled
test set is given, latency at each grid point, and the reference workload that latency is also
expressed in. The runner's per-step benchmark (`measure`) and `shrinkwrap bench` (`bench_target`)
both go through `bench_target`, so a step's figures and the command's are measured the same way.
"""
from __future__ import annotations

import gc
import itertools
import time
from dataclasses import dataclass, replace
from typing import Callable, Optional

import numpy as np

from shrinkwrap.bench.grid import REAL, Point, point_batches
from shrinkwrap.bench.latency import summarize, throughput_per_s, time_calls
from shrinkwrap.bench.memory import PeakWindow
from shrinkwrap.bench.reference import EVERY_S, Reference, normalise
from shrinkwrap.bench.reference import describe as describe_reference
from shrinkwrap.bench.targets import Target, load_target
from shrinkwrap.bench.tasks import of_target
from shrinkwrap.serve.batches import all_outputs
from shrinkwrap.serve.errors import UserError


@dataclass
class Inputs:
    """What a loaded target is fed: token ids of texts to time (None: synthetic ids), and the
    test set the quality pass runs over (None: latency and size only)."""
    timing: Optional[list[dict]] = None
    pad_id: int = 0
    test: Optional[list[dict]] = None
    labels: Optional[np.ndarray] = None
    n_labels: int = 0
    about: Optional[dict] = None       # what the test set was, recorded with the result
    # task: embedding — the teacher's vectors of the test texts; the training texts with their labels (the probe);
    # each test text's pair partner with the pair's score (Spearman)
    reference: Optional[np.ndarray] = None
    self_reference: bool = True        # no `reference`: the outputs are their own (the teacher's row of a run)
    train: Optional[tuple[list[dict], np.ndarray]] = None
    pairs: Optional[tuple[list[dict], np.ndarray]] = None
    keep_outputs: bool = False         # the result keeps the test outputs (under "test_outputs": not JSON)


def _time_point(target: Target, point: Point, batches: list[dict], cfg, reference: Reference) -> dict:
    cycle = itertools.cycle(batches)

    def call():
        return target.outputs(next(cycle))

    try:  # one untimed call first, so that a graph refusing this shape says so in one line
        call()
    except UserError:
        raise
    except Exception as e:
        raise UserError(f"{target.path}: fails on a batch of {point.batch_size} × {point.sequence_length} tokens — "
                        f"{type(e).__name__}: {(str(e).splitlines() or [''])[0][:300]}") from None
    ref_ms: list[float] = []
    samples = time_calls(call, cfg.warmup, cfg.repeats, cfg.timed_seconds, warmup_s=cfg.warm_seconds,
                         pause=lambda: ref_ms.extend(reference.burst()), pause_every_s=EVERY_S)
    row = summarize(samples)
    row.update(batch_size=point.batch_size, sequence_length=point.sequence_length, threads=cfg.threads,
               throughput_per_s=throughput_per_s(point.batch_size, row["mean"]),
               mean_tokens=float(np.mean([b["input_ids"].shape[1] for b in batches])), reference_runs=len(ref_ms))
    return normalise(row, float(np.median(ref_ms)))


def bench_target(path, cfg, points: list[Point], inputs_for: Callable[[Target], Inputs] = lambda t: Inputs(),
                 log: Callable[[str], None] = lambda message: None) -> dict:
    """Measures the target at `path`. `cfg` gives threads, warmup, warm_seconds, repeats, timed_seconds and
    eval_batch_size (a recipe's bench section, or the command's options); `inputs_for` builds the
    inputs once the target is loaded (its tokenizer and label names may be needed)."""
    reference = Reference(cfg.threads)  # built before the memory window and the load clock start
    start = {"window": PeakWindow(), "clock": time.perf_counter()}

    def ready():  # restarts both once the runtime is imported (a loader that never calls it keeps the first)
        start.update(window=PeakWindow(), clock=time.perf_counter())

    target = load_target(path, cfg.threads, ready)
    load_seconds = time.perf_counter() - start["clock"]
    try:
        inputs = inputs_for(target)
        # Every point's batches first: a length the model cannot take fails before anything is timed.
        plan = [(point, point_batches(point, target, inputs.timing, inputs.pad_id)) for point in points]
        result = {"format": target.format, "path": str(target.path), "size_bytes": target.size_bytes,
                  "files": [str(f) for f in target.weight_files], "load_seconds": round(load_seconds, 4),
                  "input_names": target.input_names}
        if inputs.about is not None:
            result["data"] = inputs.about
        if target.batch_dependent:
            result["batch_dependent"] = list(target.batch_dependent)
        if inputs.test is not None:
            # A batch-dependent graph answers a text differently in different batches: its accuracy is measured
            # as a user who sends one text at a time gets it; any other graph answers alike in any batch.
            size = 1 if target.batch_dependent else cfg.eval_batch_size
            log(f"quality over {len(inputs.test)} texts")
            run = target.outputs

            def outputs_of(examples):  # the target's outputs on other texts (an encoder's training split)
                return all_outputs(run, examples, inputs.pad_id, None, size)

            outputs = outputs_of(inputs.test)
            result["metrics"], result["predictions"] = of_target(target).measure(outputs, inputs, outputs_of,
                                                                                 target.temperature)
            result["accuracy_batch_size"] = size
            if inputs.keep_outputs:
                result["test_outputs"] = outputs
        rows = []
        for point, batches in plan:
            log(f"timing batch {point.batch_size} × {point.sequence_length} tokens")
            rows.append(_time_point(target, point, batches, cfg, reference))
        result["memory"] = start["window"].stop()
    finally:
        target.release()
        del target
        gc.collect()
    result["latency"] = rows
    result["reference"] = {"workload": describe_reference(cfg.threads), "ms": float(np.median(reference.samples)),
                           "runs": len(reference.samples)}
    result["protocol"] = {"threads": cfg.threads, "warmup": cfg.warmup, "warm_seconds": cfg.warm_seconds,
                          "repeats": cfg.repeats, "timed_seconds": cfg.timed_seconds, "clock": "time.perf_counter",
                          "lengths": f"fixed: texts padded or cut to that many tokens (synthetic ids without "
                                     f"data); {REAL}: consecutive texts padded to their batch's longest"}
    return result


def measure(path, inputs: Inputs, cfg) -> dict:
    """The per-step benchmark of the runner: the test split's quality and one latency point. Its `test_outputs`
    (the target's outputs on the test texts) are for the runner to keep beside it."""
    r = bench_target(path, cfg, [Point(cfg.batch_size, cfg.sequence_length)],
                     lambda target: replace(inputs, keep_outputs=True))
    return {"format": r["format"], "metrics": r["metrics"], "latency_ms": r["latency"][0],
            "size_bytes": r["size_bytes"], "load_seconds": round(r["load_seconds"], 3),
            "memory": r["memory"], "reference": r["reference"], "predictions": r["predictions"],
            "test_outputs": r["test_outputs"]}
