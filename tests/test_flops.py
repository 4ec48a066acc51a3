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


@pytest.mark.parametrize("heads,neurons", [({0: [1, 2], 2: [0]}, 32), ({1: [0, 1, 3]}, 0), ({}, 100)])
def test_pruned_model_count_matches_torch_flop_counter(heads, neurons):
    # Reference: torch's FlopCounterMode run on a model pruned by the project's own surgery (pruning.remove_heads
    # and remove_neurons), so the count from the pruned config must equal what the smaller matrices really do.
    from torch.utils.flop_counter import FlopCounterMode
    from transformers import BertConfig, BertForSequenceClassification

    from shrinkwrap.bench.flops import ops_per_forward
    from shrinkwrap.ml.pruning import remove_heads, remove_neurons

    cfg = BertConfig(vocab_size=100, hidden_size=64, num_hidden_layers=3, num_attention_heads=4,
                     intermediate_size=128, max_position_embeddings=64, attn_implementation="eager", num_labels=3)
    torch.manual_seed(0)
    model = BertForSequenceClassification(cfg).eval()
    remove_heads(model, heads)
    rng = __import__("random").Random(0)
    remove_neurons(model, {i: sorted(rng.sample(range(128), neurons)) for i in range(3)} if neurons else {})
    assert model.bert.encoder.layer[0].intermediate.dense.out_features == 128 - neurons
    model.bert.pooler = None   # the count is the encoder's (the pooler's one H x H product per text is left out)
    ids = torch.randint(0, 100, (2, 20))
    with torch.no_grad(), FlopCounterMode(display=False) as counter:
        model.bert(input_ids=ids, attention_mask=torch.ones_like(ids))
    assert ops_per_forward(model.config, 2, 20) == counter.get_total_flops()
