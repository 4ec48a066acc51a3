"""The training loop's behaviours (shrinkwrap/train.py), each on a 1-layer random BERT in about a second:
early stopping with patience and the best epoch restored, the learning-rate schedule, gradient clipping;
and the teacher's choice of the best seed by the validation metric."""
import copy
import math

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from transformers import BertConfig, BertForSequenceClassification

import shrinkwrap.ml.classification as classification
import shrinkwrap.ml.train as train
from shrinkwrap.ml.train import FitResult, TrainSettings, fit

N_TRAIN, N_VAL, K = 40, 12, 3


def _model():
    torch.manual_seed(0)
    cfg = BertConfig(vocab_size=50, hidden_size=16, num_hidden_layers=1, num_attention_heads=2,
                     intermediate_size=32, max_position_embeddings=32, num_labels=K)
    return BertForSequenceClassification(cfg)


def _examples(n, seed):
    rng = np.random.default_rng(seed)
    ex = [{"input_ids": [1, *rng.integers(2, 50, 6).tolist()], "attention_mask": [1] * 7} for _ in range(n)]
    return ex, rng.integers(0, K, n)


def _ce(model, batch, labels, _idx):
    return F.cross_entropy(model(**batch).logits, labels)


def _settings(**kw):
    base = dict(epochs=3, learning_rate=1e-3, batch_size=8, collapse_share=1.0, stall_steps=0)
    return TrainSettings(**(base | kw))


def _fit(s, loss_fn=_ce, model=None):
    model = model or _model()
    tr, ytr = _examples(N_TRAIN, 0)
    va, yva = _examples(N_VAL, 1)
    return model, fit(model, tr, ytr, va, yva, loss_fn, s, pad_id=0)


def test_stops_patience_epochs_after_the_peak_and_restores_the_best_epoch(monkeypatch):
    # A scripted validation curve that peaks at epoch 3: with patience 2 the loop must run epochs 4 and 5
    # (two without improvement), stop there rather than at the 10th, and hand back epoch 3's weights.
    # Expected values worked out from the definition of patience (Prechelt, "Early Stopping — But When?",
    # 1998: stop after `patience` evaluations without improvement; keep the best).
    scripted = [0.40, 0.55, 0.90, 0.60, 0.70, 0.95, 0.95, 0.95, 0.95, 0.95]
    weights_at_eval = []
    real_predict = train.predict_outputs

    def recording_predict(model, *a, **kw):
        weights_at_eval.append(copy.deepcopy(model.state_dict()))
        return real_predict(model, *a, **kw)

    def scripted_metrics(labels, preds, n):
        e = len(weights_at_eval)
        return {"accuracy": scripted[e - 1], "macro_f1": scripted[e - 1]}

    monkeypatch.setattr(train, "predict_outputs", recording_predict)
    monkeypatch.setattr(classification, "classification_metrics", scripted_metrics)
    model, result = _fit(_settings(epochs=10, patience=2))
    assert [c["epoch"] for c in result.curve] == [1, 2, 3, 4, 5]
    assert result.best_epoch == 3 and result.best_metric == pytest.approx(0.90)
    final = model.state_dict()
    assert all(torch.equal(final[k], weights_at_eval[2][k]) for k in final)          # epoch 3's weights
    assert not all(torch.equal(final[k], weights_at_eval[4][k]) for k in final)      # not the last epoch's


def _recording_optimizer(monkeypatch):
    """Keeps the optimizer fit builds, and the total gradient norm seen by each of its steps."""
    seen = {"norms": []}
    real = train._optimizer

    def keep(model, s):
        opt = real(model, s)
        step = opt.step

        def recording_step(*a, **kw):
            grads = [p.grad.detach().double().flatten() for g in opt.param_groups for p in g["params"]
                     if p.grad is not None]
            seen["norms"].append(float(torch.cat(grads).norm()))   # the 2-norm over all parameters, by hand
            return step(*a, **kw)

        opt.step = recording_step
        seen["opt"] = opt
        return opt

    monkeypatch.setattr(train, "_optimizer", keep)
    return seen


def test_learning_rate_follows_linear_warm_up_and_decay(monkeypatch):
    seen = _recording_optimizer(monkeypatch)
    lrs = []

    def loss_recording_lr(model, batch, labels, idx):
        lrs.append(seen["opt"].param_groups[0]["lr"])
        return _ce(model, batch, labels, idx)

    lr, epochs, bs, warmup = 1e-3, 4, 8, 0.25
    _fit(_settings(epochs=epochs, batch_size=bs, learning_rate=lr, warmup_ratio=warmup, patience=99),
         loss_fn=loss_recording_lr)
    total = math.ceil(N_TRAIN / bs) * epochs          # 5 batches x 4 epochs = 20 optimizer steps
    w = int(warmup * total)                            # 5 warm-up steps
    # Hand-worked linear warm-up then linear decay (Devlin et al. 2019, BERT's schedule). Ours takes the
    # warm-up one step earlier than transformers' scheduler, which gives the very first step a rate of 0:
    # the t-th batch sees lr*(t+1)/w during warm-up, then lr*(total-t)/(total-w).
    by_hand = [lr * (t + 1) / w if t < w else lr * (total - t) / (total - w) for t in range(total)]
    assert lrs == pytest.approx(by_hand)
    # Source: transformers' own scheduler on a throw-away optimizer, stepped `total` times: identical in the
    # decay, and one step ahead of it during warm-up.
    ref_opt = torch.optim.SGD([torch.nn.Parameter(torch.zeros(1))], lr=lr)
    from transformers import get_linear_schedule_with_warmup
    ref = get_linear_schedule_with_warmup(ref_opt, w, total)
    expected = []
    for _ in range(total + 1):
        expected.append(ref_opt.param_groups[0]["lr"])
        ref_opt.step(), ref.step()
    assert lrs[:w] == pytest.approx(expected[1:w + 1])
    assert lrs[w:] == pytest.approx(expected[w:total])
    assert max(lrs) == pytest.approx(lr) and min(lrs) > 0


def test_gradients_are_clipped_to_max_grad_norm(monkeypatch):
    seen = _recording_optimizer(monkeypatch)

    def huge_loss(model, batch, labels, idx):      # gradients far above any sensible norm
        return 1e4 * _ce(model, batch, labels, idx)

    _fit(_settings(epochs=1, max_grad_norm=0.5), loss_fn=huge_loss)
    # torch.nn.utils.clip_grad_norm_ semantics: the total 2-norm is scaled down to max_norm (+1e-6 eps).
    assert seen["norms"] and max(seen["norms"]) <= 0.5 * (1 + 1e-4)
    assert min(seen["norms"]) > 0.5 * 0.99                 # they were above it, so clipping did the work


def test_teacher_keeps_the_seed_with_the_best_validation_metric(tmp_path, tiny_base, keyword_csv, monkeypatch):
    # fit is replaced by one that reports a scripted validation metric per seed and marks the model with
    # its seed; the step must keep seed 1 (best 0.9), not the first (0) nor the last (2).
    from conftest import tiny_recipe, write_recipe

    import shrinkwrap.chain.steps.teacher as finetune
    from shrinkwrap.chain.runner import run_chain
    from shrinkwrap.ml.classification import load as load_classifier
    from shrinkwrap.recipe.schema import load_recipe

    metric = {0: 0.6, 1: 0.9, 2: 0.7}

    def scripted_fit(model, *a, **kw):
        seed = a[-2].seed
        with torch.no_grad():
            model.classifier.bias.fill_(float(seed))
        return FitResult(curve=[{"epoch": 1, "accuracy": metric[seed], "macro_f1": metric[seed]}],
                         best_epoch=1, best_metric=metric[seed])

    monkeypatch.setattr(finetune, "fit", scripted_fit)
    recipe = load_recipe(write_recipe(tmp_path / "r.yaml", tiny_recipe(tiny_base, keyword_csv,
                                                                      teacher={"seeds": [0, 1, 2]})))
    results = run_chain(recipe, tmp_path / "run", quiet=True, until="teacher")
    info = results["steps"][0]["info"]
    assert info["kept_seed"] == 1
    assert [s["outcome"] for s in info["seeds"]] == ["worse", "kept", "worse"]
    saved = load_classifier(tmp_path / "run" / "teacher")
    assert torch.all(saved.classifier.bias == 1.0)


def test_length_grouped_order_is_a_permutation_with_batches_of_one_length_band(monkeypatch):
    # Hand-worked: 2 batches per group, batch size 2, 9 texts of lengths 0..8 in a random order. Each group
    # of 4 (the last of 1) is sorted longest first and cut in two; the full batches are shuffled, the short
    # one stays last. So every full batch holds two texts adjacent in their group's sorted order.
    monkeypatch.setattr(train, "GROUP_BATCHES", 2)
    lengths = np.arange(9) * 3 + 1
    order = np.array([4, 0, 7, 2, 8, 1, 6, 3, 5])
    got = train.length_grouped_order(order, lengths, 2, torch.Generator().manual_seed(0))
    assert sorted(got.tolist()) == list(range(9))
    batches = [sorted(got[i:i + 2].tolist(), reverse=True) for i in range(0, 8, 2)]
    assert sorted(map(tuple, batches)) == sorted([(7, 4), (2, 0), (8, 6), (3, 1)])
    assert got[-1] == 5  # the group of one text: the short batch, last


def test_length_grouped_batches_pad_less_and_are_the_ones_fit_trains_on(monkeypatch):
    # 40 texts of 2 to 31 tokens (the model's 32 positions) in a random order, batch size 4, groups of 5 batches: padded tokens per
    # epoch (each batch padded to its longest) fall by more than a fifth with grouping, and fit's first
    # epoch pads exactly the batches length_grouped_order gives from the run's seeded generator.
    # Padding = batch width × 4 − the batch's real tokens; grouping must cut it by more than half.
    monkeypatch.setattr(train, "GROUP_BATCHES", 5)
    rng = np.random.default_rng(0)
    lens = rng.integers(2, 32, 40)
    tr = [{"input_ids": [1, *rng.integers(2, 50, n - 1).tolist()], "attention_mask": [1] * n} for n in lens]
    ytr = (lens > 16).astype(np.int64)
    gen = torch.Generator().manual_seed(0)
    order = torch.randperm(40, generator=gen).numpy()
    grouped = train.length_grouped_order(order, lens, 4, gen)

    def widths(o):
        return [int(lens[o[i:i + 4]].max()) for i in range(0, len(o), 4)]
    def padding(o):
        return 4 * sum(widths(o)) - int(lens.sum())
    assert padding(grouped) < 0.5 * padding(order), (padding(grouped), padding(order))
    seen = []

    def loss(model, batch, labels, idx):
        seen.append(batch["input_ids"].shape[1])
        return _ce(model, batch, labels, idx)
    fit(_model(), tr, ytr, tr[:12], ytr[:12], loss, _settings(epochs=2, batch_size=4, length_grouped=True),
                 pad_id=0)
    assert len(seen) == 20  # two epochs of 10 batches (whether 2 epochs learn anything is not the point here)
    assert seen[:10] == widths(grouped)


def test_teacher_kl_is_the_kullback_leibler_divergence_of_scipy():
    # Reference: scipy.stats.entropy(pk, qk) = sum pk log(pk / qk), the Kullback-Leibler divergence in nats.
    from scipy.special import softmax
    from scipy.stats import entropy

    rng = np.random.default_rng(3)
    t, s = rng.normal(size=(9, 4)) * 3, rng.normal(size=(9, 4)) * 3
    expected = np.mean([entropy(softmax(a), softmax(b)) for a, b in zip(t, s)])
    assert classification.teacher_kl(t, s) == pytest.approx(expected, rel=1e-9)
    assert classification.teacher_kl(t, t) == pytest.approx(0.0, abs=1e-12)


def test_a_tie_on_the_metric_goes_to_the_epoch_closer_to_the_teacher(monkeypatch):
    # Validation accuracy scripted flat (every epoch ties), while the student is trained toward fixed
    # teacher logits on the validation texts themselves, so its KL to them falls. With the teacher's
    # logits the loop must keep the epoch of the smallest KL and run on while it falls; with only the
    # teacher's classes a tie is no improvement, and it stops `patience` epochs after epoch 1.
    monkeypatch.setattr(classification, "classification_metrics", lambda labels, preds, n: {"accuracy": 0.5, "macro_f1": 0.5})
    va, yva = _examples(N_VAL, 1)
    teacher_logits = np.random.default_rng(5).normal(size=(N_VAL, K)).astype(np.float32) * 4

    def toward_teacher(model, batch, labels, idx):
        target = torch.log_softmax(torch.from_numpy(teacher_logits[idx.numpy()]), 1)
        return F.kl_div(torch.log_softmax(model(**batch).logits, 1), target, log_target=True, reduction="batchmean")

    s = _settings(epochs=6, patience=2, learning_rate=3e-3)
    result = fit(_model(), va, yva, va, yva, toward_teacher, s, pad_id=0, reference=teacher_logits)
    kls = [c["teacher_kl"] for c in result.curve]
    assert kls[-1] < kls[0]                                              # the student did move toward the teacher
    assert result.best_epoch == int(np.argmin(kls)) + 1 and result.best_epoch > 1
    assert result.best_teacher_kl == pytest.approx(min(kls))

    classes_only = fit(_model(), va, yva, va, yva, toward_teacher, s, pad_id=0, reference=teacher_logits.argmax(1))
    assert classes_only.best_epoch == 1 and len(classes_only.curve) == 1 + s.patience
    assert "teacher_kl" not in classes_only.curve[0]
