"""ModernBERT's insides (Warner et al. 2024, "Smarter, Better, Faster, Longer"): a student of kept layers keeps
each layer's own attention, global or over a sliding window, and its gated feed-forward block (GeGLU, Shazeer
2020) loses both halves of a neuron together. The whole chain on it runs in tests/test_families.py."""
from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.special import erf

WINDOW = 8  # local_attention: a token attends to the tokens within WINDOW / 2 positions of it


def tiny(layers: int = 6, intermediate: int = 24):
    """A random 6-layer ModernBERT classifier: layers 0 and 3 attend globally, the others to the window."""
    from transformers import ModernBertConfig, ModernBertForSequenceClassification

    torch.manual_seed(0)
    config = ModernBertConfig(vocab_size=120, hidden_size=32, intermediate_size=intermediate, num_hidden_layers=layers,
                              num_attention_heads=2, max_position_embeddings=64, global_attn_every_n_layers=3,
                              local_attention=WINDOW, pad_token_id=0, bos_token_id=1, eos_token_id=2, cls_token_id=1,
                              sep_token_id=2, num_labels=3)
    return ModernBertForSequenceClassification(config).eval()


def _masks(n: int):
    """The additive attention masks written out from the paper's definition: global attention sees every token;
    local attention sees only the tokens at most WINDOW / 2 positions away."""
    distance = np.abs(np.arange(n)[:, None] - np.arange(n)[None, :])
    everything = torch.zeros(1, 1, n, n)
    window = torch.from_numpy(np.where(distance <= WINDOW // 2, 0.0, torch.finfo(torch.float32).min)).float()
    return everything, window[None, None]


@torch.no_grad()
def test_kept_layers_keep_their_own_attention_kind_and_window(tmp_path):
    from shrinkwrap.ml.classification import load
    from shrinkwrap.ml.models import keep_layers

    teacher = tiny()
    kept = [0, 2, 3]  # global, sliding window, global
    student = keep_layers(teacher, kept)
    student.save_pretrained(tmp_path / "student", safe_serialization=True)
    loaded = load(str(tmp_path / "student"))
    assert loaded.config.global_attn_every_n_layers == 2 and loaded.config.local_attention == WINDOW

    n = 3 * WINDOW  # longer than the window, so that the window changes what a token sees
    ids = torch.randint(3, 120, (2, n))
    everything, window = _masks(n)
    positions = torch.arange(n)[None]
    # By hand: the teacher's embeddings, then its layers 0, 2 and 3 in turn, each with its own mask.
    h = teacher.model.embeddings(input_ids=ids)
    by_hand = []
    for i in kept:
        h = teacher.model.layers[i](h, attention_mask=everything, sliding_window_mask=window, position_ids=positions)[0]
        by_hand.append(h)
    # whether a layer uses the window or not is the teacher's rule (ModernBertConfig: every third layer global)
    assert [teacher.model.layers[i].attn.local_attention for i in kept] == [(-1, -1), (4, 4), (-1, -1)]
    got = loaded(input_ids=ids, output_hidden_states=True).hidden_states[1:]
    for layer, (a, b) in enumerate(zip(got, by_hand)):
        assert torch.allclose(a, b, atol=1e-5), f"student layer {layer}"
    # The same weights read with the teacher's own period (every 3rd layer global) make layer 2 windowed: it differs.
    loaded.config.global_attn_every_n_layers = 3
    loaded.save_pretrained(tmp_path / "wrong", safe_serialization=True)
    wrong = load(str(tmp_path / "wrong"))(input_ids=ids, output_hidden_states=True).hidden_states[3]
    assert not torch.allclose(wrong, by_hand[2], atol=1e-3)


@pytest.mark.parametrize("kept, why", [([1, 3], "the first kept layer must be layer 0"),
                                       ([0, 3, 4], "do not repeat with one period")])
def test_kept_layers_whose_kinds_a_student_cannot_hold_are_refused(kept, why):
    from shrinkwrap.ml.checks import check_layers
    from shrinkwrap.ml.models import global_attention_period
    from shrinkwrap.serve.errors import UserError

    config = tiny().config
    with pytest.raises(ValueError, match=why):
        global_attention_period(config, kept)
    with pytest.raises(UserError) as err:
        check_layers(config, "r.yaml", kept)
    message = str(err.value)
    assert "\n" not in message and message.startswith(f"r.yaml: student.layers = {kept} — a 'modernbert' student")
    hint = [int(i) for i in message.split("e.g. student.layers: [")[1].rstrip("]").split(", ")]
    assert len(hint) == len(kept) and global_attention_period(config, hint) >= 1  # the suggestion fits


def _gelu(x):
    """GELU as Hendrycks & Gimpel 2016 define it: x Φ(x), Φ the standard normal CDF."""
    return 0.5 * x * (1 + erf(x / np.sqrt(2)))


@torch.no_grad()
def test_pruning_a_gated_feed_forward_removes_both_halves_of_each_neuron(tmp_path):
    from shrinkwrap.ml.classification import load
    from shrinkwrap.ml.pruning import ffn_width, remove_neurons

    model = tiny(layers=2, intermediate=24)
    mlp = model.model.layers[1].mlp
    wi, wo = mlp.Wi.weight.double().numpy(), mlp.Wo.weight.double().numpy()
    x = torch.randn(5, 32)
    removed = {0: [0, 7, 23], 1: [1, 5, 20]}
    remove_neurons(model, removed)
    assert ffn_width(model) == 21 and model.config.intermediate_size == 21
    assert model.model.layers[1].mlp.Wi.weight.shape == (42, 32)
    # Reference: GeGLU(x) = (GELU(x V) * (x G)) W_out (Shazeer 2020), with V the first half of Wi's rows and G
    # the second, computed in numpy from the unpruned weights with the removed neurons' outputs set to zero.
    values, gates = x.double().numpy() @ wi[:24].T, x.double().numpy() @ wi[24:].T
    hidden = _gelu(values) * gates
    hidden[:, removed[1]] = 0
    expected = hidden @ wo.T
    got = model.model.layers[1].mlp(x).double().numpy()
    assert np.abs(got - expected).max() < 1e-5
    # the config describes the pruned shapes: saved and loaded, the model is the same one
    model.save_pretrained(tmp_path / "m", safe_serialization=True)
    ids = torch.randint(3, 120, (2, 20))
    assert torch.equal(load(str(tmp_path / "m"))(input_ids=ids).logits, model(input_ids=ids).logits)


def test_neuron_importance_of_a_gated_block_is_gradient_times_its_product():
    from torch.nn import functional as F

    from shrinkwrap.ml.pruning import importance

    model = tiny(layers=2)
    ids = torch.randint(3, 120, (4, 12))
    examples = [{"input_ids": row.tolist(), "attention_mask": [1] * 12} for row in ids]
    labels = np.array([0, 1, 2, 0])
    heads, neurons = importance(model, examples, labels, 0, batch_size=4, heads_too=False)
    assert neurons.shape == (2, 24) and float(heads.abs().sum()) == 0.0
    # By hand (Molchanov et al. 2017): a = GELU(values) * gates, what the down projection Wo reads;
    # importance = |sum over batch and tokens of a * dL/da|.
    kept = {}

    def keep(module, inputs):
        inputs[0].retain_grad()
        kept["a"] = inputs[0]

    hook = model.model.layers[1].mlp.Wo.register_forward_pre_hook(keep)
    F.cross_entropy(model(input_ids=ids, attention_mask=torch.ones_like(ids)).logits, torch.as_tensor(labels)).backward()
    hook.remove()
    by_hand = (kept["a"] * kept["a"].grad).sum(dim=(0, 1)).abs()
    assert torch.allclose(neurons[1], by_hand.detach(), rtol=1e-4, atol=1e-9)
