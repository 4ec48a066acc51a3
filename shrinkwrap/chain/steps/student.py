"""Student: a smaller model trained on the teacher's softened outputs (Hinton, Vinyals & Dean 2015).

How the student starts, the teacher-outputs cache and the distillation terms are shrinkwrap.ml.distillation's.
"""
from __future__ import annotations

from pathlib import Path

from shrinkwrap.ml.distillation import (build_student, fit_to_teacher, scaled_epochs, soft_targets, student_settings,
                                        teacher_validation_outputs)
from shrinkwrap.ml.models import save_model
from shrinkwrap.serve.rundir import STUDENT


def run(ctx, src: Path, out: Path) -> dict:
    cfg = ctx.recipe.student
    teacher = ctx.task.load(str(src))
    student, layer_map = build_student(ctx, teacher)
    if cfg.epochs == 0:  # no distillation: what the starting point (the teacher's kept layers) gives as it is
        save_model(student, ctx.tokenizer, out)
        return {"init": cfg.init, "layer_map": layer_map, "curve": [], "best_epoch": None, "epochs": 0,
                "epochs_from": "student.epochs", "status": "untrained", "reason": None}
    examples, labels, targets, cache_info = soft_targets(ctx, teacher, layer_map, cfg.hidden_weight > 0,
                                                         cfg.attention_weight > 0)
    reference = teacher_validation_outputs(ctx, teacher)
    del teacher

    epochs = cfg.epochs if cfg.epochs is not None else scaled_epochs(len(examples))
    s = student_settings(ctx, epochs, cfg.learning_rate)
    result = fit_to_teacher(ctx, student, examples, labels, targets, layer_map, s, cfg.hidden_weight,
                            cfg.attention_weight, out, STUDENT, cfg.checkpoint_every_steps, reference)

    save_model(student, ctx.tokenizer, out)
    epochs_run = result.curve[-1]["epoch"] if result.curve else 0
    # Without the cache, every epoch would run the teacher over the same texts again.
    per_pass = cache_info.get("seconds_when_computed", cache_info["seconds"])
    saved = per_pass * (epochs_run - 1 if cache_info["cache"] == "miss" else epochs_run)
    return {"init": cfg.init, "layer_map": layer_map, "curve": result.curve, "best_epoch": result.best_epoch,
            "seconds": round(result.seconds, 2), "transfer_texts": len(ctx.transfer or ()),
            "augmented_texts": len(ctx.augmented()[2]), "epochs": epochs,
            "epochs_from": "student.epochs" if cfg.epochs is not None else f"scaled to {len(examples)} texts", "metric": s.metric,
            "teacher_outputs": cache_info | {"seconds_saved_by_cache": round(max(0.0, saved), 2)},
            "status": result.status, "reason": result.reason}
