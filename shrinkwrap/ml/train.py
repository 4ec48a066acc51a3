"""One training loop for every step that trains: linear warm-up and decay, weight decay, clipping,
evaluation each epoch, early stopping with patience, the best epoch's weights restored, and
detection of degenerate runs (non-finite loss, stalled loss, predictions collapsed to one class).
"""
from __future__ import annotations

import contextlib
import copy
import math
import random
import sys
import time
from dataclasses import dataclass, field
from types import ModuleType
from typing import Callable, Optional

import numpy as np
import torch
from torch import nn
from tqdm.auto import tqdm

from shrinkwrap.ml import classification, distributed
from shrinkwrap.ml.checkpoint import Checkpoint, rng_state, set_rng_state
from shrinkwrap.ml.models import to_torch
from shrinkwrap.serve.batches import all_outputs, collate, lengths, take


@dataclass
class TrainSettings:
    epochs: int
    learning_rate: float
    batch_size: int
    weight_decay: float = 0.01
    warmup_ratio: float = 0.1
    max_grad_norm: float = 1.0
    patience: int = 2
    metric: str = "accuracy"
    seed: int = 0
    # Degenerate-run detection (common practice: stop such runs early and try another seed).
    stall_steps: int = 0            # 0 = off; after this many steps the loss must have fallen...
    stall_fraction: float = 0.1     # ...by at least this share of its starting value
    collapse_share: float = 0.95    # validation predictions this concentrated on one class = collapsed (1 = off)
    gradient_accumulation_steps: int = 1   # batches whose gradients add up before one optimizer step
    precision: str = "fp32"                # bf16 / fp16 on a GPU; fp32 on a CPU whatever is asked
    length_grouped: bool = False           # batches of texts of similar length (see length_grouped_order)


@dataclass
class FitResult:
    status: str = "ok"                     # ok | degenerate
    reason: Optional[str] = None
    curve: list[dict] = field(default_factory=list)   # one entry per evaluation
    best_epoch: Optional[int] = None
    best_metric: float = float("-inf")
    seconds: float = 0.0
    steps: int = 0

    @property
    def best_teacher_kl(self) -> float:
        """The best epoch's `teacher_kl`, the tie-break of best_metric (see fit); inf where there is none."""
        return self.curve[self.best_epoch - 1].get("teacher_kl", math.inf) if self.best_epoch else math.inf


# (model, padded batch, labels, example indices) -> loss. The loss runs the model itself, so a
# distillation loss can ask for hidden states or attentions without the loop knowing.
LossFn = Callable[[nn.Module, dict, torch.Tensor, torch.Tensor], torch.Tensor]


def seed_everything(seed: int) -> None:
    random.seed(seed)
    np.random.seed(seed % 2**32)
    torch.manual_seed(seed)


@torch.no_grad()
def predict_outputs(model: nn.Module, examples: list[dict], pad_id: int, batch_size: int = 64,
                    task: ModuleType = classification) -> np.ndarray:
    """The model's outputs (the task's: a classifier's logits) for every example, batched by similar length so
    that padding costs little."""
    model.eval()
    device = next(model.parameters()).device

    def run(b):
        return task.outputs(model(**{k: v.to(device) for k, v in to_torch(b).items()})).float().cpu().numpy()

    return all_outputs(run, examples, pad_id, task.width(model.config), batch_size)


def _optimizer(model: nn.Module, s: TrainSettings) -> torch.optim.Optimizer:
    # No weight decay on biases and LayerNorm weights (common practice since BERT).
    decay, no_decay = [], []
    for name, p in model.named_parameters():
        if not p.requires_grad:
            continue
        (no_decay if p.ndim < 2 or "LayerNorm" in name or "layer_norm" in name else decay).append(p)
    return torch.optim.AdamW([{"params": decay, "weight_decay": s.weight_decay},
                              {"params": no_decay, "weight_decay": 0.0}], lr=s.learning_rate)


def linear_schedule(optimizer, warmup: int, total: int):
    """Linear warm-up to the peak learning rate, then linear decay to 0 over `total` optimizer steps.

    Kept by hand on purpose: transformers' get_linear_schedule_with_warmup gives the first optimizer step a
    learning rate of 0 (factor step/warmup), a wasted step that visibly hurts short fine-tuning runs (the
    tiny-model chain test drops from over 0.8 to 0.69 accuracy with it). This one is that schedule one step
    later during warm-up ((step + 1)/warmup) and identical to it afterwards (tests/test_teacher.py)."""
    def factor(step: int) -> float:
        if step < warmup:
            return (step + 1) / max(1, warmup)
        return max(0.0, (total - step) / max(1, total - warmup))
    return torch.optim.lr_scheduler.LambdaLR(optimizer, factor)


def _restore(saved: dict, model, optimizer, schedule, generator, result: FitResult):
    model.load_state_dict(saved["model"])
    optimizer.load_state_dict(saved["optimizer"])
    schedule.load_state_dict(saved["schedule"])
    set_rng_state(saved["rng"], generator)
    result.curve, result.steps = saved["curve"], saved["steps"]
    result.best_metric, result.best_epoch = saved["best_metric"], saved["best_epoch"]
    order = None if saved["order"] is None else saved["order"].numpy()
    return saved["epoch"], saved["batch"], order, saved["best_state"], saved["since_best"], saved["losses"]


# Texts drawn together and sorted by length when batches are length-grouped: this many batches' worth
# (common practice, after transformers' LengthGroupedSampler, which uses 50 as well).
GROUP_BATCHES = 50


def length_grouped_order(order: np.ndarray, sizes: np.ndarray, batch_size: int,
                         generator: torch.Generator) -> np.ndarray:
    """A random order whose consecutive `batch_size` runs hold texts of similar length: the random order is
    cut into groups of GROUP_BATCHES batches, each group sorted by length (longest first) and cut into
    batches, and the full batches shuffled; the one short batch, if any, stays last. Batches padded to their
    longest text then carry little padding, which matters when lengths vary widely (augmented n-gram copies
    of a few words beside whole texts)."""
    batches, short = [], []   # `sizes`: each text's token count (batches.lengths)
    span = GROUP_BATCHES * batch_size
    for start in range(0, len(order), span):
        group = order[start:start + span]
        group = group[np.argsort(-sizes[group], kind="stable")]
        for b in range(0, len(group), batch_size):
            (batches if len(group[b:b + batch_size]) == batch_size else short).append(group[b:b + batch_size])
    shuffled = [batches[i] for i in torch.randperm(len(batches), generator=generator).tolist()]
    return np.concatenate(shuffled + short) if shuffled or short else order


def fit(model: nn.Module, train, train_labels: np.ndarray, validation: list[dict], val_labels: np.ndarray,
        loss_fn: LossFn, s: TrainSettings, pad_id: int, desc: str = "training",
        checkpoint: Optional[Checkpoint] = None, reference: Optional[np.ndarray] = None,
        task: ModuleType = classification) -> FitResult:
    """Trains `model` in place; on return it holds the weights of the best validation epoch.

    `train` holds encoded examples (a list, or rows on disk read a batch at a time: see batches.take);
    `train_labels` their class ids, -1 where an example has none (a distillation transfer text).

    With `checkpoint`, the whole training state is saved every `checkpoint.every` steps and at each epoch
    end, and a run that finds a saved state continues from it exactly where the killed run was.

    Each epoch's validation figures are the task's (`task.validation`: a classifier's accuracy and macro-F1),
    given the teacher's outputs on the validation texts as `reference` when there are any (a classifier's
    then hold `agreement`, which `s.metric` may name). An epoch that ties the best `s.metric` but whose
    `teacher_kl` is smaller (it sits closer to the teacher) counts as an improvement."""
    if s.metric == "agreement" and reference is None:
        raise RuntimeError("metric agreement needs the teacher's validation predictions (reference)")
    seed_everything(s.seed)
    result = FitResult()
    started = time.perf_counter()
    rank, world = distributed.rank(), distributed.world_size()
    # Under N processes every batch must give each one at least one example (they all join each
    # gradient exchange), so a last batch smaller than N is left out of that epoch; the order is
    # drawn afresh each epoch, so no example is left out for good.
    tail = len(train) % s.batch_size
    stop = len(train) - (tail if 0 < tail < world else 0)
    steps_per_epoch = math.ceil(stop / s.batch_size)
    accumulate = s.gradient_accumulation_steps
    total = math.ceil(steps_per_epoch / accumulate) * s.epochs   # optimizer steps, for the schedule
    log = checkpoint.log if checkpoint else (lambda message: None)
    accelerator = distributed.accelerator(s.precision, log)
    optimizer = _optimizer(model, s)
    # Accelerate wraps the model for data parallelism when several processes were launched (the
    # wrapper averages gradients across them) and moves it to the GPU when there is one.
    wrapped, optimizer = accelerator.prepare(model, optimizer)
    schedule = linear_schedule(optimizer, int(s.warmup_ratio * total), total)
    generator = torch.Generator().manual_seed(s.seed)
    best_state, since_best, losses = None, 0, []
    train_lengths = lengths(train) if s.length_grouped else None

    def snapshot(next_epoch: int, next_batch: int, order: Optional[np.ndarray]) -> dict:
        return {"model": model.state_dict(), "optimizer": optimizer.state_dict(), "schedule": schedule.state_dict(),
                "rng": rng_state(generator), "epoch": next_epoch, "batch": next_batch,
                "order": None if order is None else torch.from_numpy(order.astype(np.int64)),
                "best_state": best_state, "best_metric": result.best_metric, "best_epoch": result.best_epoch,
                "since_best": since_best, "curve": result.curve, "losses": losses, "steps": result.steps,
                "seconds": time.perf_counter() - started}

    first_epoch, first_batch, resumed_order = 1, 0, None
    saved = checkpoint.load() if checkpoint else None
    if saved:
        first_epoch, first_batch, resumed_order, best_state, since_best, losses = _restore(
            saved, model, optimizer, schedule, generator, result)
        started -= saved["seconds"]
        checkpoint.log(f"{desc}: resuming from a checkpoint at step {result.steps} (epoch {first_epoch}, "
                       f"batch {first_batch})")

    # A bar only where a person watches (stderr is a terminal); elsewhere, e.g. a CI log, one line per epoch.
    on_terminal = sys.stderr.isatty()
    bar = tqdm(total=steps_per_epoch * s.epochs, initial=result.steps, desc=desc, unit="batch", leave=False,
               dynamic_ncols=True, disable=not (distributed.is_main() and on_terminal))
    try:
        for epoch in range(first_epoch, s.epochs + 1):
            model.train()
            if resumed_order is not None:  # the killed run's order for this epoch, already drawn
                order, resumed_order = resumed_order, None
            else:
                order = torch.randperm(len(train), generator=generator).numpy()
                if s.length_grouped:
                    order = length_grouped_order(order, train_lengths, s.batch_size, generator)
            skip, first_batch = first_batch, 0
            for start in range(skip * s.batch_size, stop, s.batch_size):
                # Every process draws the same order; each takes its share of the batch, so N
                # processes with batch size B train like one process with B.
                idx = order[start:start + s.batch_size][rank::world]
                batch = to_torch(collate(take(train, idx), pad_id))
                batch = {k: v.to(accelerator.device) for k, v in batch.items()}
                labels = torch.as_tensor(train_labels[idx], dtype=torch.long, device=accelerator.device)
                position = start // s.batch_size
                step_now = (position + 1) % accumulate == 0 or start + s.batch_size >= stop
                with accelerator.autocast(), (contextlib.nullcontext() if step_now else accelerator.no_sync(wrapped)):
                    loss = loss_fn(wrapped, batch, labels, torch.as_tensor(idx))
                    value = loss.item()
                    result.steps += 1
                    if not math.isfinite(value):
                        result.status, result.reason = "degenerate", f"loss is {value} at step {result.steps}"
                        return result
                    losses.append(value)
                    accelerator.backward(loss / accumulate)
                if step_now:
                    accelerator.clip_grad_norm_(wrapped.parameters(), s.max_grad_norm)
                    optimizer.step()
                    schedule.step()
                    optimizer.zero_grad(set_to_none=True)
                bar.update(1)
                bar.set_postfix(epoch=epoch, loss=f"{value:.3f}")
                if s.stall_steps and result.steps == s.stall_steps:
                    window = max(1, min(10, s.stall_steps // 4))
                    first, last = np.mean(losses[:window]), np.mean(losses[-window:])
                    if last > first * (1 - s.stall_fraction):
                        result.status = "degenerate"
                        result.reason = (f"training loss stalled: {first:.3f} -> {last:.3f} after {s.stall_steps} steps "
                                         f"(needs a fall of {s.stall_fraction:.0%})")
                        return result
                if checkpoint and checkpoint.due(result.steps) and step_now and distributed.is_main():
                    checkpoint.save(snapshot(epoch, start // s.batch_size + 1, order))

            outputs = predict_outputs(model, validation, pad_id, task=task)
            entry = {"epoch": epoch, "step": result.steps, "train_loss": float(np.mean(losses[-steps_per_epoch:])),
                     **task.validation(outputs, val_labels, reference)}
            result.curve.append(entry)
            if distributed.is_main() and not on_terminal:
                print(f"{desc}: epoch {epoch}/{s.epochs}, training loss {entry['train_loss']:.4f}, validation "
                      f"{s.metric} {entry[s.metric]:.4f}", file=sys.stderr, flush=True)
            collapse = task.collapsed(outputs, val_labels, s.collapse_share, epoch)
            if collapse:
                result.status, result.reason = "degenerate", collapse
                return result
            if entry[s.metric] > result.best_metric or (entry[s.metric] == result.best_metric and
                                                         entry.get("teacher_kl", math.inf) < result.best_teacher_kl):
                result.best_metric, result.best_epoch, since_best = entry[s.metric], epoch, 0
                best_state = copy.deepcopy(model.state_dict())
            else:
                since_best += 1
                if since_best >= s.patience:
                    break
            if checkpoint and checkpoint.enabled and distributed.is_main():
                checkpoint.save(snapshot(epoch + 1, 0, None))
    finally:
        bar.close()
        result.seconds = time.perf_counter() - started
    if best_state is not None:
        model.load_state_dict(best_state)
    chance = task.no_better_than_chance(result.curve[result.best_epoch - 1] if result.best_epoch else None, val_labels)
    if chance:
        result.status, result.reason = "degenerate", chance
    model.eval()
    return result


def settings_from(section, train, **given) -> TrainSettings:
    """The training settings of a recipe section: each TrainSettings field the section has (the teacher's
    has them all; the student's has no clipping or stall keys, which keep their defaults), the train
    section's accumulation, precision and length grouping, and `given` over those (e.g. the seed of one run)."""
    from dataclasses import fields

    keys = [f.name for f in fields(TrainSettings) if f.name in type(section).model_fields]
    return TrainSettings(**{k: getattr(section, k) for k in keys} | {
        "gradient_accumulation_steps": train.gradient_accumulation_steps, "precision": train.precision,
        "length_grouped": train.length_grouped} | given)
