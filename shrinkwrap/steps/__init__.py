"""The chain: which steps there are, in what order, and what each reads.

One file per step beside this one, each with `run(ctx, src, out) -> dict`: `src` is the output folder of
the first step in `reads` (None for the teacher), `out` the folder to write. The runner walks the list
`chain()` returns; nothing here runs a step.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Optional

from shrinkwrap.recipe import Recipe


@dataclass
class Step:
    name: str                       # the folder, the results row and `--until`
    format: str                     # "pytorch" or "onnx"
    sections: tuple[str, ...]       # the recipe sections this step's output depends on
    # The outputs it reads, by step name: the first is its source (`src`, whose fingerprint and tokenizer
    # it inherits); any others it finds in ctx.outputs.
    reads: tuple[str, ...]
    run: Callable
    enabled: Callable[[Recipe], bool] = lambda r: True
    # Inputs beyond the recipe sections and the source's output that the step's result depends on.
    extra: Callable[[object], object] = lambda ctx: None
    # A step that writes a tokenizer of its own (derived from its source's); every other step's output
    # carries exactly the tokenizer of the step it read.
    changes_tokenizer: bool = False
    # A step that trains: under several processes (accelerate launch, torchrun) all take part in it;
    # every other step runs in the main process alone.
    trains: bool = False

    @property
    def after(self) -> Optional[str]:
        """The step whose output is this one's source (None: the teacher, which reads the data)."""
        return self.reads[0] if self.reads else None


def chain(recipe: Optional[Recipe] = None) -> list[Step]:
    """The steps in order. The PyTorch steps that follow the student read the last PyTorch student the
    recipe makes."""
    from shrinkwrap.steps import distill, export, finetune, prune, quantize, quantize_onnx, trim_vocab

    pruned = recipe is not None and recipe.prune.enabled
    trimmed = recipe is not None and recipe.trim_vocab.enabled
    last = "student-trimmed" if trimmed else "student-pruned" if pruned else "student"
    return [
        # A teacher used as is (teacher.trained) is those very weights: they are part of its fingerprint.
        Step("teacher", "pytorch", ("data", "teacher", "train"), (), finetune.run, trains=True,
             extra=lambda ctx: ctx.teacher_weights),
        Step("student", "pytorch", ("student", "augment", "train"), ("teacher",), distill.run,
             extra=lambda ctx: ctx.transfer_fingerprint, trains=True),
        # Recovers by distillation on the teacher's outputs: it reads the teacher too.
        Step("student-pruned", "pytorch", ("prune", "train"), ("student", "teacher"), prune.run,
             lambda r: r.prune.enabled, trains=True),
        Step("student-trimmed", "pytorch", ("trim_vocab",), ("student-pruned" if pruned else "student",),
             trim_vocab.run, lambda r: r.trim_vocab.enabled, changes_tokenizer=True),
        Step("student-int8", "pytorch", ("quantize",), (last,), quantize.run, lambda r: r.quantize.enabled),
        Step("student-onnx", "onnx", ("export",), (last,), export.run, extra=lambda ctx: export.GRAPH_RULE),
        # Before the dynamic int8 step, so that the final step (budgets, the artifact) stays the dynamic one.
        Step("student-onnx-int8-static", "onnx", ("export", "onnx_quantize"), (last,), quantize_onnx.run_static,
             lambda r: r.onnx_quantize.static),
        Step("student-onnx-int8", "onnx", ("onnx_quantize",), ("student-onnx",), quantize_onnx.run),
    ]
