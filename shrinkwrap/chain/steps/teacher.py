"""Teacher: fine-tune a pre-trained encoder with a fresh classification head, one run per seed.

Never from scratch: the encoder always comes from `teacher.base`. Runs that degenerate are stopped
early and the next seed is tried; the best run on validation is kept. With teacher.trained, `base` is
already a fine-tuned classifier: it is copied as is (checked and matched to the data by preflight). A
sentence encoder (task: embedding) is never fine-tuned: it is copied as is, with how it pools.
"""
from __future__ import annotations

from pathlib import Path

from shrinkwrap.ml import distributed
from shrinkwrap.ml.checkpoint import CHECKPOINT_DIR, Checkpoint
from shrinkwrap.ml.models import save_model
from shrinkwrap.ml.train import FitResult, fit, seed_everything, settings_from
from shrinkwrap.serve.errors import StepFailed


def as_is(ctx, out: Path) -> dict:
    """The user's own fine-tuned classifier, or a sentence encoder with its pooling, copied byte for byte, with
    where it came from."""
    from shrinkwrap.ml.trained import copy_teacher

    if not distributed.is_main():  # nothing to train: the main process copies
        return {}
    copied = copy_teacher(Path(ctx.base), ctx.tokenizer, out)
    if copied["weights_sha256"] != ctx.teacher_weights:
        raise StepFailed(f"teacher: the weights in {ctx.base} changed while the run was starting — run it again")
    info = {"trained": "used as is", "source": ctx.recipe.teacher.base,
            "source_folder": str(Path(ctx.base).resolve()), **copied}
    if ctx.pooling is not None:
        from shrinkwrap.ml.embedding import write_pooling

        write_pooling(out, ctx.pooling)
        return info | {"pooling": ctx.pooling}
    return info | {"label_names": list(ctx.data.label_names)}


def run(ctx, src: None, out: Path) -> dict:
    cfg = ctx.recipe.teacher
    if cfg.trained or not ctx.task.FINE_TUNES:
        return as_is(ctx, out)
    task = ctx.task
    weight = task.class_weights(ctx.data.train.labels, len(ctx.data.label_names)) if cfg.class_weights else None

    def loss_fn(model, batch, labels, _idx):
        return task.fine_tuning_loss(task.outputs(model(**batch)), labels, weight)

    # The seeds a killed run finished, with the best one's weights, so that a resumed run skips them.
    folder, fp, every = out / CHECKPOINT_DIR, ctx.teacher_fingerprint, cfg.checkpoint_every_steps
    sweep = Checkpoint(folder, fp, every, name="sweep", log=ctx.log)
    done = sweep.load() or {"runs": [], "best_seed": None, "best_model": None}
    runs, best, best_model = done["runs"], None, None
    if done["best_seed"] is not None:
        best = next(r for r in runs if r["seed"] == done["best_seed"])
        best_model = task.load(ctx.base, label_names=ctx.data.label_names, trust_remote_code=cfg.trust_remote_code)
        best_model.load_state_dict(done["best_model"])
    if any(all(r["seed"] != seed for r in runs) for seed in cfg.seeds):
        ctx.log("teacher: a fresh classification head on the base (the library's 'newly initialized' "
                "notice for it is expected, so it is not shown)")
    for seed in cfg.seeds:
        if any(r["seed"] == seed for r in runs):
            continue
        seed_everything(seed)  # the new head's initialisation depends on the seed
        model = task.load(ctx.base, label_names=ctx.data.label_names, trust_remote_code=cfg.trust_remote_code)
        checkpoint = Checkpoint(folder, f"{fp} seed {seed}", every, log=ctx.log)
        result: FitResult = fit(model, ctx.encoded["train"], ctx.data.train.labels, ctx.encoded["validation"],
                                ctx.data.validation.labels, loss_fn, settings_from(cfg, ctx.recipe.train, seed=seed),
                                ctx.pad_id, desc=f"teacher seed {seed}", checkpoint=checkpoint, task=task)
        entry = {"seed": seed, "status": result.status, "reason": result.reason, "curve": result.curve,
                 "best_epoch": result.best_epoch, "best_metric": result.best_metric if result.best_epoch else None,
                 "seconds": round(result.seconds, 2), "steps": result.steps}
        runs.append(entry)
        ctx.log(f"teacher seed {seed}: {result.status}"
                + (f" — {result.reason}" if result.reason else f", validation {cfg.metric} {result.best_metric:.4f}"))
        if result.status == "ok" and (best is None or result.best_metric > best["best_metric"]):
            best, best_model = entry, model
        sweep.save({"runs": runs, "best_seed": best["seed"] if best else None,
                    "best_model": best_model.state_dict() if best_model is not None else None})
        checkpoint.clear()  # after the sweep records the seed: a kill in between re-runs nothing
    if best is None:
        reasons = "; ".join(f"seed {r['seed']}: {r['reason']}" for r in runs)
        raise StepFailed(f"teacher: every seed degenerated — {reasons}. Try other seeds, a lower "
                         f"teacher.learning_rate or more teacher.epochs")
    for r in runs:
        r["outcome"] = "kept" if r is best else ("degenerate" if r["status"] == "degenerate" else "worse")
    save_model(best_model, ctx.tokenizer, out)
    return {"seeds": runs, "kept_seed": best["seed"], "validation": {cfg.metric: best["best_metric"]}}
