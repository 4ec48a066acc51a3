"""The tasks the outputs know, each one module beside this one answering the same names:

    NAME, ARTICLE                          the task's name, and "a" or "an" before it
    BUDGET_KEYS                            the budget keys that judge its quality
    QUALITY, QUALITY_LABEL                 the metric a step's quality is plotted by, and its name in words
    compare(row, teacher, test_labels) -> dict   what a step's results row holds against the teacher's
    headline(row) -> str                   a step's quality in a few words
    artifact_metrics(row) -> dict          the shipped step's quality as an artifact's manifest records it
    quality_checks(results, step, budget, where) -> [Check]   those limits on one step
    cautions(results, budget) -> [(step, line)]   what its averages hide: the step each concerns, one line
    CAUTION_RULE, CAUTION_RULE_TITLE, NO_CAUTION   the rule the cautions follow, and what is said when none applies
    per_class_cautions(results) -> [str]   the model card's bullets of what a class lost (none: [])
    step_rows(results) -> (header, rows, caption)             the table of every step
    per_class_rows(results) -> (header, rows)                 a table of every class (none: no rows)
    class_changes(results, step) -> [dict]                    per class, how the step changed against the teacher
    detail_sections(results) -> [(title, parts)]              the report's sections beside the step table
"""
from __future__ import annotations

from types import ModuleType

from shrinkwrap.outputs import classification, embedding

TASKS = {classification.NAME: classification, embedding.NAME: embedding}
DEFAULT = classification.NAME


def of_results(results: dict) -> ModuleType:
    """The task a run's results are of (a run made before tasks were recorded is a classification one)."""
    from shrinkwrap.outputs.results import recipe_dump

    return TASKS[recipe_dump(results).get("task", DEFAULT)]
