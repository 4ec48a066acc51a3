"""Operations a BERT-family encoder does per forward pass, from its config.

Counted as 2 operations per multiply-accumulate of the matrix products (the usual convention);
softmax, LayerNorm, GELU and the embedding lookup are left out (they are a few per cent of the total
at these widths). Per layer, with n tokens, width H, feed-forward width I:
    query, key, value, output projections   4 · 2·n·H·H
    scores Q·Kᵀ and weights·V                2 · 2·n·n·H
    feed-forward up and down                 2 · 2·n·H·I
"""
from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class MatMul:
    name: str
    m: int          # rows of the activation (batch × tokens)
    k: int          # inner dimension
    n: int          # columns of the weight
    count: int      # how many such products per forward pass
    weight: bool    # a product with a weight matrix (quantised to int8) or between activations

    @property
    def ops(self) -> int:
        return 2 * self.m * self.k * self.n * self.count


def encoder_matmuls(config, batch_size: int, sequence_length: int) -> list[MatMul]:
    """The matrix products of one forward pass, grouped by shape. Reads per-layer head counts after
    pruning (config.pruned_heads) and the feed-forward width from the config."""
    h = config.hidden_size
    inter = config.intermediate_size
    layers = config.num_hidden_layers
    heads = config.num_attention_heads
    head_dim = h // heads
    pruned = {int(k): len(v) for k, v in (getattr(config, "pruned_heads", None) or {}).items()}
    rows = batch_size * sequence_length
    kept = [heads - pruned.get(i, 0) for i in range(layers)]
    out = []
    for width in sorted(set(kept)):
        n_layers = kept.count(width)
        attn = width * head_dim
        out += [
            MatMul(f"qkv {h}->{attn}", rows, h, attn, 3 * n_layers, True),
            MatMul(f"attention output {attn}->{h}", rows, attn, h, n_layers, True),
            # per head: scores [n, d] x [d, n] and weights [n, n] x [n, d]; batch and heads as count
            MatMul("scores Q·K", sequence_length, head_dim, sequence_length, batch_size * width * n_layers, False),
            MatMul("weights·V", sequence_length, sequence_length, head_dim, batch_size * width * n_layers, False),
        ]
    out += [
        MatMul(f"feed-forward up {h}->{inter}", rows, h, inter, layers, True),
        MatMul(f"feed-forward down {inter}->{h}", rows, inter, h, layers, True),
    ]
    return out


def ops_per_forward(config, batch_size: int, sequence_length: int) -> int:
    return sum(m.ops for m in encoder_matmuls(config, batch_size, sequence_length))
