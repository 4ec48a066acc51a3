"""Distillation against the published formulas, and the student construction options."""
import json
import shutil

import numpy as np
import pytest
import torch
from conftest import tiny_recipe, write_recipe
from torch.nn import functional as F

from shrinkwrap.ml.losses import attention_loss, distillation_loss, hidden_state_loss, soft_label_loss
from shrinkwrap.ml.models import evenly_spaced, keep_layers
from shrinkwrap.serve.errors import UserError

# --- the soft-label loss: Hinton, Vinyals & Dean 2015, "Distilling the Knowledge in a Neural Network" ---

def test_soft_label_loss_worked_example_by_hand():
    # Teacher logits [2, 0], student logits [0, 0] (uniform student), worked by hand:
    # T = 1: p_t = [e^2/(e^2+1), 1/(e^2+1)] = [0.880797, 0.119203];
    #        KL = 0.880797*ln(0.880797/0.5) + 0.119203*ln(0.119203/0.5) = 0.498726 - 0.170912 = 0.327814
    # T = 2: p_t = softmax([1, 0]) = [0.731059, 0.268941];
    #        KL = 0.731059*ln(1.462117) + 0.268941*ln(0.537883) = 0.277719 - 0.166775 = 0.110944; * T^2 = 0.443776
    teacher, student = torch.tensor([[2.0, 0.0]]), torch.tensor([[0.0, 0.0]])
    assert soft_label_loss(student, teacher, 1.0).item() == pytest.approx(0.327814, abs=2e-6)
    assert soft_label_loss(student, teacher, 2.0).item() == pytest.approx(0.443776, abs=2e-6)


def test_soft_label_loss_equals_torch_kl_div_on_random_logits():
    # Reference: torch.nn.functional.kl_div(log q, p, reduction="batchmean") = KL(p || q) per example.
    g = torch.Generator().manual_seed(0)
    s, t = torch.randn(16, 5, generator=g) * 3, torch.randn(16, 5, generator=g) * 3
    for temp in (0.5, 1.0, 4.0):
        ref = F.kl_div(F.log_softmax(s / temp, -1), F.softmax(t / temp, -1), reduction="batchmean") * temp ** 2
        assert soft_label_loss(s, t, temp).item() == pytest.approx(ref.item(), rel=1e-5)


def test_soft_label_gradient_scales_as_the_paper_says():
    # Hinton et al. 2015, section 2, eq. 2: dC/dz_i = (1/T) (q_i - p_i) for the soft cross-entropy C;
    # with our T^2 factor the gradient is exactly T (q_i - p_i).
    # For zero-mean logits and high T it approaches (z_i - v_i) / (N T^2) before the factor, i.e.
    # (z_i - v_i) / N after it: the T^2 factor makes the gradient's magnitude independent of T.
    g = torch.Generator().manual_seed(1)
    n = 4
    z = torch.randn(1, n, generator=g)
    v = torch.randn(1, n, generator=g)
    z, v = z - z.mean(), v - v.mean()
    for temp in (0.5, 2.0, 100.0):
        zs = z.clone().requires_grad_(True)
        soft_label_loss(zs, v, temp).backward()
        exact = temp * (torch.softmax(z / temp, -1) - torch.softmax(v / temp, -1))
        assert torch.allclose(zs.grad, exact, rtol=1e-4, atol=1e-7)
        if temp == 100.0:
            assert torch.allclose(zs.grad, (z - v) / n, rtol=0.02, atol=1e-4)


def test_alpha_mixes_soft_and_hard_terms():
    g = torch.Generator().manual_seed(2)
    s, t = torch.randn(8, 3, generator=g), torch.randn(8, 3, generator=g)
    y = torch.randint(0, 3, (8,), generator=g)
    soft, hard = soft_label_loss(s, t, 2.0), F.cross_entropy(s, y)
    assert distillation_loss(s, t, y, 2.0, 0.3).item() == pytest.approx((0.3 * soft + 0.7 * hard).item(), rel=1e-6)
    assert distillation_loss(s, t, y, 2.0, 1.0).item() == pytest.approx(soft.item(), rel=1e-6)
    # unlabeled transfer texts (-1) count only through the soft term
    y_partial = y.clone()
    y_partial[:4] = -1
    expected = 0.3 * soft + 0.7 * F.cross_entropy(s[4:], y[4:])
    assert distillation_loss(s, t, y_partial, 2.0, 0.3).item() == pytest.approx(expected.item(), rel=1e-6)


def test_hidden_state_loss_equals_mse_over_real_tokens():
    g = torch.Generator().manual_seed(3)
    a, b = torch.randn(2, 5, 8, generator=g), torch.randn(2, 5, 8, generator=g)
    mask = torch.tensor([[1, 1, 1, 1, 1], [1, 1, 0, 0, 0]])
    keep = mask.bool()
    assert hidden_state_loss(a, b, mask).item() == pytest.approx(F.mse_loss(a[keep], b[keep]).item(), rel=1e-6)


def test_attention_loss_equals_kl_div_over_real_query_rows():
    g = torch.Generator().manual_seed(4)
    s = torch.softmax(torch.randn(2, 3, 4, 4, generator=g), -1)
    t = torch.softmax(torch.randn(2, 3, 4, 4, generator=g), -1)
    mask = torch.tensor([[1, 1, 1, 1], [1, 1, 1, 0]])
    rows_s = s.permute(0, 2, 1, 3)[mask.bool()].reshape(-1, 4)  # [real queries * heads, keys]
    rows_t = t.permute(0, 2, 1, 3)[mask.bool()].reshape(-1, 4)
    ref = F.kl_div(rows_s.log(), rows_t, reduction="batchmean")
    assert attention_loss(s, t, mask).item() == pytest.approx(ref.item(), rel=1e-5)


# --- building the student ---

def test_evenly_spaced_keeps_first_and_last_layer():
    assert evenly_spaced(6, 3) == [0, 2, 5]  # rounding of 0, 2.5, 5 — the last layer is always kept
    assert evenly_spaced(6, 2) == [0, 5]
    assert evenly_spaced(6, 1) == [5]
    assert evenly_spaced(4, 6) == [0, 1, 2, 3]


def test_keep_layers_copies_exactly_the_chosen_weights(tiny_base):
    from shrinkwrap.ml.classification import load as load_classifier

    teacher = load_classifier(str(tiny_base), label_names=["a", "b", "c"])
    before = {k: v.clone() for k, v in teacher.state_dict().items()}
    student = keep_layers(teacher, [1, 3])
    sd, td = student.state_dict(), teacher.state_dict()
    assert student.config.num_hidden_layers == 2 and len(student.bert.encoder.layer) == 2
    for k, v in sd.items():
        if ".encoder.layer." in k:
            i = int(k.split(".encoder.layer.")[1].split(".")[0])
            src = k.replace(f".encoder.layer.{i}.", f".encoder.layer.{[1, 3][i]}.", 1)
            assert torch.equal(v, td[src]), k
        else:
            assert torch.equal(v, td[k]), k  # embeddings, pooler, classifier
    assert all(torch.equal(before[k], v) for k, v in td.items())  # the teacher itself is untouched
    # the copy is deep: training the student cannot change the teacher
    student.bert.encoder.layer[0].output.dense.weight.data.add_(1.0)
    assert torch.equal(td["bert.encoder.layer.1.output.dense.weight"], before["bert.encoder.layer.1.output.dense.weight"])


# --- the student step in the chain ---

def _run_student(tmp_path, teacher_base, data, **student):
    from shrinkwrap.chain.runner import run_chain
    from shrinkwrap.recipe.schema import load_recipe

    recipe = tiny_recipe(teacher_base, data, student=student)
    return run_chain(load_recipe(write_recipe(tmp_path / "r.yaml", recipe)), tmp_path / "run", quiet=True,
                     until="student")


@pytest.fixture
def teacher_done(tiny_run, tmp_path):
    """A run folder whose teacher step is already finished (copied from the tiny run)."""
    (tmp_path / "run").mkdir()
    shutil.copytree(tiny_run / "teacher", tmp_path / "run" / "teacher")
    return tmp_path


def test_student_reports_agreement_and_teacher_output_cache(teacher_done, tiny_base, keyword_csv):
    results = _run_student(teacher_done, tiny_base, keyword_csv)
    student = results["steps"][1]
    assert student["name"] == "student"
    assert 0 <= student["agreement_with_teacher"] <= 1
    preds_t, preds_s = np.array(results["steps"][0]["predictions"]), np.array(student["predictions"])
    assert student["agreement_with_teacher"] == pytest.approx(float((preds_t == preds_s).mean()))
    info = student["info"]
    assert info["teacher_outputs"]["cache"] == "miss"
    # a changed temperature retrains the student but reuses the cached teacher outputs
    results = _run_student(teacher_done, tiny_base, keyword_csv, temperature=4.0)
    assert results["steps"][1]["info"]["teacher_outputs"]["cache"] == "hit"
    assert results["steps"][1]["info"]["teacher_outputs"]["seconds_saved_by_cache"] >= 0


def test_hidden_and_attention_terms_with_a_narrower_random_student(teacher_done, tiny_base, keyword_csv):
    with pytest.warns(UserWarning, match="far more data"):
        results = _run_student(teacher_done, tiny_base, keyword_csv, init="config", num_layers=2, hidden_size=16,
                               num_attention_heads=2, hidden_weight=1.0, attention_weight=1.0)
    info = results["steps"][1]["info"]
    assert info["init"] == "config" and info["layer_map"] == [0, 3]
    cfg = json.loads((teacher_done / "run" / "student" / "config.json").read_text())
    assert cfg["hidden_size"] == 16 and cfg["num_hidden_layers"] == 2
    cache = next((teacher_done / "run" / "cache").glob("teacher-outputs-*"))
    hidden = np.load(cache / "hidden.npy", mmap_mode="r")
    attention = np.load(cache / "attention.npy", mmap_mode="r")
    assert hidden.shape[1:] == (3, 32, 32)            # embeddings + 2 mapped layers, max_length, teacher width
    assert attention.shape[1:] == (2, 2, 32, 32)      # 2 mapped layers, 2 heads
    # the projection used for training is not part of the saved student
    from safetensors import safe_open

    with safe_open(teacher_done / "run" / "student" / "model.safetensors", "pt") as f:
        assert not any("hidden_projection" in k for k in f.keys())


def test_transfer_texts_are_learnt_from(teacher_done, tiny_base, keyword_csv):
    transfer = teacher_done / "transfer.txt"
    transfer.write_text("\n".join(["my refund please", "router offline again", "password locked", ""] * 10))
    results = _run_student(teacher_done, tiny_base, keyword_csv, transfer_path=str(transfer))
    assert results["steps"][1]["info"]["transfer_texts"] == 30  # the blank lines are skipped


def test_pretrained_student_with_another_tokenizer_is_refused(tmp_path, tiny_base, keyword_csv):
    from transformers import AutoTokenizer

    from shrinkwrap.chain.preflight import prepare
    from shrinkwrap.recipe.schema import load_recipe

    other = tmp_path / "other"
    shutil.copytree(tiny_base, other)
    tok = AutoTokenizer.from_pretrained(other)
    tok.add_tokens(["routerbox"])  # one extra token is enough to change which ids a text becomes
    tok.save_pretrained(other)
    recipe = load_recipe(write_recipe(tmp_path / "r.yaml", tiny_recipe(tiny_base, keyword_csv, student={
        "init": "pretrained", "base": str(other)})))
    with pytest.raises(UserError, match="tokenizer differs from the teacher's"):
        prepare(recipe, tmp_path / "run")
    assert not (tmp_path / "run").exists()


def test_pretrained_student_with_the_same_tokenizer_runs(teacher_done, tiny_base, keyword_csv):
    results = _run_student(teacher_done, tiny_base, keyword_csv, init="pretrained", base=str(tiny_base))
    assert results["steps"][1]["info"]["init"] == "pretrained"
    assert results["steps"][1]["info"]["layer_map"] == [0, 1, 2, 3]
