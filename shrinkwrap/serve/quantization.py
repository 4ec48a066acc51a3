"""Whether a graph's answers depend on what else is in the batch, read from the graph itself.

Some int8 operators scale their input by the range of the whole batch tensor, padding included, so a text's
int8 codes, and its scores, change with the texts batched with it: ONNX Runtime's dynamic int8
(DynamicQuantizeLinear, and the contrib operators that quantise their input the same way). An artifact made by
this version quantises per row (shrinkwrap.ml.int8_rows) and holds none of them; an older artifact, or a foreign
int8 graph, may. predict, bench and serve say so in one `note:` line. Torch- and onnx-free, like the predict path.
"""
from __future__ import annotations

from pathlib import Path

from shrinkwrap.serve.sessions import graph_contents

# Operators that compute an activation scale over their whole input tensor at run time (onnx.ai's operator list;
# ONNX Runtime's ContribOperators.md for the com.microsoft ones).
BATCH_DEPENDENT_OPS = ("DynamicQuantizeLinear", "QAttention", "DynamicQuantizeMatMul", "DynamicQuantizeLSTM")


def batch_dependent_ops(path: str | Path) -> list[str]:
    """The operators in the graph at `path` whose outputs for one row depend on the other rows of the batch."""
    return sorted(set(graph_contents(path)[1]) & set(BATCH_DEPENDENT_OPS))


def batch_note(where: str | Path, ops: list[str]) -> str:
    """The one line predict, bench and serve print for a batch-dependent graph."""
    return (f"note: {where}: batch-dependent int8 ({', '.join(ops)} scales activations over the whole batch), so a "
            f"text's scores can change with the texts batched with it; rebuild it with this version "
            f"(shrinkwrap run or package) for int8 that answers the same whatever the batch")
