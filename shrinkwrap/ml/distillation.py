"""Distillation, shared by the steps that train a student on the teacher (student, student-pruned) and
by a search over students: the student's starting point, the teacher's outputs cached on disk, and the
fit of a student to them (Hinton, Vinyals & Dean 2015).

The student starts as (a) a copy of the teacher with only some layers kept (embeddings, those
layers, pooler and head copied; DistilBERT, Sanh et al. 2019), (b) a separate pre-trained model
with the teacher's tokenizer, or (c) random weights of a smaller shape. Optional terms match hidden
states (TinyBERT, Jiao et al. 2020) and attention distributions (MiniLM, Wang et al. 2020) between
mapped layers. The teacher's outputs are computed once, cached on disk, and never recomputed.
"""
from __future__ import annotations

import json
import math
import shutil
import time
import warnings
from pathlib import Path

import numpy as np
import torch
from torch import nn

from shrinkwrap.ml import distributed
from shrinkwrap.ml.checkpoint import CHECKPOINT_DIR, Checkpoint
from shrinkwrap.ml.losses import attention_loss, hidden_state_loss
from shrinkwrap.ml.models import (ATTENTION_FALLBACK, evenly_spaced, keep_layers, library_notices_silenced, num_layers,
                                  to_torch)
from shrinkwrap.ml.train import TrainSettings, fit, settings_from
from shrinkwrap.serve.batches import Joined, length_batches
from shrinkwrap.serve.fingerprint import sha256_json
from shrinkwrap.serve.rundir import read_json, scratch_path, swap_in

PROJECTION = "hidden_projection"  # attached to the student while training so the optimiser sees it
META_FILE = "meta.json"  # in a teacher-outputs cache folder: how long the pass took, on how many texts


def build_student(ctx, teacher) -> tuple[nn.Module, list[int]]:
    """The student and, for each of its layers, the teacher layer it learns from."""
    cfg = ctx.recipe.student
    n_teacher = num_layers(teacher)
    if cfg.init == "teacher_layers":
        layers = cfg.layers or evenly_spaced(n_teacher, cfg.num_layers)
        return keep_layers(teacher, layers), layers
    if cfg.init == "pretrained":
        student = ctx.task.load(str(ctx.recipe.resolve(cfg.base)), label_names=ctx.data.label_names,
                                pooling=ctx.pooling)
    else:
        warnings.warn("student.init: config starts from random weights: it needs far more data than a student "
                      "made of the teacher's layers (consider student.transfer_path)")
        config = teacher.config.__class__.from_dict(teacher.config.to_dict())
        config.num_hidden_layers = cfg.num_layers
        config.hidden_size = cfg.hidden_size or config.hidden_size
        config.num_attention_heads = cfg.num_attention_heads or config.num_attention_heads
        config.intermediate_size = cfg.intermediate_size or 4 * config.hidden_size
        torch.manual_seed(cfg.seed)
        student = ctx.task.from_config(config, like=teacher)
    return student, evenly_spaced(n_teacher, num_layers(student))


@torch.no_grad()
def teacher_outputs(ctx, teacher, examples, layer_map: list[int], key: str, hidden: bool,
                    attention: bool) -> tuple[dict, dict]:
    """Logits (and, only when asked, the mapped layers' hidden states / attentions) of the teacher on
    `examples`, computed in one pass and kept on disk as memory-mapped arrays keyed by `key`.
    Under several processes each computes its share of the texts and the main process merges them."""
    folder = ctx.run_dir / "cache" / f"teacher-outputs-{key[:16]}"
    out_name = ctx.task.OUTPUTS  # a classifier's logits
    names = [out_name] + (["hidden"] if hidden else []) + (["attention"] if attention else [])

    def cached():
        if all((folder / f"{n}.npy").exists() for n in names) and (folder / META_FILE).exists():
            return {n: np.load(folder / f"{n}.npy", mmap_mode="r") for n in names}
        return None

    if (found := cached()) is not None:
        meta = read_json(folder / META_FILE, "teacher-outputs record")
        return found, {"cache": "hit", "seconds": 0.0, "seconds_when_computed": meta["seconds"]}
    started = time.perf_counter()
    scratch = scratch_path(folder)  # the main process renames it into place once every output is whole
    rank, world = distributed.rank(), distributed.world_size()
    if distributed.is_main():
        shutil.rmtree(scratch, ignore_errors=True)
        scratch.mkdir(parents=True)
    distributed.barrier()
    share = np.arange(len(examples))[rank::world]
    length, c = ctx.recipe.teacher.max_length, teacher.config
    shapes = {out_name: ((ctx.task.width(c),), np.float32),
              # embeddings output plus each mapped layer's output, float16 to halve the disk cost
              "hidden": ((len(layer_map) + 1, length, c.hidden_size), np.float16),
              "attention": ((len(layer_map), c.num_attention_heads, length, length), np.float16)}

    def shard_file(name: str, r: int) -> Path:
        return scratch / (f"{name}.npy" if world == 1 else f"{name}.rank{r}.npy")

    arrays = {n: np.lib.format.open_memmap(shard_file(n, rank), "w+", shapes[n][1], (len(share), *shapes[n][0]))
              for n in names}
    teacher.eval()
    with warnings.catch_warnings(), library_notices_silenced(ATTENTION_FALLBACK):
        warnings.simplefilter("ignore")
        for idx, batch in length_batches(examples, ctx.pad_id, 64, rows=share):
            out = teacher(**to_torch(batch), output_hidden_states=hidden, output_attentions=attention)
            arrays[out_name][idx] = ctx.task.outputs(out).numpy()
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
    distributed.barrier()
    seconds = time.perf_counter() - started
    if distributed.is_main():
        if world > 1:  # merge the shares into one array per output, rows back in the texts' order
            for n in names:
                merged = np.lib.format.open_memmap(scratch / f"{n}.npy", "w+", shapes[n][1],
                                                   (len(examples), *shapes[n][0]))
                for r in range(world):
                    merged[np.arange(len(examples))[r::world]] = np.load(shard_file(n, r), mmap_mode="r")
                    shard_file(n, r).unlink()
                merged.flush()
                del merged
        (scratch / META_FILE).write_text(json.dumps({"seconds": seconds, "texts": len(examples),
                                                     "outputs": names, "processes": world}))
        swap_in(scratch, folder)
    distributed.barrier()
    return cached(), {"cache": "miss", "seconds": round(seconds, 2)}


def soft_targets(ctx, teacher, layer_map: list[int], hidden: bool, attention: bool):
    """(examples, labels, teacher outputs, cache info) to distil on: the labelled training texts first,
    then the transfer texts, then the augmented copies of the training texts (label -1 for both: soft
    targets only), with the teacher's outputs on them."""
    transfer = ctx.transfer_examples()
    _, _, augmented = ctx.augmented()
    examples = Joined(ctx.encoded["train"], transfer, augmented)
    labels = np.concatenate([ctx.data.train.labels, np.full(len(transfer) + len(augmented), -1, dtype=np.int64)])
    parts = {"teacher": ctx.teacher_fingerprint, "data": ctx.data_fingerprint,
             "transfer": ctx.transfer_fingerprint, "layers": layer_map if (hidden or attention) else None}
    if ctx.recipe.augment.copies:  # without augmentation the key stays what it was before the section existed
        parts["augment"] = ctx.recipe.augment.model_dump(mode="json")
    key = sha256_json(parts)
    targets, cache_info = teacher_outputs(ctx, teacher, examples, layer_map, key, hidden, attention)
    if ctx.student_length != ctx.recipe.teacher.max_length:
        # The teacher answers on the whole text it reads; a student that reads fewer tokens learns to
        # give that answer from the start of the text. Token positions agree up to the student's cut
        # (its closing [SEP] aside), so the hidden-state and attention targets stay aligned.
        examples = Joined(ctx.tokens_of(ctx.teacher_dir, ctx.student_length).encoded["train"],
                          ctx.transfer_examples(ctx.student_length))
    return examples, labels, targets, cache_info


def fit_to_teacher(ctx, student, examples, labels: np.ndarray, targets: dict, layer_map: list[int],
                   s: TrainSettings, hidden_weight: float, attention_weight: float, out: Path, step: str,
                   checkpoint_every: int, reference: np.ndarray | None = None):
    """Trains `student` in place on the teacher's `targets` (student.temperature and student.alpha; the
    hidden-state and attention terms when their weights are above 0), resumable from out/checkpoint."""
    cfg = ctx.recipe.student
    hidden, attention = hidden_weight > 0, attention_weight > 0
    if hidden and student.config.hidden_size != ctx.teacher_hidden_size:
        # A learned linear map from the student's width to the teacher's (TinyBERT, Jiao et al. 2020).
        student.add_module(PROJECTION, nn.Linear(student.config.hidden_size, ctx.teacher_hidden_size))

    def loss_fn(model, batch, batch_labels, idx):
        idx = idx.numpy()
        o = model(**batch, output_hidden_states=hidden, output_attentions=attention)
        outputs = ctx.task.outputs(o)
        device = outputs.device
        loss = ctx.task.distillation_loss(outputs, torch.from_numpy(np.asarray(targets[ctx.task.OUTPUTS][idx])).to(device),
                                          batch_labels, cfg)
        width, mask = batch["input_ids"].shape[1], batch["attention_mask"]
        if hidden:
            t = torch.from_numpy(np.asarray(targets["hidden"][idx, :, :width], dtype=np.float32)).to(device)
            # under several processes `model` is Accelerate's wrapper; the projection sits on the module
            project = getattr(getattr(model, "module", model), PROJECTION, nn.Identity())
            s = [o.hidden_states[0]] + [o.hidden_states[i + 1] for i in range(len(layer_map))]
            loss = loss + hidden_weight * sum(hidden_state_loss(project(h), t[:, j], mask)
                                              for j, h in enumerate(s)) / len(s)
        if attention:
            t = torch.from_numpy(np.asarray(targets["attention"][idx, :, :, :width, :width],
                                            dtype=np.float32)).to(device)
            loss = loss + attention_weight * sum(attention_loss(a, t[:, j], mask)
                                                 for j, a in enumerate(o.attentions)) / len(o.attentions)
        return loss

    with warnings.catch_warnings(), library_notices_silenced(ATTENTION_FALLBACK):
        warnings.simplefilter("ignore")  # sdpa's notice that it falls back to eager when attentions are asked for
        validation = ctx.tokens_of(ctx.teacher_dir, ctx.student_length).encoded["validation"]
        result = fit(student, examples, labels, validation, ctx.data.validation.labels, loss_fn, s,
                     ctx.pad_id, desc=step, checkpoint=Checkpoint(out / CHECKPOINT_DIR, ctx.fingerprints[step],
                                                      checkpoint_every, log=ctx.log), reference=reference, task=ctx.task)
    if hasattr(student, PROJECTION):
        delattr(student, PROJECTION)
    return result


def teacher_validation_outputs(ctx, teacher) -> np.ndarray:
    """The teacher's outputs on each validation text (a classifier's logits): the student's validation figures
    are measured against them each epoch, and ties in early stopping broken by how close it comes (train.fit)."""
    from shrinkwrap.ml.train import predict_outputs

    return predict_outputs(teacher, ctx.encoded["validation"], ctx.pad_id, task=ctx.task)


# Texts distilled on per run that the default number of student epochs aims at (a project rule of thumb,
# after the common practice of fixing the number of updates rather than of epochs: a set 10 times
# smaller gets more passes over it, within the bounds).
SCALED_TEXTS, SCALED_MIN, SCALED_MAX = 30_000, 3, 10


def scaled_epochs(texts: int) -> int:
    """student.epochs when the recipe leaves it out: ceil(30,000 / texts) within 3..10."""
    return min(SCALED_MAX, max(SCALED_MIN, math.ceil(SCALED_TEXTS / max(1, texts))))


def student_settings(ctx, epochs: int, learning_rate: float) -> TrainSettings:
    """Training settings of a distillation run: the student section's, with its own epochs and rate."""
    # collapse_share 1 = off: a student that mimics a teacher is not judged against the majority class
    return settings_from(ctx.recipe.student, ctx.recipe.train, epochs=epochs, learning_rate=learning_rate,
                         metric=ctx.recipe.student.metric or ctx.task.default_metric(ctx.recipe), collapse_share=1.0)
