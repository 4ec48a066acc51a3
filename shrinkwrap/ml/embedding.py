"""The embedding task on the training side: a sentence encoder — a transformers encoder without a head whose token
vectors are pooled into one vector per text (the mean over the text's tokens, the first token's, or the largest of
each dimension), L2-normalised when the encoder is used so. A student learns to give the teacher's vector for the
same text (mean-squared error to it, Reimers & Gurevych 2020, "Making Monolingual Sentence Embeddings Multilingual
using Knowledge Distillation"; a cosine term as an option), so that an index built with the teacher still answers
queries embedded by the student.

Every task answers the same names (shrinkwrap.ml.tasks). The teacher is used as is: nothing is fine-tuned."""
from __future__ import annotations

import json
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Optional

import numpy as np
import torch
from torch import nn
from torch.nn import functional as F

from shrinkwrap.serve.embedding import POOLING_FILE, POOLINGS, SENTENCE_OUTPUT, read_pooling

__all__ = ["POOLING_FILE", "POOLINGS", "read_pooling"]  # how a folder pools is read on the serving side, torch-free

NAME = "embedding"
EXPORT_TASK = "feature-extraction"   # the exporter's name for the encoder's graph: inputs -> token vectors
OUTPUTS = "vectors"                  # what the outputs are called (the teacher-outputs cache's file name)
FINE_TUNES = False                   # the teacher is a sentence encoder used as is
PARITY_KEY = "max_abs_diff"          # an export's largest gap to PyTorch, which export.parity_tolerance bounds
IMPORTANCE_LOSS = "mean-squared error to the teacher's vectors"   # what pruning's importance is the gradient of


def pool(hidden: torch.Tensor, mask: torch.Tensor, how: str) -> torch.Tensor:
    """One vector per text from its token vectors [batch, tokens, width], padding (mask 0) left out."""
    m = mask.unsqueeze(-1).to(hidden.dtype)
    if how == "mean":
        return (hidden * m).sum(1) / m.sum(1).clamp(min=1e-9)
    if how == "cls":
        return hidden[:, 0]
    if how == "max":
        return hidden.masked_fill(m == 0, torch.finfo(hidden.dtype).min).max(1).values
    raise ValueError(f"pooling {how!r}: one of {POOLINGS}")


@dataclass
class EncoderOutput:
    vectors: torch.Tensor
    hidden_states: Optional[tuple] = None
    attentions: Optional[tuple] = None


class SentenceEncoder(nn.Module):
    """A transformers encoder with its pooling: what every step of an embedding run loads, trains and saves. It
    answers what the steps ask of a model (config, base_model, the input embeddings, head pruning, saving)."""

    def __init__(self, encoder: nn.Module, pooling: str, normalize: bool):
        super().__init__()
        self.encoder, self.pooling, self.normalize = encoder, pooling, bool(normalize)
        pooler = getattr(encoder, "pooler", None)
        if pooler is not None:  # the encoder's own pooler (a layer on the first token) plays no part in the vector:
            pooler.requires_grad_(False)  # frozen, so that data-parallel training waits for no gradient of it

    @property
    def config(self):
        return self.encoder.config

    @property
    def base_model(self) -> nn.Module:
        return self.encoder.base_model

    def forward(self, input_ids, attention_mask, output_hidden_states: bool = False, output_attentions: bool = False,
                **rest) -> EncoderOutput:
        out = self.encoder(input_ids=input_ids, attention_mask=attention_mask, output_hidden_states=output_hidden_states,
                           output_attentions=output_attentions, return_dict=True, **rest)
        vectors = pool(out.last_hidden_state, attention_mask, self.pooling)
        if self.normalize:
            vectors = F.normalize(vectors, dim=-1)
        return EncoderOutput(vectors, out.hidden_states, out.attentions)

    def get_input_embeddings(self):
        return self.encoder.get_input_embeddings()

    def set_input_embeddings(self, value) -> None:
        self.encoder.set_input_embeddings(value)

    def prune_heads(self, heads: dict) -> None:
        self.encoder.prune_heads(heads)

    def save_pretrained(self, folder, **kwargs) -> None:
        self.encoder.save_pretrained(folder, **kwargs)
        save_config(self, folder)


def _auto():
    from transformers import AutoModel

    return AutoModel


def load(path: str, label_names: Optional[list[str]] = None, trust_remote_code: bool = False,
         pooling: Optional[dict] = None) -> SentenceEncoder:
    """A sentence encoder from a transformers folder (safetensors only), pooled as `pooling` says ({"pooling",
    "normalize"}: a pre-trained student pools as its teacher does) or else as its folder says (pooling.json, or its
    sentence-transformers configuration). `label_names` plays no part: an encoder has no head."""
    from shrinkwrap.ml.models import check_model_folder

    if trust_remote_code:
        warnings.warn("trust_remote_code is on: code shipped with the model will run")
    if Path(path).is_dir():
        check_model_folder(Path(path))
    how = pooling or read_pooling(Path(path))
    if how is None:
        raise ValueError(f"{path}: no pooling.json or sentence-transformers pooling configuration, and none given")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        encoder = _auto().from_pretrained(path, use_safetensors=True, trust_remote_code=trust_remote_code)
    return SentenceEncoder(encoder, how["pooling"], how["normalize"]).eval()


def from_config(config, like: Optional[SentenceEncoder] = None) -> SentenceEncoder:
    """An encoder of `config` with random weights, pooled as `like` (the teacher) is."""
    return SentenceEncoder(_auto().from_config(config), like.pooling if like else "mean", bool(like and like.normalize))


def empty(config) -> SentenceEncoder:
    """An encoder of `config` on the meta device: its structure, without memory or weights."""
    with torch.device("meta"), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return SentenceEncoder(_auto().from_config(config), "mean", False)


def skeleton(folder: Path, config) -> SentenceEncoder:
    """An encoder shaped as the one saved in `folder` (random weights, for a state dict to fill), pooled as it is."""
    how = read_pooling(folder) or {"pooling": "mean", "normalize": False}
    return SentenceEncoder(_auto().from_config(config), how["pooling"], how["normalize"])


def save_config(model: SentenceEncoder, folder: Path) -> None:
    """What a folder needs beside its weights or graph for the model to be read back: its config and pooling."""
    model.config.save_pretrained(folder)
    write_pooling(folder, {"pooling": model.pooling, "normalize": model.normalize})


def write_pooling(folder: Path, how: dict) -> None:
    """folder/pooling.json: how the encoder saved there pools ({"pooling", "normalize"})."""
    (Path(folder) / POOLING_FILE).write_text(json.dumps({"pooling": how["pooling"], "normalize": bool(how["normalize"])}),
                                             encoding="utf-8")


def importance_targets(ctx, n: int) -> np.ndarray:
    """What pruning ranks heads and neurons against on the first `n` training texts: the teacher's vectors."""
    import sys

    from shrinkwrap.ml.train import predict_outputs

    teacher = load(str(ctx.teacher_dir))
    return predict_outputs(teacher, ctx.encoded["train"][:n], ctx.pad_id, task=sys.modules[__name__])


def exportable(model: SentenceEncoder) -> nn.Module:
    """What the ONNX exporter is given: the encoder (its graph ends in the token vectors; finish_graph pools)."""
    return model.encoder


def outputs(output: EncoderOutput) -> torch.Tensor:
    """What the model gives for a batch: one (pooled, maybe normalised) vector per text, [batch, width]."""
    return output.vectors


def width(config) -> int:
    return config.hidden_size


def default_metric(recipe) -> str:
    """The validation figure a student stops on: its mean cosine to the teacher's vectors."""
    return "cosine"


def distillation_loss(student: torch.Tensor, teacher: torch.Tensor, labels: torch.Tensor, cfg) -> torch.Tensor:
    """Mean-squared error to the teacher's vectors (Reimers & Gurevych 2020), plus cfg.cosine_weight × (1 − cosine)
    when set; labels play no part."""
    loss = F.mse_loss(student, teacher)
    weight = getattr(cfg, "cosine_weight", 0.0)
    if weight:
        loss = loss + weight * (1 - F.cosine_similarity(student, teacher, dim=-1)).mean()
    return loss


def importance_loss(outputs: torch.Tensor, targets: torch.Tensor) -> torch.Tensor:
    """The loss whose gradients rank heads and neurons for pruning: the distillation loss to the teacher's
    vectors (`targets`), as the student is trained."""
    return F.mse_loss(outputs, targets)


def cosines(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Row-wise cosine similarity of two [n, width] arrays."""
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    norms = np.linalg.norm(a, axis=1) * np.linalg.norm(b, axis=1)
    return (a * b).sum(1) / np.maximum(norms, 1e-12)


def validation(outputs: np.ndarray, labels, reference: Optional[np.ndarray] = None) -> dict:
    """An epoch's validation figure: the mean cosine of the student's vectors to the teacher's (`reference`)."""
    if reference is None:
        raise RuntimeError("an embedding student is judged against the teacher's validation vectors")
    return {"cosine": float(cosines(outputs, reference).mean())}


def collapsed(outputs: np.ndarray, labels, share: float, epoch: int) -> Optional[str]:
    return None  # no classes to crowd into


def no_better_than_chance(best: Optional[dict], labels) -> Optional[str]:
    return None if best else "no epoch was evaluated"


def parity(graph: np.ndarray, torch_outputs: np.ndarray) -> dict:
    """An exported graph's vectors against PyTorch's on the same texts: the largest gap, and the lowest cosine."""
    return {"max_abs_diff": float(np.abs(graph - torch_outputs).max()),
            "min_cosine": float(cosines(graph, torch_outputs).min())}


def agreement(fp32: np.ndarray, int8: np.ndarray) -> dict:
    """An int8 graph's vectors against the fp32 graph's it was made from: their mean and lowest cosine."""
    c = cosines(fp32, int8)
    return {"cosine_with_fp32": float(c.mean()), "min_cosine_with_fp32": float(c.min())}


def finish_graph(path: Path, model: SentenceEncoder) -> None:
    """Ends the exported encoder's graph in the sentence vector, as the model computes it: the token vectors pooled
    over the attention mask (and L2-normalised when the model is), so that a plain ONNX Runtime client gets the
    vector. The graph's only output becomes `sentence_embedding` [batch, width]."""
    import onnx
    from onnx import TensorProto, helper

    graph_model = onnx.load(str(path))
    g = graph_model.graph
    tokens = next((o.name for o in g.output if o.name == "last_hidden_state"), g.output[0].name)  # [batch, tokens, width]
    mask = next(i.name for i in g.input if "attention_mask" in i.name)
    nodes, out = [], SENTENCE_OUTPUT

    def add(op, inputs, name, **attrs):
        nodes.append(helper.make_node(op, inputs, [name], name=name, **attrs))
        return name

    opset = next(o.version for o in graph_model.opset_import if o.domain in ("", "ai.onnx"))
    axes = {}

    def axis(k):  # an axes initializer, added once when first used
        if k not in axes:
            axes[k] = f"pool_axis_{'last' if k < 0 else k}"
            g.initializer.append(helper.make_tensor(axes[k], TensorProto.INT64, [1], [k]))
        return axes[k]

    def reduce(op, x, k, name, keepdims):  # axes are an input from opset 18 (ReduceSum: 13), else an attribute
        if op == "ReduceSum" or opset >= 18:
            return add(op, [x, axis(k)], name, keepdims=keepdims)
        return add(op, [x], name, keepdims=keepdims, axes=[k])

    pooled = f"pooled_{model.pooling}"
    if model.pooling == "cls":
        g.initializer.append(helper.make_tensor("cls_index", TensorProto.INT64, [], [0]))
        add("Gather", [tokens, "cls_index"], pooled, axis=1)
    else:
        m = add("Unsqueeze", [add("Cast", [mask], "pool_mask_f", to=TensorProto.FLOAT), axis(-1)], "pool_mask_3d")
        if model.pooling == "mean":
            total = reduce("ReduceSum", add("Mul", [tokens, m], "pool_masked"), 1, "pool_sum", 0)
            count = add("Clip", [reduce("ReduceSum", m, 1, "pool_count_raw", 0), "pool_eps"], "pool_count")
            g.initializer.append(helper.make_tensor("pool_eps", TensorProto.FLOAT, [], [1e-9]))
            add("Div", [total, count], pooled)
        else:  # max over the real tokens: padding set to the lowest float first
            low = helper.make_tensor("pool_low", TensorProto.FLOAT, [], [float(np.finfo(np.float32).min)])
            one = helper.make_tensor("pool_one", TensorProto.FLOAT, [], [1.0])
            g.initializer.extend([low, one])
            off = add("Mul", [add("Sub", ["pool_one", m], "pool_pad"), "pool_low"], "pool_offset")
            reduce("ReduceMax", add("Add", [add("Mul", [tokens, m], "pool_kept"), off], "pool_filled"), 1, pooled, 0)
    if model.normalize:
        # sqrt of a ReduceSum of squares rather than ReduceL2, whose axes input ONNX Runtime's shape inference misses
        squares = reduce("ReduceSum", add("Mul", [pooled, pooled], "pool_squares"), -1, "pool_norm_sq", 1)
        norm = add("Clip", [add("Sqrt", [squares], "pool_norm_raw"), "pool_tiny"], "pool_norm")
        g.initializer.append(helper.make_tensor("pool_tiny", TensorProto.FLOAT, [], [1e-12]))
        add("Div", [pooled, norm], out)
    else:
        add("Identity", [pooled], out)
    g.node.extend(nodes)
    # the token vectors stay typed (shape inference, ONNX Runtime's optimizer) once they are no longer an output
    g.value_info.extend(o for o in g.output if o.name == tokens)
    g.value_info.append(helper.make_tensor_value_info(pooled, TensorProto.FLOAT, ["batch_size", model.config.hidden_size]))
    del g.output[:]
    g.output.append(helper.make_tensor_value_info(out, TensorProto.FLOAT, ["batch_size", model.config.hidden_size]))
    onnx.save(graph_model, str(path))
    onnx.checker.check_model(str(path), full_check=True)
