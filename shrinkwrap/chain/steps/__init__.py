"""The chain: which steps there are, in what order, and what each reads.

One file per step beside this one, named after the step (student_onnx_int8.py is step student-onnx-int8),
each with `run(ctx, src, out) -> dict`: `src` is the output folder of its source, the first step in `reads`
(None for the teacher), `out` the folder to write. A step imports the layers below the chain, never another
step. The runner walks the list `chain()` returns; nothing here runs a step.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Optional

from shrinkwrap.chain.context import last_student
from shrinkwrap.recipe.schema import Recipe
from shrinkwrap.serve.rundir import (STUDENT, STUDENT_INT8, STUDENT_ONNX, STUDENT_ONNX_INT8, STUDENT_ONNX_INT8_DYNAMIC,
                                     STUDENT_ONNX_INT8_STATIC, STUDENT_PRUNED, STUDENT_TRIMMED, TEACHER)


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
    def source(self) -> Optional[str]:
        """The step whose output is this one's source (None: the teacher, which reads the data)."""
        return self.reads[0] if self.reads else None


def chain(recipe: Optional[Recipe] = None) -> list[Step]:
    """The steps in order. The PyTorch steps that follow the student read the last PyTorch student the
    recipe makes."""
    from shrinkwrap.chain.steps import (student, student_int8, student_onnx, student_onnx_int8,
                                        student_onnx_int8_dynamic, student_onnx_int8_static, student_pruned,
                                        student_trimmed, teacher)

    pruned = recipe is not None and recipe.prune.enabled
    last = last_student(recipe)
    return [
        # A teacher used as is (teacher.trained, or a sentence encoder) is those very weights: they are part of
        # its fingerprint, with a sentence encoder's pooling.
        Step(TEACHER, "pytorch", ("data", "teacher", "train"), (), teacher.run, trains=True,
             extra=lambda ctx: ctx.teacher_weights if ctx.pooling is None else [ctx.teacher_weights, ctx.pooling]),
        Step(STUDENT, "pytorch", ("student", "augment", "train"), (TEACHER,), student.run,
             extra=lambda ctx: ctx.transfer_fingerprint, trains=True),
        # Recovers by distillation on the teacher's outputs: it reads the teacher too.
        Step(STUDENT_PRUNED, "pytorch", ("prune", "train"), (STUDENT, TEACHER), student_pruned.run,
             lambda r: r.prune.enabled, trains=True),
        Step(STUDENT_TRIMMED, "pytorch", ("trim_vocab",), (STUDENT_PRUNED if pruned else STUDENT,),
             student_trimmed.run, lambda r: r.trim_vocab.enabled, changes_tokenizer=True),
        Step(STUDENT_INT8, "pytorch", ("quantize",), (last,), student_int8.run, lambda r: r.quantize.enabled),
        Step(STUDENT_ONNX, "onnx", ("export",), (last,), student_onnx.run, extra=lambda ctx: student_onnx.GRAPH_RULE),
        # The measured-only int8 steps come before the one that ships, so that the final step (budgets, the
        # artifact) stays the shipped one.
        Step(STUDENT_ONNX_INT8_STATIC, "onnx", ("export", "onnx_quantize"), (last,), student_onnx_int8_static.run,
             lambda r: r.onnx_quantize.static),
        Step(STUDENT_ONNX_INT8_DYNAMIC, "onnx", ("onnx_quantize",), (STUDENT_ONNX,), student_onnx_int8_dynamic.run,
             lambda r: r.onnx_quantize.dynamic),
        # Exports the last fp32 student again, its attention left unfused (per-row int8 reaches its projections).
        Step(STUDENT_ONNX_INT8, "onnx", ("onnx_quantize",), (STUDENT_ONNX, last), student_onnx_int8.run,
             extra=lambda ctx: student_onnx_int8.METHOD),
    ]
