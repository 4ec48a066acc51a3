"""Structured pruning (step student-pruned): importance against brute-force checks, exact removal, and
the step in the chain down to ONNX."""
import json
import shutil
from collections import Counter

import numpy as np
import onnx
import pytest
import torch
from conftest import tiny_recipe, write_recipe
from torch.nn import functional as F

from shrinkwrap.ml.pruning import importance, least_important, remove_heads, remove_neurons
from shrinkwrap.serve.errors import UserError

HEAD = 16  # the tiny student: 2 layers, 2 heads of 16, feed-forward width 64


@pytest.fixture(scope="module")
def examples(tiny_run, tiny_base, keyword_csv, tmp_path_factory):
    from shrinkwrap.chain.preflight import prepare
    from shrinkwrap.recipe.schema import load_recipe

    folder = tmp_path_factory.mktemp("prune-data")
    ctx = prepare(load_recipe(write_recipe(folder / "r.yaml", tiny_recipe(tiny_base, keyword_csv))), folder / "run",
                  quiet=True)
    return ctx.encoded["train"][:8], ctx.data.train.labels[:8], ctx.pad_id


def _student(tiny_run):
    from shrinkwrap.ml.classification import load as load_classifier

    return load_classifier(str(tiny_run / "student"))


def _batch(examples):
    from shrinkwrap.ml.models import to_torch
    from shrinkwrap.serve.batches import collate

    ex, labels, pad = examples
    return to_torch(collate(ex, pad)), torch.as_tensor(labels)


def test_head_importance_equals_a_finite_difference_of_the_loss(tiny_run, examples):
    model = _student(tiny_run).double()  # float64 so that the difference quotient is accurate
    heads, _ = importance(model, *examples, batch_size=8)  # one batch: importance = |dL/d xi_h| exactly
    batch, y = _batch(examples)
    eps = 1e-5

    def loss(mask):
        with torch.no_grad():
            return F.cross_entropy(model(**batch, head_mask=mask).logits, y).item()

    for layer, head in ((0, 1), (1, 0)):
        # Central finite difference (L(xi_h = 1 + eps) - L(xi_h = 1 - eps)) / 2 eps, error O(eps^2).
        up, down = torch.ones(2, 2, dtype=torch.float64), torch.ones(2, 2, dtype=torch.float64)
        up[layer, head], down[layer, head] = 1 + eps, 1 - eps
        fd = (loss(up) - loss(down)) / (2 * eps)
        assert heads[layer, head].item() == pytest.approx(abs(fd), rel=1e-4, abs=1e-9)
    assert heads.shape == (2, 2) and bool((heads > 0).all())


def test_neuron_importance_is_gradient_times_activation(tiny_run, examples):
    model = _student(tiny_run)
    _, neurons = importance(model, *examples, batch_size=8)
    # By hand: keep the feed-forward activations a of layer 1, backpropagate, |sum over batch and tokens of a * dL/da|.
    kept = {}

    def keep(module, inputs, out):
        out.retain_grad()
        kept["a"] = out

    hook = model.bert.encoder.layer[1].intermediate.register_forward_hook(keep)
    batch, y = _batch(examples)
    model.eval()
    F.cross_entropy(model(**batch).logits, y).backward()
    hook.remove()
    a = kept["a"]
    by_hand = (a * a.grad).sum(dim=(0, 1)).abs()
    assert torch.allclose(neurons[1], by_hand.detach(), rtol=1e-4, atol=1e-9)
    # the model's own weights are untouched by measuring, and trainable again
    assert all(p.requires_grad for p in model.parameters())


def test_least_important_picks_the_lowest_scores_of_each_layer():
    scores = torch.tensor([[3.0, 1.0, 2.0, 9.0], [0.5, 5.0, 4.0, 0.1]])
    assert least_important(scores, 2) == {0: [1, 2], 1: [0, 3]}
    assert least_important(scores, 0) == {}


def test_pruning_removes_exactly_the_chosen_heads_and_neurons(tiny_run, tmp_path, examples):
    from shrinkwrap.ml.classification import load as load_classifier
    from shrinkwrap.ml.train import predict_outputs

    model = _student(tiny_run)
    before = {k: v.clone() for k, v in model.state_dict().items()}
    heads = {0: [1], 1: [0]}
    neurons = {0: list(range(0, 64, 4)), 1: list(range(48, 64))}
    remove_heads(model, heads)
    remove_neurons(model, neurons)
    sd = model.state_dict()
    for i in range(2):
        keep_rows = torch.cat([torch.arange(h * HEAD, (h + 1) * HEAD) for h in range(2) if h not in heads[i]])
        keep_neurons = torch.as_tensor(sorted(set(range(64)) - set(neurons[i])))
        p = f"bert.encoder.layer.{i}."
        for part in ("query", "key", "value"):
            assert sd[p + f"attention.self.{part}.weight"].shape == (HEAD, 32)  # fewer rows: less work
            assert torch.equal(sd[p + f"attention.self.{part}.weight"], before[p + f"attention.self.{part}.weight"][keep_rows])
            assert torch.equal(sd[p + f"attention.self.{part}.bias"], before[p + f"attention.self.{part}.bias"][keep_rows])
        assert torch.equal(sd[p + "attention.output.dense.weight"], before[p + "attention.output.dense.weight"][:, keep_rows])
        assert torch.equal(sd[p + "intermediate.dense.weight"], before[p + "intermediate.dense.weight"][keep_neurons])
        assert torch.equal(sd[p + "intermediate.dense.bias"], before[p + "intermediate.dense.bias"][keep_neurons])
        assert torch.equal(sd[p + "output.dense.weight"], before[p + "output.dense.weight"][:, keep_neurons])
        assert torch.equal(sd[p + "output.dense.bias"], before[p + "output.dense.bias"])
    assert model.config.intermediate_size == 48 and model.config.pruned_heads == heads
    # the config describes the pruned shapes: saved and loaded, the model is the same one
    model.save_pretrained(tmp_path / "m", safe_serialization=True)
    again = load_classifier(str(tmp_path / "m"))
    ex, _, pad = examples
    assert np.array_equal(predict_outputs(model, ex, pad), predict_outputs(again, ex, pad))
    with pytest.raises(ValueError, match="same number"):
        remove_neurons(again, {0: [0], 1: [0, 1]})


def test_units_that_contribute_nothing_prune_to_the_same_logits(tiny_run, examples):
    from shrinkwrap.ml.train import predict_outputs

    model = _student(tiny_run)
    heads, neurons = {0: [1], 1: [0]}, {0: [3, 7, 9], 1: [0, 1, 2]}
    with torch.no_grad():
        for i, layer in enumerate(model.bert.encoder.layer):
            for h in heads[i]:  # a head whose values are zero outputs zero
                layer.attention.self.value.weight[h * HEAD:(h + 1) * HEAD] = 0
                layer.attention.self.value.bias[h * HEAD:(h + 1) * HEAD] = 0
            layer.output.dense.weight[:, neurons[i]] = 0  # neurons whose outputs are ignored
    ex, _, pad = examples
    zeroed = predict_outputs(model, ex, pad)
    remove_heads(model, heads)
    remove_neurons(model, neurons)
    assert np.abs(predict_outputs(model, ex, pad) - zeroed).max() <= 1e-5


def test_pruned_step_in_the_chain_down_to_onnx(tiny_run, tmp_path, tiny_base, keyword_csv):
    from shrinkwrap.chain.runner import run_chain
    from shrinkwrap.recipe.schema import load_recipe

    for folder in ("teacher", "student", "cache"):  # the cache: the teacher's outputs the student learnt from
        shutil.copytree(tiny_run / folder, tmp_path / "run" / folder)
    recipe = load_recipe(write_recipe(tmp_path / "r.yaml", tiny_recipe(tiny_base, keyword_csv, prune={
        "enabled": True, "heads_removed": 1, "neurons_removed_share": 0.25, "epochs": 1},
        quantize={"enabled": False}, export={"optimize": "never"})))
    results = run_chain(recipe, tmp_path / "run", quiet=True, until="student-onnx")
    assert [s["name"] for s in results["steps"]] == ["teacher", "student", "student-pruned", "student-onnx"]
    info = results["steps"][2]["info"]
    scores = torch.tensor(info["head_importance"])
    assert info["heads_removed"] == {str(k): v for k, v in least_important(scores, 1).items()}
    assert info["before"]["heads_per_layer"] == 2 and info["after"]["heads_per_layer"] == 1
    assert info["after"]["intermediate_size"] == 48 and info["neurons_removed_per_layer"] == 16
    assert info["after"]["parameters"] < info["before"]["parameters"]
    assert info["recovery"]["teacher_outputs"]["cache"] == "hit"  # the student step's cache, reused
    record = json.loads((tmp_path / "run" / "student-onnx" / "step.json").read_text())
    assert record["after"] == "student-pruned"
    # The exported graph (which passed the parity check with PyTorch) has the pruned shapes: per layer, query,
    # key and value weights of 32 × 16 (one head of 16 kept of 2) and feed-forward weights 48 wide.
    graph = onnx.load(str(tmp_path / "run" / "student-onnx" / "model.onnx")).graph
    shapes = Counter(tuple(i.dims) for i in graph.initializer if len(i.dims) == 2)
    assert shapes[(32, 16)] == 6 and shapes[(16, 32)] == 2 and shapes[(32, 48)] == 2 and shapes[(48, 32)] == 2
    assert shapes[(32, 32)] == 1  # only the pooler is still square


def test_too_many_heads_is_refused_before_anything_runs(tmp_path, tiny_base, keyword_csv):
    from shrinkwrap.chain.runner import run_chain
    from shrinkwrap.recipe.schema import load_recipe

    recipe = load_recipe(write_recipe(tmp_path / "r.yaml", tiny_recipe(tiny_base, keyword_csv, prune={
        "enabled": True, "heads_removed": 2})))
    with pytest.raises(UserError, match=r"prune.heads_removed = 2 — the student has 2 heads per layer"):
        run_chain(recipe, tmp_path / "run", quiet=True)
    assert not (tmp_path / "run").exists()
