"""The tasks the outputs know, each one module beside this one answering the same names:

    NAME                                   the task's name
    BUDGET_KEYS                            the budget keys that judge its quality
    quality_checks(results, step, budget, where) -> [Check]   those limits on one step
    cautions(results, budget) -> [(step, line)]   what its averages hide: the step each concerns, one line
    CAUTION_RULE, NO_CAUTION               the rule the cautions follow, and what is said when none applies
    per_class_cautions(results) -> [str]   the model card's bullets of what a class lost (none: [])
    step_rows(results) -> (header, rows, caption)             the table of every step
    per_class_rows(results) -> (header, rows)                 a table of every class (none: no rows)
    class_changes(results, step) -> [dict]                    per class, how the step changed against the teacher
"""
from __future__ import annotations

from types import ModuleType

from shrinkwrap.outputs import classification

TASKS = {classification.NAME: classification}
DEFAULT = classification.NAME


def of_results(results: dict) -> ModuleType:
    """The task a run's results are of (every run is a classification one today)."""
    from shrinkwrap.outputs.results import recipe_dump

    return TASKS[recipe_dump(results).get("task", DEFAULT)]
