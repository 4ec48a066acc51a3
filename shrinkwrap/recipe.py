"""The recipe: one YAML file that says what to shrink and how.

This is the only module that knows the recipe's keys. Everything else receives the validated
`Recipe` object (plain data) and reads its fields.
"""
from __future__ import annotations

import json
from pathlib import Path
from typing import Any, Literal, Optional

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from shrinkwrap.errors import UserError
from shrinkwrap.fingerprint import sha256_json


class _Section(BaseModel):
    # Unknown keys are a typo until proven otherwise.
    model_config = ConfigDict(extra="forbid", validate_assignment=True)


class DataConfig(_Section):
    path: str = Field(description="CSV, JSONL or Parquet file, or a `datasets` folder saved with save_to_disk")
    text: str = Field("text", description="column holding the text")
    text_pair: Optional[str] = Field(None, description="optional second text column: inputs become [CLS] a [SEP] b [SEP]")
    label: str = Field("label", description="column holding the class label")
    test_size: float = Field(0.2, gt=0, lt=1, description="share held out for the test split (when the data has no splits)")
    validation_size: float = Field(0.1, gt=0, lt=1, description="share of the rest held out for validation")
    seed: int = Field(0, description="seed of the stratified split")
    drop_empty: bool = Field(False, description="drop rows whose text is empty or whitespace (otherwise they are an error)")

    @model_validator(mode="after")
    def _shares(self) -> "DataConfig":
        if self.test_size + self.validation_size >= 1:
            raise ValueError(f"test_size + validation_size = {self.test_size + self.validation_size:g} — must be below 1")
        return self


class TeacherConfig(_Section):
    base: str = Field("bundled", description="`bundled` (the packaged MiniLM-L6-H384), a local transformers folder, or a hub id when online")
    epochs: int = Field(3, ge=1, description="fine-tuning epochs")
    max_length: int = Field(128, ge=8, le=4096, description="tokens per input after truncation")
    learning_rate: float = Field(5e-5, gt=0, lt=1)
    batch_size: int = Field(16, ge=1)
    weight_decay: float = Field(0.01, ge=0)
    warmup_ratio: float = Field(0.1, ge=0, lt=1, description="share of steps with linear warm-up")
    max_grad_norm: float = Field(1.0, gt=0)
    seeds: list[int] = Field(default_factory=lambda: [0], min_length=1, description="one fine-tuning run per seed; the best on validation is kept")
    patience: int = Field(2, ge=1, description="epochs without improvement before stopping early")
    metric: Literal["accuracy", "macro_f1"] = Field("accuracy", description="validation metric for early stopping and seed choice")
    class_weights: bool = Field(False, description="weight the loss by inverse class frequency")
    trust_remote_code: bool = Field(False, description="allow code shipped with a hub model to run (off unless you trust it)")
    stall_steps: int = Field(100, ge=0, description="a run whose loss has not fallen by stall_fraction after this many steps is degenerate (0 = off)")
    stall_fraction: float = Field(0.1, ge=0, lt=1)
    collapse_share: float = Field(0.95, gt=0, le=1, description="validation predictions this concentrated on one class = a degenerate run")

    @field_validator("seeds")
    @classmethod
    def _unique_seeds(cls, v: list[int]) -> list[int]:
        if len(set(v)) != len(v):
            raise ValueError(f"{v} has a repeated seed")
        return v


class StudentConfig(_Section):
    layers: Optional[list[int]] = Field(None, description="teacher layer indices kept to initialise the student (default: evenly spaced)")
    num_layers: int = Field(3, ge=1, description="how many layers to keep when `layers` is not given")
    temperature: float = Field(2.0, gt=0, description="softmax temperature of the soft-label term")
    alpha: float = Field(0.5, ge=0, le=1, description="weight of the soft-label term; 1 - alpha weighs the hard-label loss")
    epochs: int = Field(3, ge=1)
    learning_rate: float = Field(1e-4, gt=0, lt=1)
    batch_size: int = Field(16, ge=1)
    weight_decay: float = Field(0.01, ge=0)
    warmup_ratio: float = Field(0.1, ge=0, lt=1)
    patience: int = Field(2, ge=1)
    seed: int = 0

    @field_validator("layers")
    @classmethod
    def _layers(cls, v: Optional[list[int]]) -> Optional[list[int]]:
        if v is None:
            return v
        if not v:
            raise ValueError("[] — keep at least one layer")
        if any(i < 0 for i in v):
            raise ValueError(f"{v} — layer indices start at 0")
        if len(set(v)) != len(v):
            raise ValueError(f"{v} has a repeated layer")
        if sorted(v) != v:
            raise ValueError(f"{v} — list the layers in increasing order")
        return v


class QuantizeConfig(_Section):
    enabled: bool = Field(True, description="run PyTorch dynamic int8 on the student")


class ExportConfig(_Section):
    opset: int = Field(18, ge=14, le=21, description="ONNX opset")
    optimize: Literal["auto", "always", "never"] = Field(
        "auto", description="ONNX Runtime transformer fusion: `auto` keeps the fused graph only if it is faster")
    parity_tolerance: float = Field(1e-4, gt=0, description="largest allowed |logit difference| between ONNX fp32 and PyTorch")


class OnnxQuantizeConfig(_Section):
    per_channel: bool = Field(False, description="per-channel weight scales instead of one per tensor")
    op_types: list[Literal["MatMul", "Gather", "Attention", "EmbedLayerNormalization", "Gemm"]] = Field(
        default_factory=lambda: ["MatMul", "Attention", "Gather", "EmbedLayerNormalization"],
        min_length=1, description="operator types quantised (Gather/EmbedLayerNormalization = the embedding lookup)")


class BenchConfig(_Section):
    batch_size: int = Field(1, ge=1)
    sequence_length: int = Field(128, ge=1)
    threads: int = Field(2, ge=1)
    warmup: int = Field(5, ge=0, description="untimed runs before timing")
    repeats: int = Field(30, ge=3, description="timed runs, at least")
    min_time_s: float = Field(1.0, ge=0, description="keep timing until this many seconds have passed")
    eval_batch_size: int = Field(32, ge=1, description="batch size of the accuracy pass over the test split")


class BudgetConfig(_Section):
    latency_p95_ms: Optional[float] = Field(None, gt=0, description="largest p95 latency of the final step, ms")
    size_mb: Optional[float] = Field(None, gt=0, description="largest size of the final step, MB (10^6 bytes)")
    accuracy_drop_points: Optional[float] = Field(None, ge=0, description="largest accuracy drop vs the teacher, points")
    min_accuracy: Optional[float] = Field(None, ge=0, le=1, description="smallest accuracy of the final step, as a fraction")


class Recipe(_Section):
    name: str = Field(min_length=1, pattern=r"^[A-Za-z0-9][A-Za-z0-9._-]*$")
    data: DataConfig
    teacher: TeacherConfig = Field(default_factory=TeacherConfig)
    student: StudentConfig = Field(default_factory=StudentConfig)
    quantize: QuantizeConfig = Field(default_factory=QuantizeConfig)
    export: ExportConfig = Field(default_factory=ExportConfig)
    onnx_quantize: OnnxQuantizeConfig = Field(default_factory=OnnxQuantizeConfig)
    bench: BenchConfig = Field(default_factory=BenchConfig)
    budget: BudgetConfig = Field(default_factory=BudgetConfig)

    # Where the recipe file lives: relative paths in it resolve against this folder.
    source: Optional[str] = Field(None, exclude=True)

    def resolve(self, path: str) -> Path:
        p = Path(path).expanduser()
        if not p.is_absolute() and self.source:
            p = Path(self.source).parent / p
        return p

    def fingerprint(self) -> str:
        return sha256_json(self.model_dump(mode="json"))

    def section_fingerprint(self, *sections: str) -> str:
        dump = self.model_dump(mode="json")
        return sha256_json({s: dump[s] for s in sections})


def _place(loc: tuple) -> str:
    out = ""
    for part in loc:
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
    return out


def _dig(data: Any, loc: tuple) -> Any:
    for part in loc:
        try:
            data = data[part]
        except (KeyError, IndexError, TypeError):
            return None
    return data


def _explain(err: dict, raw: dict, where: str) -> str:
    loc = tuple(p for p in err["loc"] if not (isinstance(p, str) and p.startswith("function-")))
    place = _place(loc) or "(top level)"
    kind = err["type"]
    msg = err["msg"].removeprefix("Value error, ")
    if kind == "extra_forbidden":
        parent = _place(loc[:-1])
        model: Any = Recipe
        for part in loc[:-1]:
            model = model.model_fields[part].annotation if isinstance(part, str) else model
        allowed = ", ".join(model.model_fields) if hasattr(model, "model_fields") else ""
        return f"{where}: unknown key {place!s}" + (f" — allowed keys in {parent or 'the top level'}: {allowed}" if allowed else "")
    if kind == "missing":
        return f"{where}: {place} is missing — it is required"
    value = _dig(raw, loc)
    return f"{where}: {place} = {json.dumps(value) if value is not None else 'null'} — {msg}"


def parse_override(text: str) -> tuple[list[str], Any]:
    if "=" not in text:
        raise UserError(f"--set {text} — expected key.path=value")
    key, value = text.split("=", 1)
    if not key or any(not p for p in key.split(".")):
        raise UserError(f"--set {text} — expected key.path=value")
    return key.split("."), yaml.safe_load(value) if value != "" else ""


def apply_overrides(raw: dict, overrides: list[str]) -> dict:
    for text in overrides:
        path, value = parse_override(text)
        node = raw
        for part in path[:-1]:
            if not isinstance(node.get(part, {}), dict):
                raise UserError(f"--set {text} — {part} is not a section")
            node = node.setdefault(part, {})
        node[path[-1]] = value
    return raw


def load_recipe(path: str | Path, overrides: list[str] = ()) -> Recipe:
    path = Path(path)
    where = str(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise UserError(f"{where}: no such recipe file")
    except UnicodeDecodeError as e:
        raise UserError(f"{where}: not UTF-8 text (byte {e.start})")
    except OSError as e:
        raise UserError(f"{where}: cannot read — {e.strerror}")
    try:
        raw = yaml.safe_load(text)  # safe_load: a recipe can never construct Python objects
    except yaml.YAMLError as e:
        mark = getattr(e, "problem_mark", None)
        line = f" line {mark.line + 1}" if mark else ""
        raise UserError(f"{where}:{line} is not valid YAML — {getattr(e, 'problem', e)}")
    if not isinstance(raw, dict):
        raise UserError(f"{where}: expected a mapping of keys at the top level")
    raw = apply_overrides(raw, list(overrides))
    return validate_recipe(raw, where, source=str(path.resolve()))


def validate_recipe(raw: dict, where: str = "recipe", source: Optional[str] = None) -> Recipe:
    try:
        recipe = Recipe.model_validate(raw)
    except ValidationError as e:
        # One line, the first problem: fixing one usually changes the rest.
        raise UserError(_explain(e.errors()[0], raw, where)) from None
    recipe.source = source
    return recipe
