"""The tasks the benchmark measures, each one module beside this one answering the same names:

    NAME                                        the task's name
    quality(outputs, labels, n_labels, temperature) -> (metrics, predictions)   a step's quality on the test texts
"""
from __future__ import annotations

from types import ModuleType

from shrinkwrap.bench import classification

TASKS = {classification.NAME: classification}
DEFAULT = classification.NAME


def of_target(target) -> ModuleType:
    """The task of a loaded target (every target is a classifier today)."""
    return TASKS[getattr(target, "task", None) or DEFAULT]
