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
    return alpha * soft + (1 - alpha) * F.cross_entropy(student_logits, labels)
