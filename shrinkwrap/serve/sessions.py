"""ONNX Runtime sessions and feeds, torch-free: used by the artifact reader and predict path, by the
benchmark and by shrinkwrap.ml.convert (the conversions, which need torch and onnx)."""
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


_INT_TYPES = {"tensor(int32)": np.int32, "tensor(int64)": np.int64}


def feed(sess, batch: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """The batch arrays the graph takes, by its own input names, in its own integer type (some exported
    graphs take int32 ids)."""
    return {i.name: batch[i.name].astype(_INT_TYPES.get(i.type, batch[i.name].dtype), copy=False)
            for i in sess.get_inputs() if i.name in batch}


def run_outputs(sess, batch: dict[str, np.ndarray]) -> np.ndarray:
    return sess.run(None, feed(sess, batch))[0]


# --- what a graph holds, read from the protobuf wire format directly -----------------------------------------
# So that this stays in the torch- and onnx-free predict path. Field numbers from onnx.proto: ModelProto.graph 7,
# .functions 25; GraphProto.node 1, .initializer 5, .sparse_initializer 15; NodeProto.op_type 4, .attribute 5;
# AttributeProto.t 5, .g 6, .tensors 10, .graphs 11, .sparse_tensor 22, .sparse_tensors 23; FunctionProto.node 7;
# SparseTensorProto.values 1, .indices 2; TensorProto.external_data 13; StringStringEntryProto.key 1, .value 2.

def _fields(buf: memoryview):
    """(field number, wire type, value) of one message; length-delimited values as memoryviews."""
    i, n = 0, len(buf)

    def varint():
        nonlocal i
        shift = value = 0
        while True:
            if i >= n:
                raise ValueError("truncated varint")
            b = buf[i]
            i += 1
            value |= (b & 0x7F) << shift
            if not b & 0x80:
                return value
            shift += 7

    while i < n:
        key = varint()
        field, wire = key >> 3, key & 7
        if wire == 0:
            yield field, wire, varint()
        elif wire == 1:
            i += 8
        elif wire == 5:
            i += 4
        elif wire == 2:
            size = varint()
            if i + size > n:
                raise ValueError("truncated field")
            yield field, wire, buf[i:i + size]
            i += size
        else:
            raise ValueError(f"wire type {wire}")


_CHILDREN = {  # message kind -> {field: child kind}
    "model": {7: "graph", 25: "function"},
    "function": {7: "node"},
    "graph": {1: "node", 5: "tensor", 15: "sparse"},
    "node": {5: "attribute"},
    "attribute": {5: "tensor", 6: "graph", 10: "tensor", 11: "graph", 22: "sparse", 23: "sparse"},
    "sparse": {1: "tensor", 2: "tensor"},
}


def graph_contents(path: str | Path) -> tuple[list[str], set[str]]:
    """(the external-data file names its tensors point to (TensorProto.external_data `location`), the operator
    types of its nodes, subgraphs' and functions' included), read without loading any tensor. ValueError for a
    file that is not a parseable graph."""
    data = Path(path).read_bytes()  # the session reads it whole next anyway
    if not data:
        raise ValueError("empty file")
    found: list[str] = []
    op_types: set[str] = set()
    stack = [("model", memoryview(data), 0)]
    while stack:
        kind, buf, depth = stack.pop()
        if depth > 64:
            raise ValueError("nested too deep")
        for field, wire, value in _fields(buf):
            if wire != 2:
                continue
            if kind == "tensor" and field == 13:
                entry = {k: bytes(v) for k, w, v in _fields(value) if w == 2}
                if entry.get(1) == b"location":
                    found.append(entry.get(2, b"").decode("utf-8", "replace"))
            elif kind == "node" and field == 4:
                op_types.add(bytes(value).decode("utf-8", "replace"))
            elif field in _CHILDREN.get(kind, {}):
                stack.append((_CHILDREN[kind][field], value, depth + 1))
    return found, op_types


def external_locations(path: str | Path) -> list[str]:
    """The external-data file names the graph's tensors point to; ValueError for an unparseable file."""
    return graph_contents(path)[0]


def check_external_data(path: str | Path) -> list[Path]:
    """The external-data files of the graph at `path`, once every one is known to lie inside the graph's own
    folder; a UserError before anything is loaded for a location outside it (absolute, `..`, or a link
    out), which ONNX Runtime would otherwise open."""
    from shrinkwrap.serve.errors import UserError

    path = Path(path)
    try:
        locations = external_locations(path)
    except (ValueError, UnicodeDecodeError) as e:
        raise UserError(f"{path}: not a readable ONNX graph — {e}") from None
    folder = path.parent.resolve()
    files = []
    for loc in dict.fromkeys(locations):
        target = (folder / loc).resolve()
        if Path(loc).is_absolute() or ".." in Path(loc).parts or not target.is_relative_to(folder):
            raise UserError(f"{path}: a tensor's external data is at {loc!r}, outside the graph's folder — "
                            f"refused; external data must sit beside the .onnx file")
        if not target.is_file():
            raise UserError(f"{path}: a tensor's external data file {loc!r} is missing beside it")
        files.append(target)
    return files
