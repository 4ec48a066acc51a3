"""Student pruned: the student without its least important attention heads and feed-forward neurons,
then distilled briefly on the teacher's cached outputs to recover.

Importance is measured on training texts (shrinkwrap.ml.pruning: Michel et al. 2019 for heads, gradient
× activation for neurons); every layer loses the same number of each. The removal is physical —
smaller query/key/value/output matrices and a narrower feed-forward block — so the later steps
(int8, ONNX) work on less.
"""
from __future__ import annotations

from pathlib import Path

from shrinkwrap.ml.distillation import fit_to_teacher, soft_targets, student_settings, teacher_validation_outputs
from shrinkwrap.ml.models import save_model
from shrinkwrap.ml.pruning import (ffn_width, importance, least_important, neurons_to_remove, remove_heads,
                                   remove_neurons)
from shrinkwrap.serve.rundir import STUDENT_PRUNED


def _shape(model) -> dict:
    pruned = (model.config.pruned_heads or {})
    removed = {len(v) for v in pruned.values()} or {0}
    return {"heads_per_layer": model.config.num_attention_heads - max(removed),
            "intermediate_size": ffn_width(model),
            "parameters": sum(p.numel() for p in model.parameters())}


def run(ctx, src: Path, out: Path) -> dict:
    cfg, st = ctx.recipe.prune, ctx.recipe.student
    tokens = ctx.student_tokens(src)
    model = ctx.task.load(str(src))
    n = min(cfg.importance_texts, len(ctx.data.train))
    head_scores, neuron_scores = importance(model, tokens.encoded["train"][:n], ctx.task.importance_targets(ctx, n),
                                            tokens.pad_id, st.batch_size, heads_too=cfg.heads_removed > 0, task=ctx.task)
    before = _shape(model)
    heads = least_important(head_scores, cfg.heads_removed)
    neurons = least_important(neuron_scores, neurons_to_remove(before["intermediate_size"], cfg.neurons_removed_share))
    remove_heads(model, heads)
    remove_neurons(model, neurons)
    info = {"importance": {"heads": "E|dL/d head mask| (Michel, Levy & Neubig 2019)",
                           "neurons": "E|sum over tokens of activation x gradient| (first-order Taylor, "
                                      "Molchanov et al. 2017)",
                           "loss": ctx.task.IMPORTANCE_LOSS, "texts": n},
            "heads_removed": {str(k): v for k, v in heads.items()},
            "head_importance": [[round(float(x), 6) for x in row] for row in head_scores],
            "neurons_removed_per_layer": len(next(iter(neurons.values()), [])),
            "before": before, "after": _shape(model)}

    if cfg.epochs:
        teacher = ctx.task.load(str(ctx.teacher_dir))
        examples, labels, targets, cache_info = soft_targets(ctx, teacher, [], False, False)
        reference = teacher_validation_outputs(ctx, teacher)
        del teacher
        s = student_settings(ctx, cfg.epochs, cfg.learning_rate)
        result = fit_to_teacher(ctx, model, examples, labels, targets, [], s, 0.0, 0.0, out, STUDENT_PRUNED,
                                st.checkpoint_every_steps, reference)
        info["recovery"] = {"epochs": cfg.epochs, "curve": result.curve, "best_epoch": result.best_epoch,
                            "seconds": round(result.seconds, 2), "teacher_outputs": cache_info,
                            "status": result.status, "reason": result.reason}
    save_model(model, tokens.tokenizer, out)
    return info
