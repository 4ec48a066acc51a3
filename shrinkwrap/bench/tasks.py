"""The tasks the benchmark measures, each one module beside this one answering the same names:

    NAME                                        the task's name
    measure(outputs, inputs, outputs_of, temperature) -> (metrics, per_text)   a target's quality on the test texts
        (`inputs`: bench.measure.Inputs; `outputs_of(examples)`: the target's outputs on other texts, e.g. the
        training split; per_text: what each test text got — a classifier's predicted class, an encoder's
        neighbour recall at 10)
"""
from __future__ import annotations

from types import ModuleType

from shrinkwrap.bench import classification, embedding

TASKS = {classification.NAME: classification, embedding.NAME: embedding}
DEFAULT = classification.NAME


def of_target(target) -> ModuleType:
    """The task of a loaded target (bench.targets.Target.task)."""
    return TASKS[getattr(target, "task", None) or DEFAULT]
