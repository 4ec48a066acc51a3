"""Distillation losses."""
from __future__ import annotations

import torch
from torch.nn import functional as F


def soft_label_loss(student_logits: torch.Tensor, teacher_logits: torch.Tensor, temperature: float) -> torch.Tensor:
    """KL(softmax(z_t/T) || softmax(z_s/T)) * T^2, averaged over the batch (Hinton, Vinyals & Dean 2015).

    The T^2 factor keeps the gradient's magnitude independent of T, so the soft and hard terms can be
    mixed with one weight whatever the temperature (ibid., section 2).
    """
    t = temperature
    log_p_student = F.log_softmax(student_logits / t, dim=-1)
    log_p_teacher = F.log_softmax(teacher_logits / t, dim=-1)
    kl = (log_p_teacher.exp() * (log_p_teacher - log_p_student)).sum(-1).mean()
    return kl * t * t


def distillation_loss(student_logits: torch.Tensor, teacher_logits: torch.Tensor, labels: torch.Tensor,
                      temperature: float, alpha: float) -> torch.Tensor:
    """alpha * soft-label term + (1 - alpha) * cross-entropy on the true labels."""
    soft = soft_label_loss(student_logits, teacher_logits, temperature)
    if alpha >= 1:
        return soft
    labelled = labels >= 0  # transfer texts carry no label (-1): they teach through the soft term only
    if not bool(labelled.any()):
        return alpha * soft
    return alpha * soft + (1 - alpha) * F.cross_entropy(student_logits[labelled], labels[labelled])


def hidden_state_loss(student_hidden: torch.Tensor, teacher_hidden: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """Mean squared error between hidden states over real (unpadded) tokens (TinyBERT, Jiao et al. 2020).

    student_hidden is already projected to the teacher's width. Shapes [B, L, H]; mask [B, L].
    """
    m = mask.unsqueeze(-1).to(student_hidden.dtype)
    return ((student_hidden - teacher_hidden) ** 2 * m).sum() / (m.sum() * student_hidden.shape[-1]).clamp(min=1)


def attention_loss(student_attn: torch.Tensor, teacher_attn: torch.Tensor, mask: torch.Tensor,
                   eps: float = 1e-12) -> torch.Tensor:
    """KL(teacher || student) between attention distributions of each head and each real query token
    (MiniLM, Wang et al. 2020). Shapes [B, heads, L, L]; mask [B, L]."""
    kl = (teacher_attn * (torch.log(teacher_attn + eps) - torch.log(student_attn + eps))).sum(-1)  # [B, heads, L]
    m = mask.unsqueeze(1).to(kl.dtype)
    return (kl * m).sum() / (m.sum() * kl.shape[1]).clamp(min=1)
