"""The budget: the limits a release is gated on (a recipe's `budget:` section, or a budget file of the same
keys), and the tolerances against a baseline run."""
from __future__ import annotations

from pathlib import Path
from typing import Optional

from pydantic import Field, ValidationError, model_validator

from shrinkwrap.recipe.base import RENAMED_KEYS, Section
from shrinkwrap.recipe.yaml_io import explain, key_lines, read_yaml_mapping
from shrinkwrap.serve.errors import UserError


# The limits that judge each task's quality (the latency, size and regression ones judge every task).
TASK_QUALITY_KEYS = {
    "classification": ("accuracy_drop_points", "accuracy_drop_upper_bound", "min_accuracy",
                       "max_class_recall_drop_points", "min_agreement", "max_ece"),
    "embedding": ("min_cosine_to_teacher", "min_neighbour_recall", "min_cross_recall", "max_knn_accuracy_drop_points"),
}


def foreign_keys(budget: "BudgetConfig", task: str) -> list[str]:
    """The quality limits set in `budget` that judge another task than `task`."""
    return [k for k in budget.quality_keys() if k not in TASK_QUALITY_KEYS[task]]


class RegressionTolerance(Section):
    p95_percent: Optional[float] = Field(None, ge=0, description="largest rise of p95 latency over the baseline's same step, percent")
    accuracy_points: Optional[float] = Field(None, ge=0, description="largest fall of accuracy below the baseline's same step, points")
    size_percent: Optional[float] = Field(None, ge=0, description="largest growth of size over the baseline's same step, percent")


class BudgetConfig(Section):
    """Release limits on the gated step (the final one unless `shrinkwrap gate --step` names another)."""
    latency_p95_ms: Optional[float] = Field(None, gt=0, description="largest p95 latency of the gated step, ms")
    latency_p95_over_reference: Optional[float] = Field(
        None, gt=0, description="largest p95 latency as a multiple of the reference matrix-product workload timed in "
        "the same run (steadier across machines than ms)")
    batch_size: Optional[int] = Field(None, ge=1, description="batch size the latency limits are meant at: the step "
                                      "must have been measured at it")
    sequence_length: Optional[int] = Field(None, ge=1, description="tokens per input the latency limits are meant at")
    size_mb: Optional[float] = Field(None, gt=0, description="largest size of the gated step, MB (10^6 bytes)")
    min_speedup: Optional[float] = Field(
        None, gt=0, description="smallest teacher p95 / gated step p95, both timed in the same run at the budget's "
        "batch size and length (holds across faster and slower machines better than ms)")
    min_shrink: Optional[float] = Field(None, gt=0, description="smallest teacher size / gated step size, same run")
    accuracy_drop_points: Optional[float] = Field(None, ge=0, description="largest accuracy drop vs the teacher, points")
    accuracy_drop_upper_bound: bool = Field(
        False, description="limit the upper end of the drop's 95 % bootstrap interval instead of the measured drop (stricter)")
    min_accuracy: Optional[float] = Field(None, ge=0, le=1, description="smallest accuracy of the gated step, as a fraction")
    max_class_recall_drop_points: Optional[float] = Field(
        None, ge=0, le=100, description="largest recall loss of any one class vs the teacher, points (the gate names the class)")
    min_agreement: Optional[float] = Field(
        None, ge=0, le=1, description="smallest share of test texts given the teacher's label, as a fraction")
    max_ece: Optional[float] = Field(
        None, ge=0, le=1, description="largest expected calibration error (15 bins) of the shipped artifact on the test "
        "split, with its temperature")
    min_cosine_to_teacher: Optional[float] = Field(
        None, ge=-1, le=1, description="task: embedding — smallest mean cosine of the gated step's test vectors to the "
        "teacher's vectors of the same texts")
    min_neighbour_recall: Optional[float] = Field(
        None, ge=0, le=1, description="task: embedding — smallest neighbour recall at 10: the share of each test text's "
        "10 nearest under the teacher's vectors found again under the step's, averaged")
    min_cross_recall: Optional[float] = Field(
        None, ge=0, le=1, description="task: embedding — smallest cross recall at 10: the same with queries embedded by "
        "the step against an index of the teacher's vectors (an index that is not rebuilt)")
    max_knn_accuracy_drop_points: Optional[float] = Field(
        None, ge=0, description="task: embedding — largest loss of 5-nearest-neighbour accuracy (leave-one-out on the "
        "test split) vs the teacher, points (needs data.label)")
    min_capacity_rps: Optional[float] = Field(
        None, gt=0, description="smallest capacity of the served artifact: the requests per second (one text each) "
        "it answers with p95 within the limit `shrinkwrap bench --load` measured at, checked by `shrinkwrap gate "
        "--load FILE.json` against that command's JSON")
    regression: RegressionTolerance = Field(
        default_factory=RegressionTolerance, description="limits against a baseline results.json (shrinkwrap gate --baseline)")

    @model_validator(mode="after")
    def _latency_shape(self) -> "BudgetConfig":
        has_latency = (self.latency_p95_ms or self.latency_p95_over_reference or self.min_speedup
                       or self.regression.p95_percent is not None)
        if (self.batch_size or self.sequence_length) and not has_latency:
            raise ValueError("batch_size / sequence_length say where latency is measured — set a latency limit too")
        if self.accuracy_drop_upper_bound and self.accuracy_drop_points is None:
            raise ValueError("accuracy_drop_upper_bound is set — set accuracy_drop_points too")
        return self

    def speed_size_limits(self) -> dict:
        """The limits a model's shapes alone decide (no training needed to check them): name -> value."""
        names = ("latency_p95_ms", "latency_p95_over_reference", "size_mb", "min_speedup", "min_shrink")
        return {n: getattr(self, n) for n in names if getattr(self, n) is not None}

    def quality_keys(self) -> list[str]:
        """The limits set on a model's quality (every key but the latency, size, shape and regression ones):
        which apply depends on the run's task."""
        general = {*self.speed_size_limits(), "batch_size", "sequence_length", "regression", "min_capacity_rps"}
        return [k for k in type(self).model_fields if k not in general and getattr(self, k) not in (None, False)]

    def limits_set(self) -> bool:
        """Whether a limit is set that needs no baseline (what `shrinkwrap run` can check at its end)."""
        return bool(self.speed_size_limits() or self.quality_keys())


def load_budget(path: str | Path) -> BudgetConfig:
    """A budget file: YAML whose keys are those of a recipe's `budget:` section."""
    path = Path(path)
    return validate_budget(read_yaml_mapping(path, "budget"), str(path), key_lines(path))


def validate_budget(raw: dict, where: str, lines: Optional[dict[tuple, int]] = None) -> BudgetConfig:
    try:
        return BudgetConfig.model_validate(raw)
    except ValidationError as e:
        raise UserError(explain(e.errors()[0], raw, where, BudgetConfig, RENAMED_KEYS, lines)) from None
