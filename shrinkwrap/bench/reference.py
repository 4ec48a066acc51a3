"""A fixed reference workload timed in the same run as every latency figure.

Absolute milliseconds drift with whatever else the machine is doing (other processes, a CPU quota,
a core taken away, clock changes). A model's latency divided by the time of a fixed fp32 matrix
product measured at the same moments, in the same process, at the same thread count, cancels much
of that drift, so a budget can be stated as a multiple of the reference (`p95_over_reference`).
benchmarks/noise.py measures how much steadier the ratio is than raw milliseconds, and where not.

Why onnxruntime runs the product, in bursts between the model's calls, without spinning: a numpy
product (OpenBLAS) leaves its worker threads spinning for a long while afterwards — a 2-thread
MiniLM call right after a burst took 87 ms against 50 ms after a pause, on this machine — and so
does an onnxruntime session with default options: bursts every 0.25 s raised the model's p50 from
61 to 95 ms (median of 6 alternating trials). With spinning off in the reference's session the
difference was within noise (50 vs 54 ms, winners alternating). Each burst also sits between short
pauses, and the benchmark re-warms the model with one untimed call before timing resumes. Bursts
during the row, not only before and after the whole run, matter because the load on a shared
machine changes within seconds.
"""
from __future__ import annotations

import time

import numpy as np

from shrinkwrap.bench.latency import time_calls

# 512 × 512 fp32: ~0.27 GFLOP, a few milliseconds on two cores — long against timer resolution,
# short enough that bursts every quarter second cost a few per cent of the benchmark.
SIZE = 512
BURST = 5            # products per burst
EVERY_S = 0.25       # a burst after this many seconds of timed model calls
SETTLE_S = 0.01      # pause before and after a burst, for the other thread pool to go idle


def describe(threads: int) -> str:
    return (f"onnxruntime fp32 MatMul {SIZE}x{SIZE} @ {SIZE}x{SIZE}, {threads} intra-op threads (no spinning); "
            f"median of bursts of {BURST} before, every {EVERY_S:g} s during, and after each row's timed calls")


def _matmul_model() -> bytes:
    from onnx import TensorProto, helper

    def square(name):
        return helper.make_tensor_value_info(name, TensorProto.FLOAT, [SIZE, SIZE])

    graph = helper.make_graph([helper.make_node("MatMul", ["a", "b"], ["c"])], "reference",
                              [square("a"), square("b")], [square("c")])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8  # readable by every onnxruntime this project supports
    return model.SerializeToString()


class Reference:
    """The reference product at `threads` threads, and the milliseconds of every burst so far."""

    def __init__(self, threads: int) -> None:
        from shrinkwrap.serve.sessions import session

        self.threads = threads
        self.session = session(_matmul_model(), threads, spin=False)
        rng = np.random.default_rng(0)
        self.feeds = {k: rng.standard_normal((SIZE, SIZE), dtype=np.float32) for k in ("a", "b")}
        self.run()  # first-call costs, once
        self.samples: list[float] = []

    def run(self) -> None:
        self.session.run(None, self.feeds)

    def burst(self, repeats: int = BURST) -> list[float]:
        time.sleep(SETTLE_S)
        ms = time_calls(self.run, warmup=1, repeats=repeats, min_time_s=0.0).tolist()
        time.sleep(SETTLE_S)
        self.samples += ms
        return ms


def normalise(latency: dict, reference_ms: float) -> dict:
    """Adds the reference time and the latency percentiles as multiples of it (the keys budgets read)."""
    latency["reference_ms"] = reference_ms
    latency["p50_over_reference"] = latency["p50"] / reference_ms
    latency["p95_over_reference"] = latency["p95"] / reference_ms
    return latency
