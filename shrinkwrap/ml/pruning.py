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
from types import ModuleType
from typing import NamedTuple

import numpy as np
import torch
from torch import nn

from shrinkwrap.ml import classification
from shrinkwrap.ml.models import to_torch
from shrinkwrap.serve.batches import collate
from shrinkwrap.serve.errors import UserError


def _layers(model: nn.Module) -> nn.ModuleList:
    from shrinkwrap.ml.models import encoder_layers

    owner, name = encoder_layers(model)
    return getattr(owner, name)


# Families whose heads transformers can remove (prune_heads) and whose forward takes a head mask; and those
# whose feed-forward neurons we can remove (every layer's up and down projections found by feed_forward).
HEAD_FAMILIES = ("bert", "roberta", "xlm-roberta", "camembert", "electra", "distilbert")
NEURON_FAMILIES = HEAD_FAMILIES + ("mpnet", "deberta-v2", "modernbert")
# Why the others' heads stay. MPNet: tried, a pruned layer no longer adds up.
HEADS_KEPT_BECAUSE = {
    "mpnet": "its relative position bias is one per head of the whole model",
    "deberta-v2": "transformers cannot prune its heads",
    "modernbert": "transformers builds each of its layers with hidden_size / num_attention_heads-wide heads filling "
                  "the whole width, so a layer with fewer heads would not load, and its forward takes no head mask",
}


class FeedForward(NamedTuple):
    """One layer's feed-forward block: the up projection (owner, attribute name), the down projection, the module
    whose output is the activations a_j the down projection reads, and whether the up projection is gated: its
    output is two halves, values and gates, multiplied, so neuron j is its rows j and width + j (ModernBERT's GLU)."""
    up_owner: nn.Module
    up: str
    down_owner: nn.Module
    down: str
    activation: nn.Module
    gated: bool = False


def feed_forward(layer: nn.Module) -> FeedForward:
    """One layer's feed-forward block: intermediate.dense / output.dense (BERT-like, DeBERTa), ffn.lin1 / ffn.lin2
    (DistilBERT), mlp.Wi / mlp.Wo (ModernBERT, gated)."""
    if hasattr(layer, "intermediate") and hasattr(layer, "output"):  # the intermediate applies its activation inside
        return FeedForward(layer.intermediate, "dense", layer.output, "dense", layer.intermediate)
    if hasattr(layer, "ffn"):
        return FeedForward(layer.ffn, "lin1", layer.ffn, "lin2", layer.ffn.activation)
    if hasattr(layer, "mlp") and hasattr(layer.mlp, "Wi"):  # Wo(drop(act(values) * gates)): drop's output is a_j
        return FeedForward(layer.mlp, "Wi", layer.mlp, "Wo", layer.mlp.drop, gated=True)
    raise ValueError(f"{type(layer).__name__}: no feed-forward block found")


def ffn_width(model: nn.Module) -> int:
    block = feed_forward(_layers(model)[0])
    return getattr(block.down_owner, block.down).in_features


def check_prune(recipe, teacher_config, where: str) -> None:
    """Refuses, before anything runs, a prune section the student cannot take."""
    cfg, st = recipe.prune, recipe.student
    if not cfg.enabled:
        return
    family = getattr(teacher_config, "model_type", None)
    if family not in NEURON_FAMILIES and family is not None:
        raise UserError(f"{where}: prune.enabled — step student-pruned supports {', '.join(NEURON_FAMILIES)}; "
                        f"the teacher is {family!r}")
    if cfg.heads_removed and family not in HEAD_FAMILIES + (None,):
        why = HEADS_KEPT_BECAUSE.get(family, "transformers cannot prune its heads")
        raise UserError(f"{where}: prune.heads_removed = {cfg.heads_removed} — step student-pruned cannot remove "
                        f"attention heads of a {family!r} model ({why}); remove neurons only "
                        f"(prune.neurons_removed_share)")
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
               batch_size: int, heads_too: bool = True, task: ModuleType = classification) -> tuple[torch.Tensor, torch.Tensor]:
    """(heads [layers, heads], neurons [layers, width]): E_batches |∂L/∂mask| with L the task's importance loss
    of a batch (a classifier's mean cross-entropy), the model in eval mode (no dropout), its weights untouched.
    Without `heads_too` no head mask is passed (a family whose forward takes none) and head scores stay 0."""
    layers = _layers(model)
    n_heads = model.config.num_attention_heads
    width = ffn_width(model)
    head_mask = torch.ones(len(layers), n_heads, requires_grad=heads_too)
    neuron_mask = torch.ones(len(layers), width, requires_grad=True)
    heads, neurons = torch.zeros(len(layers), n_heads), torch.zeros(len(layers), width)

    def scale(i):
        return lambda module, inputs, output: output * neuron_mask[i]

    hooks = [feed_forward(layer).activation.register_forward_hook(scale(i)) for i, layer in enumerate(layers)]
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
                extra = {"head_mask": head_mask} if heads_too else {}
                loss = task.importance_loss(task.outputs(model(**batch, **extra)), y)
                grads = torch.autograd.grad(loss, [head_mask, neuron_mask] if heads_too else [neuron_mask])
                if heads_too:
                    heads += grads[0].abs()
                neurons += grads[-1].abs()
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
    """Drops those neurons: their rows of the up projection (both halves of a gated one) and columns of the down
    projection. Every layer must lose the same number, so that config.intermediate_size describes them all."""
    from transformers.pytorch_utils import prune_linear_layer

    if not neurons:
        return
    counts = {len(v) for v in neurons.values()}
    layers = _layers(model)
    if len(counts) != 1 or len(neurons) != len(layers):
        raise ValueError("remove_neurons: every layer must lose the same number of neurons")
    for i, layer in enumerate(layers):
        block = feed_forward(layer)
        width = getattr(block.down_owner, block.down).in_features
        keep = torch.as_tensor(sorted(set(range(width)) - set(neurons[i])))
        rows = torch.cat([keep, keep + width]) if block.gated else keep
        setattr(block.up_owner, block.up, prune_linear_layer(getattr(block.up_owner, block.up), rows, dim=0))
        setattr(block.down_owner, block.down, prune_linear_layer(getattr(block.down_owner, block.down), keep, dim=1))
    # DistilBERT calls the feed-forward width hidden_dim; the others intermediate_size.
    key = "hidden_dim" if model.config.model_type == "distilbert" else "intermediate_size"
    setattr(model.config, key, ffn_width(model))
