"""Student: a smaller model trained on the teacher's softened outputs (Hinton, Vinyals & Dean 2015).

The student starts as (a) a copy of the teacher with only some layers kept (embeddings, those
layers, pooler and head copied; DistilBERT, Sanh et al. 2019), (b) a separate pre-trained model
with the teacher's tokenizer, or (c) random weights of a smaller shape. Optional terms match hidden
states (TinyBERT, Jiao et al. 2020) and attention distributions (MiniLM, Wang et al. 2020) between
mapped layers. The teacher's outputs are computed once, cached on disk, and never recomputed.
"""
from __future__ import annotations

import json
import shutil
import time
import warnings
from pathlib import Path

import numpy as np
import torch
from torch import nn

from shrinkwrap.checkpoint import CHECKPOINT_DIR, Checkpoint
from shrinkwrap.data import length_batches
from shrinkwrap.fingerprint import sha256_json
from shrinkwrap.losses import attention_loss, distillation_loss, hidden_state_loss
from shrinkwrap.models import evenly_spaced, keep_layers, load_classifier, num_layers, save_classifier
from shrinkwrap.train import TrainSettings, fit, to_torch

PROJECTION = "hidden_projection"  # attached to the student while training so the optimiser sees it


def build_student(ctx, teacher) -> tuple[nn.Module, list[int]]:
    """The student and, for each of its layers, the teacher layer it learns from."""
    cfg = ctx.recipe.student
    n_teacher = num_layers(teacher)
    if cfg.init == "teacher_layers":
        layers = cfg.layers or evenly_spaced(n_teacher, cfg.num_layers)
        return keep_layers(teacher, layers), layers
    if cfg.init == "pretrained":
        student = load_classifier(str(ctx.recipe.resolve(cfg.base)), label_names=ctx.data.label_names)
    else:
        from transformers import AutoModelForSequenceClassification

        warnings.warn("student.init: config starts from random weights: it needs far more data than a student "
                      "made of the teacher's layers (consider student.transfer_path)")
        config = teacher.config.__class__.from_dict(teacher.config.to_dict())
        config.num_hidden_layers = cfg.num_layers
        config.hidden_size = cfg.hidden_size or config.hidden_size
        config.num_attention_heads = cfg.num_attention_heads or config.num_attention_heads
        config.intermediate_size = cfg.intermediate_size or 4 * config.hidden_size
        torch.manual_seed(cfg.seed)
        student = AutoModelForSequenceClassification.from_config(config)
    return student, evenly_spaced(n_teacher, num_layers(student))


@torch.no_grad()
def teacher_outputs(ctx, teacher, examples: list[dict], layer_map: list[int], key: str, hidden: bool,
                    attention: bool) -> tuple[dict, dict]:
    """Logits (and, only when asked, the mapped layers' hidden states / attentions) of the teacher on
    `examples`, computed in one pass and kept on disk as memory-mapped arrays keyed by `key`."""
    folder = ctx.run_dir / "cache" / f"teacher-outputs-{key[:16]}"
    names = ["logits"] + (["hidden"] if hidden else []) + (["attention"] if attention else [])
    if all((folder / f"{n}.npy").exists() for n in names) and (folder / "meta.json").exists():
        meta = json.loads((folder / "meta.json").read_text())
        return ({n: np.load(folder / f"{n}.npy", mmap_mode="r") for n in names},
                {"cache": "hit", "seconds": 0.0, "seconds_when_computed": meta["seconds"]})
    started = time.perf_counter()
    scratch = folder.with_name(folder.name + ".partial")
    scratch.mkdir(parents=True, exist_ok=True)
    n, length = len(examples), ctx.recipe.teacher.max_length
    c = teacher.config
    arrays = {"logits": np.lib.format.open_memmap(scratch / "logits.npy", "w+", np.float32, (n, c.num_labels))}
    if hidden:  # embeddings output plus each mapped layer's output, float16 to halve the disk cost
        arrays["hidden"] = np.lib.format.open_memmap(scratch / "hidden.npy", "w+", np.float16,
                                                     (n, len(layer_map) + 1, length, c.hidden_size))
    if attention:
        arrays["attention"] = np.lib.format.open_memmap(scratch / "attention.npy", "w+", np.float16,
                                                        (n, len(layer_map), c.num_attention_heads, length, length))
    teacher.eval()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for idx, batch in length_batches(examples, ctx.pad_id, 64):
            out = teacher(**to_torch(batch), output_hidden_states=hidden, output_attentions=attention)
            arrays["logits"][idx] = out.logits.numpy()
            width = batch["input_ids"].shape[1]
            if hidden:
                chosen = [out.hidden_states[0]] + [out.hidden_states[i + 1] for i in layer_map]
                arrays["hidden"][idx, :, :width] = torch.stack(chosen, 1).numpy().astype(np.float16)
            if attention:
                chosen = torch.stack([out.attentions[i] for i in layer_map], 1)
                arrays["attention"][idx, :, :, :width, :width] = chosen.numpy().astype(np.float16)
    for a in arrays.values():
        a.flush()
    del arrays
    seconds = time.perf_counter() - started
    (scratch / "meta.json").write_text(json.dumps({"seconds": seconds, "texts": n, "outputs": names}))
    shutil.rmtree(folder, ignore_errors=True)
    scratch.replace(folder)
    return ({n: np.load(folder / f"{n}.npy", mmap_mode="r") for n in names},
            {"cache": "miss", "seconds": round(seconds, 2)})


def run(ctx, src: Path, out: Path) -> dict:
    cfg = ctx.recipe.student
    teacher = load_classifier(str(src))
    student, layer_map = build_student(ctx, teacher)
    hidden, attention = cfg.hidden_weight > 0, cfg.attention_weight > 0

    # Labelled training texts first, then the transfer texts (label -1: soft targets only).
    examples = ctx.encoded["train"] + ctx.encoded.get("transfer", [])
    labels = list(ctx.data.train.labels) + [-1] * len(ctx.encoded.get("transfer", []))
    key = sha256_json({"teacher": ctx.fingerprints["teacher"], "data": ctx.data_fingerprint,
                       "transfer": ctx.transfer_fingerprint, "layers": layer_map if (hidden or attention) else None})
    targets, cache_info = teacher_outputs(ctx, teacher, examples, layer_map, key, hidden, attention)
    del teacher

    if hidden and student.config.hidden_size != ctx.teacher_hidden_size:
        # A learned linear map from the student's width to the teacher's (TinyBERT, Jiao et al. 2020).
        student.add_module(PROJECTION, nn.Linear(student.config.hidden_size, ctx.teacher_hidden_size))

    def loss_fn(model, batch, batch_labels, idx):
        idx = idx.numpy()
        o = model(**batch, output_hidden_states=hidden, output_attentions=attention)
        loss = distillation_loss(o.logits, torch.from_numpy(np.asarray(targets["logits"][idx])), batch_labels,
                                 cfg.temperature, cfg.alpha)
        width, mask = batch["input_ids"].shape[1], batch["attention_mask"]
        if hidden:
            t = torch.from_numpy(np.asarray(targets["hidden"][idx, :, :width], dtype=np.float32))
            project = getattr(model, PROJECTION, nn.Identity())
            s = [o.hidden_states[0]] + [o.hidden_states[i + 1] for i in range(len(layer_map))]
            loss = loss + cfg.hidden_weight * sum(hidden_state_loss(project(h), t[:, j], mask)
                                                  for j, h in enumerate(s)) / len(s)
        if attention:
            t = torch.from_numpy(np.asarray(targets["attention"][idx, :, :, :width, :width], dtype=np.float32))
            loss = loss + cfg.attention_weight * sum(attention_loss(a, t[:, j], mask)
                                                     for j, a in enumerate(o.attentions)) / len(o.attentions)
        return loss

    train = [{"features": f, "label": int(y)} for f, y in zip(examples, labels)]
    s = TrainSettings(epochs=cfg.epochs, learning_rate=cfg.learning_rate, batch_size=cfg.batch_size,
                      weight_decay=cfg.weight_decay, warmup_ratio=cfg.warmup_ratio, patience=cfg.patience,
                      metric=ctx.recipe.teacher.metric, seed=cfg.seed, collapse_share=1.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # sdpa's notice that it falls back to eager when attentions are asked for
        result = fit(student, train, ctx.encoded["validation"], ctx.data.validation.labels, loss_fn, s, ctx.pad_id,
                     desc="student", checkpoint=Checkpoint(out / CHECKPOINT_DIR, ctx.fingerprints["student"],
                                                           cfg.checkpoint_every_steps, log=ctx.log))
    if hasattr(student, PROJECTION):
        delattr(student, PROJECTION)
    save_classifier(student, ctx.tokenizer, out)
    epochs_run = result.curve[-1]["epoch"] if result.curve else 0
    # Without the cache, every epoch would run the teacher over the same texts again.
    per_pass = cache_info.get("seconds_when_computed", cache_info["seconds"])
    saved = per_pass * (epochs_run - 1 if cache_info["cache"] == "miss" else epochs_run)
    return {"init": cfg.init, "layer_map": layer_map, "curve": result.curve, "best_epoch": result.best_epoch,
            "seconds": round(result.seconds, 2), "transfer_texts": len(ctx.encoded.get("transfer", [])),
            "teacher_outputs": cache_info | {"seconds_saved_by_cache": round(max(0.0, saved), 2)},
            "status": result.status, "reason": result.reason}
