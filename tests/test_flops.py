"""Operation counts from the config, checked against PyTorch's own FLOP counter."""
import pytest
import torch


@pytest.mark.parametrize("batch,length", [(1, 16), (2, 24)])
def test_ops_match_torch_flop_counter(batch, length):
    # Reference: torch.utils.flop_counter.FlopCounterMode counts 2 FLOPs per multiply-accumulate of
    # every mm / bmm / addmm / attention call that actually runs.
    from torch.utils.flop_counter import FlopCounterMode
    from transformers import BertConfig, BertModel

    from shrinkwrap.bench.flops import ops_per_forward

    # eager attention: its two matrix products run as plain matmuls that the counter sees
    cfg = BertConfig(vocab_size=100, hidden_size=64, num_hidden_layers=3, num_attention_heads=4,
                     intermediate_size=128, max_position_embeddings=64, attn_implementation="eager")
    model = BertModel(cfg, add_pooling_layer=False).eval()
    ids = torch.randint(0, 100, (batch, length))
    with torch.no_grad(), FlopCounterMode(display=False) as counter:
        model(input_ids=ids, attention_mask=torch.ones_like(ids))
    assert ops_per_forward(cfg, batch, length) == counter.get_total_flops()


def test_pruned_heads_reduce_the_count():
    from transformers import BertConfig

    from shrinkwrap.bench.flops import ops_per_forward

    cfg = BertConfig(hidden_size=64, num_hidden_layers=2, num_attention_heads=4, intermediate_size=128)
    full = ops_per_forward(cfg, 1, 32)
    cfg.pruned_heads = {0: [1, 2]}
    pruned = ops_per_forward(cfg, 1, 32)
    head_dim, rows = 16, 32
    # two heads fewer in layer 0: their q, k, v and output columns and their two attention products
    removed = 2 * (2 * rows * 64 * head_dim * 3 + 2 * rows * head_dim * 64 + 2 * 2 * 32 * 32 * head_dim)
    assert full - pruned == removed
