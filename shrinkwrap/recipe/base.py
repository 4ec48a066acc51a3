"""What every recipe section shares: unknown keys refused, values checked on assignment too, and the rule for
lists whose items must not repeat; and the keys renamed since they first shipped."""
from __future__ import annotations

from pydantic import BaseModel, ConfigDict


class Section(BaseModel):
    # Unknown keys are a typo until proven otherwise.
    model_config = ConfigDict(extra="forbid", validate_assignment=True)


def no_repeats(values: list, what: str = "") -> list:
    """`values` unchanged when no item is repeated; a ValueError naming the first repeated one otherwise."""
    repeated = next((v for v in values if values.count(v) > 1), None)
    if repeated is not None:
        raise ValueError(f"{what}{repeated} is repeated")
    return values


# Keys renamed since they first shipped: a recipe with the old name gets the new one in its error.
RENAMED_KEYS = {"bench.warmup_s": "bench.warm_seconds", "bench.min_time_s": "bench.timed_seconds",
                "onnx_quantize.op_types": "onnx_quantize.int8_operators"}
