"""Student: keep some of the teacher's layers and train them on the teacher's softened outputs.

The student starts as a copy of the teacher with only `student.layers` kept (embeddings, those
layers, pooler and head copied; DistilBERT, Sanh et al. 2019). The teacher's logits on the training
texts are computed once and cached on disk, so distillation epochs never run the teacher.
"""
from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import torch

from shrinkwrap.fingerprint import sha256_json
from shrinkwrap.losses import distillation_loss
from shrinkwrap.models import evenly_spaced, keep_layers, load_classifier, num_layers, save_classifier
from shrinkwrap.train import TrainSettings, fit, predict_logits


def teacher_logits(ctx, teacher, key: str) -> tuple[np.ndarray, dict]:
    """The teacher's logits on the training texts, from the cache when the same teacher saw the same data."""
    cache = ctx.run_dir / "cache" / f"teacher-logits-{key[:16]}.npy"
    if cache.exists():
        return np.load(cache), {"cache": "hit", "seconds": 0.0}
    started = time.perf_counter()
    logits = predict_logits(teacher, ctx.encoded["train"], ctx.pad_id)
    seconds = time.perf_counter() - started
    cache.parent.mkdir(parents=True, exist_ok=True)
    tmp = cache.with_suffix(".tmp.npy")
    np.save(tmp, logits)
    tmp.replace(cache)
    return logits, {"cache": "miss", "seconds": round(seconds, 2)}


def run(ctx, out: Path) -> dict:
    cfg = ctx.recipe.student
    teacher = load_classifier(str(ctx.outputs["teacher"]))
    layers = cfg.layers or evenly_spaced(num_layers(teacher), cfg.num_layers)
    key = sha256_json({"teacher": ctx.fingerprints["teacher"], "data": ctx.data_fingerprint})
    soft_targets, cache_info = teacher_logits(ctx, teacher, key)
    soft_targets = torch.from_numpy(soft_targets)

    student = keep_layers(teacher, layers)
    del teacher
    train = [{"features": f, "label": int(y)} for f, y in zip(ctx.encoded["train"], ctx.data.train.labels)]

    def loss_fn(logits, labels, idx):
        return distillation_loss(logits, soft_targets[idx], labels, cfg.temperature, cfg.alpha)

    s = TrainSettings(epochs=cfg.epochs, learning_rate=cfg.learning_rate, batch_size=cfg.batch_size,
                      weight_decay=cfg.weight_decay, warmup_ratio=cfg.warmup_ratio, patience=cfg.patience,
                      metric=ctx.recipe.teacher.metric, seed=cfg.seed, collapse_share=1.0)
    result = fit(student, train, ctx.encoded["validation"], ctx.data.validation.labels, loss_fn, s, ctx.pad_id,
                 desc="student")
    save_classifier(student, ctx.tokenizer, out)
    # Each epoch would otherwise have run the teacher over the training texts once more.
    saved = cache_info["seconds"] * (result.curve[-1]["epoch"] if result.curve else 0) - cache_info["seconds"]
    return {"layers": layers, "curve": result.curve, "best_epoch": result.best_epoch, "seconds": round(result.seconds, 2),
            "teacher_outputs": cache_info | {"seconds_saved_by_cache": round(max(0.0, saved), 2)},
            "status": result.status, "reason": result.reason}
