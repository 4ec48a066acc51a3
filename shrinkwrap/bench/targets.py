"""Anything the benchmark can measure, behind one interface: `outputs(batch) -> array`.

A target is a transformers classification folder (fp32 safetensors or a shrinkwrap int8 folder),
a folder holding model.onnx, a bare .onnx file, or an artifact (shrinkwrap.serve.artifact; verified first).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Optional

import numpy as np

from shrinkwrap.serve.artifact import is_artifact
from shrinkwrap.serve.classification import labels_of_config
from shrinkwrap.serve.embedding import POOLING_FILE, SENTENCE_OUTPUT
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.rundir import CONFIG_FILE, INT8_WEIGHTS, MODEL_FILE, TOKENIZER_FILE, read_json_or_none


@dataclass
class Target:
    format: str                          # "pytorch" or "onnx"
    path: Path
    weight_files: list[Path]
    outputs: Callable[[dict[str, np.ndarray]], np.ndarray]   # a batch -> its first output (a classifier's logits)
    input_names: list[str]
    tokenizer_dir: Optional[Path] = None
    extra: dict = field(default_factory=dict)
    label_names: Optional[list[str]] = None     # class names by id; None for an encoder without a head
    max_length: Optional[int] = None            # longest input in tokens the model takes, when known
    temperature: float = 1.0                    # an artifact's calibration temperature (scores = softmax(logits / T))
    # Operators that scale activations over the whole batch (shrinkwrap.serve.quantization): with any, a text's
    # outputs depend on its batch companions, so the accuracy pass feeds such a graph one text at a time.
    batch_dependent: tuple[str, ...] = ()
    task: str = "classification"                # what its outputs are (shrinkwrap.bench.tasks): or "embedding"

    @property
    def size_bytes(self) -> int:
        return sum(f.stat().st_size for f in self.weight_files)

    def _read_graph(self) -> None:
        # Only when asked: parsing a large graph again would add to every load.
        if self.format == "onnx" and "vocab_size" not in self.extra:
            self.extra["vocab_size"], self.extra["graph_positions"] = onnx_embedding_rows(self.path)
            if self.extra["vocab_size"] is None:  # else a config.json beside the graph
                config = read_json_or_none(self.path.parent / CONFIG_FILE)
                size = config.get("vocab_size") if isinstance(config, dict) else None
                self.extra["vocab_size"] = size if isinstance(size, int) and size > 0 else None

    def vocab_size(self) -> Optional[int]:
        """Token ids must stay below this (synthetic inputs need it); None when it cannot be told."""
        self._read_graph()
        return self.extra.get("vocab_size")

    def token_limit(self) -> Optional[int]:
        """The longest input in tokens: `max_length`, else the graph's position table; None if unknown."""
        if self.max_length is None:
            self._read_graph()
            return self.extra.get("graph_positions")
        return self.max_length

    def release(self) -> None:
        """Drops the model or session, so its memory and its thread pool are gone before the next
        measurement (onnxruntime's threads keep spinning after a run and would steal CPU from it)."""
        self.outputs = None
        self.extra.clear()


# Ops that pass token ids through unchanged on their way to the embedding lookup.
_PASS_THROUGH = {"Cast", "Identity", "Unsqueeze", "Reshape", "Flatten", "Squeeze"}
# Ops between a stored table and the lookup that keep its shape: dequantisation (DequantizeLinear, or the
# Cast -> Sub zero point -> Mul scale of a hand-made one), fp16 casts, identities.
_SAME_SHAPE = {"DequantizeLinear", "Cast", "Identity", "Mul", "Sub", "Add", "Div", "DynamicQuantizeLinear"}
# Every BERT-family vocabulary (BERT, RoBERTa, ALBERT, ELECTRA, DistilBERT, MiniLM...) has at least this
# many ids: synthetic ids below it are valid for a model that does not say its vocabulary size.
SAFE_VOCAB = 1000


def onnx_embedding_rows(path: Path) -> tuple[Optional[int], Optional[int]]:
    """(vocabulary size, position count) read from the graph: the rows of the embedding tables that
    input_ids (and, in a fused graph, positions) index. None where the graph does not tell."""
    import onnx

    graph = onnx.load(str(path), load_external_data=False).graph
    dims = {i.name: list(i.dims) for i in graph.initializer}
    for n in graph.node:  # a table may also be a Constant node's value
        if n.op_type == "Constant" and n.attribute and n.attribute[0].name == "value":
            dims[n.output[0]] = list(n.attribute[0].t.dims)
    made_by = {o: n for n in graph.node for o in n.output}

    def table_rows(name: str, depth: int = 0) -> Optional[int]:
        # Follow the lookup's data input back to the stored weight: a quantised table reaches the lookup
        # through dequantisation and elementwise nodes; scales and zero points are scalars or 1-D, so the
        # weight is the one input of rank 2.
        if len(dims.get(name, [])) == 2:
            return int(dims[name][0])
        node = made_by.get(name)
        if node is None or depth > 8 or node.op_type not in _SAME_SHAPE:
            return None
        rows = [table_rows(x, depth + 1) for x in node.input if x]
        return next((r for r in rows if r), None)

    names = {i.name for i in graph.input if "input_ids" in i.name}
    for _ in range(8):  # follow the ids through a few pass-through ops at most
        nxt = set()
        for node in graph.node:
            used = [k for k, x in enumerate(node.input) if x in names]
            if not used:
                continue
            if node.op_type == "Gather" and used == [1]:
                return table_rows(node.input[0]), None
            if node.op_type.endswith("EmbedLayerNormalization") and used[0] == 0:
                return table_rows(node.input[2]), table_rows(node.input[3])
            if node.op_type in _PASS_THROUGH:
                nxt.update(node.output)
        if not nxt:
            break
        names = nxt
    return None, None


def _pytorch(folder: Path, threads: int, ready: Callable[[], None]) -> Target:
    from shrinkwrap.serve.extras import require_train

    require_train(f"{folder}: a PyTorch model folder")
    import torch
    import transformers.models.auto.modeling_auto  # noqa: F401  (imported before `ready`, see load_target)

    from shrinkwrap.ml.int8 import load_int8
    from shrinkwrap.ml.models import model_inputs, to_torch
    from shrinkwrap.ml.tasks import of_folder

    torch.set_num_threads(threads)
    ready()
    task = of_folder(folder)
    if (folder / INT8_WEIGHTS).exists():
        model, files = load_int8(folder), [folder / INT8_WEIGHTS]
    else:
        model, files = task.load(str(folder)), sorted(folder.glob("*.safetensors"))

    names = model_inputs(model.config)

    @torch.inference_mode()
    def outputs(batch):  # only the inputs the model takes: a tokenizer may give segment ids it has no use for
        return task.outputs(model(**to_torch({k: v for k, v in batch.items() if k in names}))).float().numpy()

    return Target("pytorch", folder, files, outputs, names, tokenizer_dir=folder,
                  extra={"vocab_size": getattr(model.config, "vocab_size", None)},
                  label_names=labels_of_config(model.config.to_dict()) if task.NAME == "classification" else None,
                  max_length=getattr(model.config, "max_position_embeddings", None), task=task.NAME)


def _onnx(path: Path, threads: int, ready: Callable[[], None], spin: bool = True) -> Target:
    import onnx  # noqa: F401  (imported before `ready`, see load_target; vocab_size reads the graph)
    import onnxruntime  # noqa: F401

    from shrinkwrap.serve.quantization import batch_dependent_ops
    from shrinkwrap.serve.sessions import check_external_data, run_outputs, session

    external = check_external_data(path)  # before ONNX Runtime opens anything the graph points to
    dependent = tuple(batch_dependent_ops(path))
    ready()
    try:
        sess = session(path, threads, spin=spin)
    except Exception as e:  # onnxruntime raises its own exception types for a graph it cannot load
        raise UserError(f"{path}: ONNX Runtime cannot load it — {(str(e).splitlines() or [''])[0][:300]}") from None
    files = [path] + external
    tok = path.parent if (path.parent / TOKENIZER_FILE).exists() else None
    # A graph written by the chain has its model's config.json beside it: label names and positions.
    config = read_json_or_none(path.parent / CONFIG_FILE)
    config = config if isinstance(config, dict) else {}
    outputs = sess.get_outputs()
    # a sentence encoder's graph ends in its pooled vector (shrinkwrap.ml.embedding.finish_graph)
    encoder = outputs[0].name == SENTENCE_OUTPUT or (path.parent / POOLING_FILE).is_file()
    has_head = len(outputs[0].shape) == 2 and not encoder   # [batch, classes]; token vectors are [batch, tokens, hidden]
    return Target("onnx", path, files, lambda b: run_outputs(sess, b), [i.name for i in sess.get_inputs()],
                  tokenizer_dir=tok, extra={"session": sess},
                  label_names=labels_of_config(config) if has_head else None,
                  max_length=config.get("max_position_embeddings"), batch_dependent=dependent,
                  task="embedding" if encoder else "classification")


def _artifact(folder: Path, threads: int, ready: Callable[[], None], spin: bool = True) -> Target:
    """An artifact: its hashes are checked before anything is loaded; labels and max length are its own."""
    from shrinkwrap.serve import tasks
    from shrinkwrap.serve.artifact import verify

    manifest = verify(folder)
    target = _onnx(folder / MODEL_FILE, threads, ready, spin)
    info = tasks.of_manifest(manifest).read(folder, manifest)  # what the artifact's task keeps beside its graph
    target.label_names = info.get("labels")
    target.max_length = manifest["tokenizer"]["max_length"]
    target.extra["manifest"] = manifest
    target.task = tasks.of_manifest(manifest).NAME
    target.temperature = info.get("temperature", 1.0)
    return target


def size_of(folder: Path) -> int:
    """Bytes of a step folder's model files, as a loaded target counts them (its graph and any external data, or
    its weights), without loading it."""
    folder = Path(folder)
    if (folder / MODEL_FILE).exists():
        from shrinkwrap.serve.sessions import check_external_data

        return sum(f.stat().st_size for f in [folder / MODEL_FILE, *check_external_data(folder / MODEL_FILE)])
    int8 = folder / INT8_WEIGHTS
    return int8.stat().st_size if int8.exists() else sum(f.stat().st_size for f in folder.glob("*.safetensors"))


def load_target(path: str | Path, threads: int = 2, ready: Callable[[], None] = lambda: None,
                spin: bool = True) -> Target:
    """Loads the target at `path`. `ready` is called once the runtime's libraries are imported and
    before the model is read, so that load time and memory measured from there are the model's own,
    not the one-off cost of a first import in this process. spin=False: an ONNX session's idle threads
    sleep instead of busy-waiting (several sessions timed in turn would otherwise slow each other)."""
    path = Path(path)
    if not path.exists():
        raise UserError(f"{path}: no such file or folder — expected a transformers folder, a folder with "
                        f"{MODEL_FILE}, or a .onnx file")
    if path.is_file() and path.suffix == ".onnx":
        return _onnx(path, threads, ready, spin)
    if path.is_dir() and is_artifact(path):
        return _artifact(path, threads, ready, spin)
    if path.is_dir() and (path / MODEL_FILE).exists():
        return _onnx(path / MODEL_FILE, threads, ready, spin)
    if path.is_dir() and (path / CONFIG_FILE).exists():
        return _pytorch(path, threads, ready)
    raise UserError(f"{path}: not a benchmark target — expected a transformers folder, a folder with {MODEL_FILE}, "
                    f"or a .onnx file")
