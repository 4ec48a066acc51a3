"""ONNX Runtime sessions and feeds, torch-free: used by the artifact reader and predict path, by the
benchmark and by shrinkwrap.onnx_ops (the conversions, which need torch and onnx)."""
from __future__ import annotations

from pathlib import Path

import numpy as np


def session(path: str | Path | bytes, threads: int = 2, spin: bool = True):
    """A CPU session with `threads` intra-op threads; `path` may also be a serialised model.
    spin=False stops its idle threads from busy-waiting (they would take CPU from other work)."""
    import onnxruntime as ort

    opts = ort.SessionOptions()
    opts.intra_op_num_threads = threads
    opts.inter_op_num_threads = 1
    opts.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    opts.log_severity_level = 3
    if not spin:
        opts.add_session_config_entry("session.intra_op.allow_spinning", "0")
    model = path if isinstance(path, bytes) else str(path)
    return ort.InferenceSession(model, sess_options=opts, providers=["CPUExecutionProvider"])


def feed(sess, batch: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """The batch arrays the graph takes, by its own input names."""
    return {i.name: batch[i.name] for i in sess.get_inputs() if i.name in batch}


def run_logits(sess, batch: dict[str, np.ndarray]) -> np.ndarray:
    return sess.run(None, feed(sess, batch))[0]
