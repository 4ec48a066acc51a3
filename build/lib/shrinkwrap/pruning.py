"""Structured pruning: which attention heads and feed-forward neurons matter least, and removing them.

Both are ranked the same way: a mask entry multiplies each head's output (ξ_h) and each feed-forward
neuron's activation (ν_j), all set to 1, and a unit's importance is the size of the loss's gradient
with respect to its mask entry, averaged over training batches.

- Heads: I_h = E |∂L/∂ξ_h| (Michel, Levy & Neubig 2019, "Are Sixteen Heads Really Better than One?"),
  through the head_mask argument transformers' BERT models take.
- Neurons: ∂L/∂ν_j at ν = 1 is Σ_tokens a_j · ∂L/∂a_j, gradient × activation: the first-order Taylor
  criterion of Molchanov et al. 2017 ("Pruning Convolutional Neural Networks for Resource Efficient
  Inference"), |·| averaged over batches as for heads.

As in Michel et al.'s own code, the absolute value is taken of each batch's gradient, and the loss
is the task's cross-entropy on labelled training texts. Every layer loses the same number of
units, so that one config (num_attention_heads with pruned_heads, intermediate_size) describes
every layer and the model saves and loads like any other.
"""
from __future__ import annotations

import math
import warnings

import numpy as np
import torch
from torch import nn
from torch.nn import functional as F

from shrinkwrap.batches import collate
from shrinkwrap.errors import UserError
from shrinkwrap.models import to_torch


def _layers(model: nn.Module) -> nn.ModuleList:
    from shrinkwrap.models import encoder_layers

    owner, name = encoder_layers(model)
    return getattr(owner, name)


def check_prune(recipe, teacher_config, where: str) -> None:
    """Refuses, before anything runs, a prune section the student cannot take."""
    cfg, st = recipe.prune, recipe.student
    if not cfg.enabled:
        return
    if getattr(teacher_config, "model_type", None) not in ("bert", None):
        raise UserError(f"{where}: prune.enabled — pruning supports BERT models; the teacher is "
                        f"{teacher_config.model_type!r}")
    heads = teacher_config.num_attention_heads
    if st.init == "config":
        heads = st.num_attention_heads or heads
    elif st.init == "pretrained":
        from transformers import AutoConfig

        try:
            student_config = AutoConfig.from_pretrained(str(recipe.resolve(st.base)))
        except (OSError, ValueError):
            return  # the check of student.base's tokenizer reports a missing or broken folder
        heads = student_config.num_attention_heads
        if getattr(student_config, "pruned_heads", None):
            raise UserError(f"{where}: prune.enabled — student.base = {st.base!r} has pruned heads already")
    if cfg.heads_removed >= heads:
        raise UserError(f"{where}: prune.heads_removed = {cfg.heads_removed} — the student has {heads} heads per "
                        f"layer; at least one must stay (0–{heads - 1})")


def importance(model: nn.Module, examples: list[dict], labels: np.ndarray, pad_id: int,
               batch_size: int) -> tuple[torch.Tensor, torch.Tensor]:
    """(heads [layers, heads], neurons [layers, width]): E_batches |∂L/∂mask| with L the mean
    cross-entropy of a batch, the model in eval mode (no dropout), its weights untouched."""
    layers = _layers(model)
    n_heads = model.config.num_attention_heads
    width = layers[0].intermediate.dense.out_features
    head_mask = torch.ones(len(layers), n_heads, requires_grad=True)
    neuron_mask = torch.ones(len(layers), width, requires_grad=True)
    heads, neurons = torch.zeros(len(layers), n_heads), torch.zeros(len(layers), width)

    def scale(i):
        return lambda module, inputs, output: output * neuron_mask[i]

    hooks = [layer.intermediate.register_forward_hook(scale(i)) for i, layer in enumerate(layers)]
    trainable = [p for p in model.parameters() if p.requires_grad]
    for p in trainable:  # only the masks' gradients are wanted
        p.requires_grad_(False)
    model.eval()
    batches = 0
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # sdpa's notice that it falls back to eager with a head mask
            for start in range(0, len(examples), batch_size):
                batch = to_torch(collate(examples[start:start + batch_size], pad_id))
                y = torch.as_tensor(labels[start:start + batch_size])
                loss = F.cross_entropy(model(**batch, head_mask=head_mask).logits, y)
                g_heads, g_neurons = torch.autograd.grad(loss, [head_mask, neuron_mask])
                heads += g_heads.abs()
                neurons += g_neurons.abs()
                batches += 1
    finally:
        for h in hooks:
            h.remove()
        for p in trainable:
            p.requires_grad_(True)
    return heads / max(1, batches), neurons / max(1, batches)


def least_important(scores: torch.Tensor, count: int) -> dict[int, list[int]]:
    """For each layer (row), the `count` units of lowest score, in increasing index order."""
    if count <= 0:
        return {}
    return {i: sorted(torch.argsort(row, stable=True)[:count].tolist()) for i, row in enumerate(scores)}


def neurons_to_remove(width: int, share: float) -> int:
    return int(math.floor(share * width))


def remove_heads(model: nn.Module, heads: dict[int, list[int]]) -> None:
    """Physically drops those heads' query/key/value rows and output columns (transformers' prune_heads,
    which also records them in config.pruned_heads so that the saved model loads with the same shapes)."""
    if heads:
        model.prune_heads(heads)


def remove_neurons(model: nn.Module, neurons: dict[int, list[int]]) -> None:
    """Drops those neurons: their rows of intermediate.dense and columns of output.dense. Every layer
    must lose the same number, so that config.intermediate_size describes them all."""
    from transformers.pytorch_utils import prune_linear_layer

    if not neurons:
        return
    counts = {len(v) for v in neurons.values()}
    layers = _layers(model)
    if len(counts) != 1 or len(neurons) != len(layers):
        raise ValueError("remove_neurons: every layer must lose the same number of neurons")
    for i, layer in enumerate(layers):
        width = layer.intermediate.dense.out_features
        keep = torch.as_tensor(sorted(set(range(width)) - set(neurons[i])))
        layer.intermediate.dense = prune_linear_layer(layer.intermediate.dense, keep, dim=0)
        layer.output.dense = prune_linear_layer(layer.output.dense, keep, dim=1)
    model.config.intermediate_size = layers[0].intermediate.dense.out_features
