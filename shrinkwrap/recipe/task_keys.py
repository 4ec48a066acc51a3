"""The recipe keys that belong to one task only (`task: classification | embedding`): each refused on the other
task, with one line saying why. Called by Recipe's validator."""
from __future__ import annotations

from shrinkwrap.recipe.budget import TASK_QUALITY_KEYS, foreign_keys


def check_task_keys(recipe) -> None:
    """ValueError (the validator's one line) for a key the recipe's task does not take."""
    foreign = foreign_keys(recipe.budget, recipe.task)
    if foreign:
        raise ValueError(f"budget.{foreign[0]} is not a limit of task: {recipe.task} — its quality limits are "
                         f"{', '.join(TASK_QUALITY_KEYS[recipe.task])}")
    if recipe.task == "embedding":
        if recipe.data.text_pair and not recipe.data.score:
            raise ValueError(f"data.text_pair = {recipe.data.text_pair!r} without data.score with task: embedding — "
                             f"pairs are measured by how their cosine ranks against a score: set data.score")
        if recipe.budget.max_knn_accuracy_drop_points is not None and recipe.data.label is None:
            raise ValueError("budget.max_knn_accuracy_drop_points needs labels — data.label is null (kNN accuracy "
                             "is measured on the test texts' labels)")
        if recipe.student.metric not in (None, "cosine"):
            raise ValueError(f"student.metric = {recipe.student.metric} with task: embedding — an embedding student "
                             f"stops on `cosine`, its validation vectors' mean cosine to the teacher's")
        if recipe.teacher.trained or recipe.teacher.class_weights:
            raise ValueError("teacher.trained / teacher.class_weights with task: embedding — an embedding teacher "
                             "is a sentence encoder used as is, never fine-tuned")
        return
    for key, value in (("data.score", recipe.data.score), ("teacher.pooling", recipe.teacher.pooling),
                       ("teacher.normalize", recipe.teacher.normalize),
                       ("student.metric", "cosine" if recipe.student.metric == "cosine" else None),
                       ("student.cosine_weight", recipe.student.cosine_weight or None)):
        if value is not None:
            raise ValueError(f"{key} = {value} but task is classification — it belongs to task: embedding")
    if recipe.data.label is None:
        raise ValueError("data.label = null with task: classification — a classifier needs its label column")
