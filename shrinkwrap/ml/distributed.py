"""Several processes through Hugging Face Accelerate (torch.distributed underneath).

`accelerate launch -m shrinkwrap run RECIPE` or `torchrun --nproc_per_node N -m shrinkwrap run RECIPE`
starts N copies of the same command. They all train: each takes its share of every batch and
Accelerate averages the gradients, so N processes with batch size B per step train like one process
with B. Everything else — checkpoints, step folders, benchmarks, results — is done by the main
process alone while the others wait. A plain `shrinkwrap run` is one process and behaves as before.
"""
from __future__ import annotations

import os
from functools import lru_cache


def launched() -> bool:
    """True when started by a distributed launcher (it sets WORLD_SIZE for every process)."""
    return int(os.environ.get("WORLD_SIZE", "1")) > 1


@lru_cache(maxsize=1)
def state():
    """Accelerate's process state; on CPU the gloo backend."""
    from accelerate import PartialState

    return PartialState(cpu=not _has_gpu())


def _has_gpu() -> bool:
    import torch

    return torch.cuda.is_available()


def world_size() -> int:
    return state().num_processes if launched() else 1


def rank() -> int:
    return state().process_index if launched() else 0


def is_main() -> bool:
    return rank() == 0


def barrier() -> None:
    if launched():
        state().wait_for_everyone()


def share(value):
    """The main process's `value` in every process (any picklable object); `value` itself when alone."""
    if not launched():
        return value
    from accelerate.utils import broadcast_object_list

    state()  # the process group, set up as for training
    box = [value]
    broadcast_object_list(box, from_process=0)
    return box[0]


def accelerator(precision: str, log=print):
    """An Accelerator for one training run. Mixed precision is used on a GPU only: on a CPU it is
    ignored with a notice, since CPU autocast is slower than fp32 for these models."""
    from accelerate import Accelerator

    gpu = _has_gpu()
    if precision != "fp32" and not gpu:
        log(f"train.precision = {precision} is for GPUs: training in fp32 on this CPU")
    mixed = {"fp32": "no", "bf16": "bf16", "fp16": "fp16"}[precision] if gpu else "no"
    # Gradient accumulation is done by the training loop itself (it knows where an epoch ends).
    return Accelerator(cpu=not gpu, mixed_precision=mixed)
