"""The recipe: one YAML file that says what to shrink and how.

This is the only module that knows the recipe's keys. Everything else receives the validated
`Recipe` object (plain data) and reads its fields.
"""
from __future__ import annotations

import json
from pathlib import Path
from typing import Any, Literal, Optional

from pydantic import Field, ValidationError, field_validator, model_validator

from shrinkwrap.recipe.base import RENAMED_KEYS, Section, no_repeats
from shrinkwrap.recipe.budget import BudgetConfig
from shrinkwrap.recipe.task_keys import check_task_keys
from shrinkwrap.recipe.yaml_io import (apply_overrides, error_loc, explain, key_lines, key_path, parse_override,
                                        read_yaml_mapping)
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.fingerprint import sha256_json


class DataConfig(Section):
    path: str = Field(description="CSV, JSONL or Parquet file, or a `datasets` folder saved with save_to_disk")
    text: str = Field("text", description="column holding the text")
    text_pair: Optional[str] = Field(None, description="optional second text column: for classification inputs "
                                     "become [CLS] a [SEP] b [SEP]; for embedding each text is embedded alone and "
                                     "the pair's cosine is compared with data.score")
    label: Optional[str] = Field("label", description="column holding the class label (task: embedding — optional: "
                                 "it enables the kNN and probe accuracies; a table without this column has none)")
    score: Optional[str] = Field(None, description="task: embedding — numeric column scoring how alike text and "
                                 "text_pair are (enables Spearman's rho of their cosine against it)")
    test_size: float = Field(0.2, gt=0, lt=1, description="share held out for the test split (when the data has no splits)")
    validation_size: float = Field(0.1, gt=0, lt=1, description="share of the rest held out for validation")
    seed: int = Field(0, description="seed of the stratified split")
    drop_empty: bool = Field(False, description="drop rows whose text is empty or whitespace (otherwise they are an error)")
    truncation: Literal["head", "tail", "head_tail"] = Field(
        "head", description="which tokens of a text longer than teacher.max_length are kept: its start, its end, or "
                            "both (head_tail: a quarter of the tokens from the start, the rest from the end; single "
                            "texts only); every step, the benchmark and predict cut the same way")

    @model_validator(mode="after")
    def _shares(self) -> "DataConfig":
        if self.test_size + self.validation_size >= 1:
            raise ValueError(f"test_size + validation_size = {self.test_size + self.validation_size:g} — must be below 1")
        if self.truncation == "head_tail" and self.text_pair:
            raise ValueError(f"truncation = head_tail with text_pair = {self.text_pair!r} — head_tail cuts single "
                             f"texts; pairs take head or tail")
        if self.score and not self.text_pair:
            raise ValueError(f"score = {self.score!r} without text_pair — a score says how alike the two texts of a "
                             f"pair are; set text_pair too")
        return self


class TeacherConfig(Section):
    base: str = Field("bundled", description="`bundled` (the packaged MiniLM-L6-H384), a local transformers folder with safetensors weights (relative to the recipe's folder), or a hub id already in the local Hugging Face cache (nothing is downloaded)")
    trained: bool = Field(False, description="`base` is already a fine-tuned sequence classifier (with its head): it is used as is, not trained; its id2label names must be the data's label names")
    epochs: int = Field(3, ge=1, description="fine-tuning epochs")
    max_length: int = Field(128, ge=8, le=4096, description="tokens per input after truncation")
    learning_rate: float = Field(5e-5, gt=0, lt=1, description="peak learning rate of AdamW (after warm-up, decays linearly to 0)")
    batch_size: int = Field(16, ge=1, description="texts per optimizer step")
    weight_decay: float = Field(0.01, ge=0, description="AdamW weight decay (not on biases and LayerNorm)")
    warmup_ratio: float = Field(0.1, ge=0, lt=1, description="share of steps with linear warm-up")
    max_grad_norm: float = Field(1.0, gt=0, description="gradient norm clipping")
    seeds: list[int] = Field(default_factory=lambda: [0], min_length=1, description="one fine-tuning run per seed; the best on validation is kept")
    patience: int = Field(2, ge=1, description="epochs without improvement before stopping early")
    metric: Literal["accuracy", "macro_f1"] = Field("accuracy", description="validation metric for early stopping and seed choice")
    class_weights: bool = Field(False, description="weight the loss by inverse class frequency")
    trust_remote_code: bool = Field(False, description="allow code shipped with a hub model to run (off unless you trust it)")
    pooling: Optional[Literal["mean", "cls", "max"]] = Field(
        None, description="task: embedding — how the teacher's token vectors become one vector per text, when its "
        "folder does not say (a sentence-transformers pooling config does): mean of the tokens, the first token's, or "
        "the largest of each dimension")
    normalize: Optional[bool] = Field(None, description="task: embedding — L2-normalise the pooled vector, when the "
                                      "teacher's folder does not say (a sentence-transformers Normalize module does)")
    stall_steps: int = Field(100, ge=0, description="a run whose loss has not fallen by stall_fraction after this many steps is degenerate (0 = off)")
    stall_fraction: float = Field(0.1, ge=0, lt=1, description="share of the starting loss it must have lost after stall_steps")
    collapse_share: float = Field(0.95, gt=0, le=1, description="validation predictions this concentrated on one class = a degenerate run")
    checkpoint_every_steps: int = Field(50, ge=0, description="save a resumable checkpoint every this many optimizer steps and at each epoch end (0 = never)")

    @field_validator("seeds")
    @classmethod
    def _unique_seeds(cls, v: list[int]) -> list[int]:
        return no_repeats(v, "seed ")


# The teacher keys that only steer fine-tuning: with trained: true they no longer apply.
TRAINING_ONLY_TEACHER_KEYS = ("epochs", "learning_rate", "batch_size", "weight_decay", "warmup_ratio", "max_grad_norm",
                              "seeds", "patience", "metric", "class_weights", "stall_steps", "stall_fraction",
                              "collapse_share", "checkpoint_every_steps")


class StudentConfig(Section):
    init: Literal["teacher_layers", "pretrained", "config"] = Field(
        "teacher_layers", description="teacher_layers: copy of the teacher keeping `layers`; pretrained: the model in "
        "`base` (its tokenizer must equal the teacher's); config: random weights of a smaller shape (needs far more data)")
    layers: Optional[list[int]] = Field(None, description="teacher layer indices kept to initialise the student (default: evenly spaced)")
    num_layers: int = Field(3, ge=1, description="how many layers to keep when `layers` is not given (also the depth with init: config)")
    base: Optional[str] = Field(None, description="with init: pretrained — a local transformers folder")
    hidden_size: Optional[int] = Field(None, ge=8, description="with init: config — width (default: the teacher's)")
    intermediate_size: Optional[int] = Field(None, ge=8, description="with init: config — feed-forward width (default: 4 × hidden_size)")
    num_attention_heads: Optional[int] = Field(None, ge=1, description="with init: config — heads (default: the teacher's)")
    hidden_weight: float = Field(0.0, ge=0, description="weight of the hidden-state MSE between mapped layers (0 = off)")
    attention_weight: float = Field(0.0, ge=0, description="weight of the attention-distribution KL between mapped layers (0 = off)")
    transfer_path: Optional[str] = Field(None, description="unlabeled in-domain texts the teacher labels softly: .txt (one per line), .csv, .jsonl or .parquet")
    transfer_column: Optional[str] = Field(None, description="text column of transfer_path when it is a table (default: data.text)")
    temperature: float = Field(2.0, gt=0, description="softmax temperature of the soft-label term")
    alpha: float = Field(0.5, ge=0, le=1, description="weight of the soft-label term; 1 - alpha weighs the hard-label loss")
    max_length: Optional[int] = Field(None, ge=8, le=4096, description="tokens per input the student and the artifact "
                                      "read (default: teacher.max_length, at most that): input length is one of the "
                                      "strongest levers on latency")
    epochs: Optional[int] = Field(None, ge=0, description="distillation epochs (default: scaled to the texts "
                                  "distilled on, n: ceil(30,000 / n) kept within 3–10, so a small training set gets "
                                  "more; 0: none, the student is its starting point as it is)")
    metric: Optional[Literal["accuracy", "macro_f1", "agreement", "cosine"]] = Field(
        None, description="validation figure that picks the best epoch and stops early: `agreement` is the share "
        "of validation texts given the teacher's label (default: teacher.metric); a tie goes to the epoch whose "
        "outputs are closer to the teacher's (smaller KL divergence); task: embedding — `cosine` (the default), the "
        "mean cosine of the student's validation vectors to the teacher's")
    cosine_weight: float = Field(0.0, ge=0, description="task: embedding — weight of a (1 − cosine) term beside "
                                 "the mean-squared error to the teacher's vectors (0 = off)")
    learning_rate: float = Field(1e-4, gt=0, lt=1, description="peak learning rate of AdamW")
    batch_size: int = Field(16, ge=1, description="texts per optimizer step")
    weight_decay: float = Field(0.01, ge=0, description="AdamW weight decay")
    warmup_ratio: float = Field(0.1, ge=0, lt=1, description="share of steps with linear warm-up")
    patience: int = Field(2, ge=1, description="epochs without improvement before stopping early")
    seed: int = Field(0, description="seed of the data order (and of the weights with init: config)")
    checkpoint_every_steps: int = Field(50, ge=0, description="save a resumable checkpoint every this many optimizer steps and at each epoch end (0 = never)")

    @model_validator(mode="after")
    def _init_keys(self) -> "StudentConfig":
        if self.init == "pretrained" and not self.base:
            raise ValueError("init is pretrained — set student.base to the pre-trained student's folder")
        if self.init != "pretrained" and self.base:
            raise ValueError(f"base is set but init is {self.init} — base goes with init: pretrained")
        if self.init != "teacher_layers" and self.layers is not None:
            raise ValueError(f"layers is set but init is {self.init} — layers goes with init: teacher_layers")
        if self.init != "config" and (self.hidden_size or self.intermediate_size or self.num_attention_heads):
            raise ValueError(f"hidden_size / intermediate_size / num_attention_heads go with init: config, not {self.init}")
        if self.hidden_size and self.num_attention_heads and self.hidden_size % self.num_attention_heads:
            raise ValueError(f"hidden_size {self.hidden_size} is not a multiple of num_attention_heads {self.num_attention_heads}")
        return self

    @field_validator("layers")
    @classmethod
    def _layers(cls, v: Optional[list[int]]) -> Optional[list[int]]:
        if v is None:
            return v
        if not v:
            raise ValueError("keep at least one layer")
        if any(i < 0 for i in v):
            raise ValueError("layer indices start at 0")
        no_repeats(v, "layer ")
        if sorted(v) != v:
            raise ValueError("list the layers in increasing order")
        return v


class PruneConfig(Section):
    """Step student-pruned (off by default): structured pruning of the student, then a short distillation."""
    enabled: bool = Field(False, description="run step student-pruned: remove the least important attention heads and "
                          "feed-forward neurons of every student layer, then distil briefly to recover")
    heads_removed: int = Field(0, ge=0, description="attention heads removed from every layer, least important first "
                               "(importance: mean size of the loss's gradient with respect to a head mask, Michel, Levy & Neubig 2019)")
    neurons_removed_share: float = Field(0.0, ge=0, lt=1, description="share of the feed-forward neurons removed from "
                                         "every layer, least important first (importance: gradient × activation)")
    importance_texts: int = Field(512, ge=1, description="training texts the importance is measured on (the first ones)")
    epochs: int = Field(2, ge=0, description="distillation epochs after pruning, on the teacher's cached outputs (0 = none)")
    learning_rate: float = Field(5e-5, gt=0, lt=1, description="learning rate of that distillation (the rest as in student)")

    @model_validator(mode="after")
    def _something_to_remove(self) -> "PruneConfig":
        if self.enabled and self.heads_removed == 0 and self.neurons_removed_share == 0:
            raise ValueError("enabled is true but nothing is removed — set heads_removed or neurons_removed_share")
        return self


class TrimVocabConfig(Section):
    """Step student-trimmed (off by default): the vocabulary cut to the pieces the training texts use."""
    enabled: bool = Field(False, description="run step student-trimmed: keep only the vocabulary pieces (and special "
                          "tokens) that the training and transfer texts are split into, with their embedding rows "
                          "(WordPiece; BPE also keeps the merges that build them and its base alphabet, Unigram every "
                          "character the texts hold); the tokenizer becomes a smaller one that splits those texts "
                          "exactly as before")


class AugmentConfig(Section):
    """Augmented copies of the training texts in the transfer set (Tang et al. 2019); off by default."""
    copies: int = Field(0, ge=0, le=100, description="augmented copies of each training text the teacher labels "
                        "softly and the student distils on (0 = none); they never enter validation or test")
    transforms: list[Literal["mask", "replace", "ngram", "swap"]] = Field(
        default_factory=lambda: ["mask", "replace", "ngram"], min_length=1,
        description="mask: words become the mask token; replace: words become others seen in the same slot of the "
        "training texts; ngram: only a few consecutive words are kept; swap (pairs only): the two texts change "
        "places — list it only when the label does not depend on their order")
    seed: int = Field(0, description="seed of the copies (the same seed gives the same copies)")

    @field_validator("transforms")
    @classmethod
    def _unique(cls, v: list[str]) -> list[str]:
        return no_repeats(v)


class TrainConfig(Section):
    precision: Literal["fp32", "bf16", "fp16"] = Field(
        "fp32", description="training precision on a GPU (bf16/fp16 mixed precision); a CPU always trains in fp32, with a notice")
    gradient_accumulation_steps: int = Field(
        1, ge=1, description="batches whose gradients add up before one optimizer step (effective batch = batch_size × this × processes)")
    length_grouped: bool = Field(
        False, description="training batches of texts of similar length (random groups of 50 batches sorted by length): less padding where lengths vary widely, e.g. with augmented n-gram copies")


class QuantizeConfig(Section):
    enabled: bool = Field(True, description="run PyTorch dynamic int8 on the student")


class ExportConfig(Section):
    opset: int = Field(18, ge=14, le=21, description="ONNX opset")
    optimize: Literal["auto", "always", "never"] = Field(
        "auto", description="ONNX Runtime transformer fusion: `auto` ships the fused graph when it passes the parity check, "
                            "else the plain export; `always` fails the step instead; `never` ships the plain export")
    parity_tolerance: float = Field(1e-4, gt=0, description="largest allowed absolute logit difference between ONNX fp32 and PyTorch")


# Operator types ONNX Runtime's static (QDQ) quantiser handles among those int8_operators allows: it has no
# form of the fused Attention and EmbedLayerNormalization.
STATIC_OP_TYPES = ("MatMul", "Gather", "Gemm")


class OnnxQuantizeConfig(Section):
    per_channel: bool = Field(True, description="int8 weights with one scale per output column (false: one "
                              "scale per tensor, which lost up to 2.5 more points on the small pair tasks measured)")
    int8_operators: list[Literal["MatMul", "Gather", "Attention", "EmbedLayerNormalization", "Gemm"]] = Field(
        default_factory=lambda: ["MatMul", "Attention", "Gather", "EmbedLayerNormalization"],
        min_length=1, description="operator types quantised. MatMul (and Gemm) covers every product with a stored "
                                  "weight, the attention projections of the shipped step included; the embedding "
                                  "lookup (about half of a small model's bytes) is Gather in an unfused graph and "
                                  "EmbedLayerNormalization in a fused one; Attention holds a fused graph's "
                                  "query/key/value weights (the dynamic step's)")
    static: bool = Field(False, description="also run step student-onnx-int8-static: weights and activations int8 "
                                            "(QDQ), activation ranges calibrated on training texts")
    static_calibration_texts: int = Field(100, ge=1, description="training texts the static step calibrates on")
    dynamic: bool = Field(False, description="also run step student-onnx-int8-dynamic: ONNX Runtime's dynamic int8, "
                                             "activations scaled over the whole batch, so a text's scores depend on "
                                             "the texts batched with it (batch-dependent); measured only")

    @model_validator(mode="after")
    def _static_ops(self) -> "OnnxQuantizeConfig":
        if self.static and not set(self.int8_operators) & set(STATIC_OP_TYPES):
            raise ValueError(f"int8_operators = {json.dumps(self.int8_operators)} with static: true — the static step "
                             f"quantises only {', '.join(STATIC_OP_TYPES)}; list at least one of them")
        return self


class BenchConfig(Section):
    batch_size: int = Field(1, ge=1, description="texts per timed call")
    sequence_length: int = Field(128, ge=1, description="tokens per text in the timed calls (real texts padded or cut to it)")
    threads: int = Field(2, ge=1, description="intra-op threads of PyTorch and ONNX Runtime while timing")
    warmup: int = Field(5, ge=0, description="untimed runs before timing")
    warm_seconds: float = Field(0.2, ge=0, description="keep warming up until this many seconds have passed, too")
    repeats: int = Field(30, ge=3, description="timed runs, at least")
    timed_seconds: float = Field(1.0, ge=0, description="keep timing until this many seconds have passed")
    eval_batch_size: int = Field(32, ge=1, description="batch size of the accuracy pass over the test split")
    rounds: int = Field(5, ge=2, description="interleaved rounds in which the teacher and every step are timed "
                        "together after the chain (each round times every model in turn, so that the machine's "
                        "drift hits them alike); these are the latency figures results.json, the report and the "
                        "gate read")


class SearchConfig(Section):
    """`shrinkwrap search`: recipe key paths -> the values tried; the candidates are every combination.
    Written with dotted keys beside `strategy`: `search: {student.num_layers: [2, 3], strategy: grid}`."""
    strategy: Literal["grid", "halving"] = Field(
        "grid", description="grid: every candidate that can meet the latency and size limits is trained in full; "
        "halving: successive halving (Jamieson & Talwalkar 2016) — a short distillation for all, then twice as "
        "many epochs for the better half by validation accuracy, until student.epochs")
    short_epochs: int = Field(1, ge=1, description="halving: distillation epochs of its first round")
    rounds: int = Field(5, ge=1, description="interleaved timing rounds of the candidates and the teacher (each "
                        "round times every model in turn, so that the machine's drift hits them alike)")
    space: dict[str, Any] = Field(
        default_factory=dict, description="the key paths and their values (any dotted key under search:, e.g. "
        "student.num_layers: [2, 3, 4]); data.*, teacher.*, train.*, bench.* and budget.* are refused")

    @model_validator(mode="before")
    @classmethod
    def _dotted_keys(cls, raw: Any) -> Any:
        """Dotted keys (and nested mappings, as `--set search.student.num_layers=[2,3]` makes) -> space."""
        if not isinstance(raw, dict):
            return raw
        raw = dict(raw)
        given = raw.pop("space", None)
        if given is not None and not isinstance(given, dict):
            raise ValueError("space: expected a mapping of key paths to lists of values")
        space = dict(given or {})

        def flatten(prefix: str, node: dict) -> None:
            for k, v in node.items():
                if isinstance(v, dict):
                    flatten(f"{prefix}{k}.", v)
                else:
                    space[f"{prefix}{k}"] = v
        for key in [k for k in raw if k not in cls.model_fields]:
            value = raw.pop(key)
            flatten(f"{key}.", value) if isinstance(value, dict) else space.__setitem__(str(key), value)
        return {**raw, "space": space}


class Recipe(Section):
    name: str = Field(min_length=1, pattern=r"^[A-Za-z0-9][A-Za-z0-9._-]*$",
                      description="the run's name: letters, digits, . _ - (default run folder: runs/<name>)")
    task: Literal["classification", "embedding"] = Field(
        "classification", description="classification: a fine-tuned classifier, judged by its labels; embedding: a "
        "sentence encoder used as is (pooled vectors for search, deduplication, clustering), judged by how its "
        "vectors stay in the teacher's space")
    data: DataConfig
    teacher: TeacherConfig = Field(default_factory=TeacherConfig)
    student: StudentConfig = Field(default_factory=StudentConfig)
    augment: AugmentConfig = Field(default_factory=AugmentConfig)
    train: TrainConfig = Field(default_factory=TrainConfig)
    prune: PruneConfig = Field(default_factory=PruneConfig)
    trim_vocab: TrimVocabConfig = Field(default_factory=TrimVocabConfig)
    quantize: QuantizeConfig = Field(default_factory=QuantizeConfig)
    export: ExportConfig = Field(default_factory=ExportConfig)
    onnx_quantize: OnnxQuantizeConfig = Field(default_factory=OnnxQuantizeConfig)
    bench: BenchConfig = Field(default_factory=BenchConfig)
    budget: BudgetConfig = Field(default_factory=BudgetConfig)
    search: SearchConfig = Field(default_factory=SearchConfig)

    # Where the recipe file lives: relative paths in it resolve against this folder.
    source: Optional[str] = Field(None, exclude=True)

    @model_validator(mode="after")
    def _budget_shape(self) -> "Recipe":
        # Caught before the run rather than by the gate after an hour of training.
        for key in ("batch_size", "sequence_length"):
            want, have = getattr(self.budget, key), getattr(self.bench, key)
            if want is not None and want != have:
                raise ValueError(f"budget.{key} = {want} but bench.{key} = {have} — the latency limits are meant at "
                                 f"the shape the benchmark measures; make them equal")
        if "swap" in self.augment.transforms and not self.data.text_pair:
            raise ValueError("augment.transforms lists swap, but data.text_pair is not set — swap exchanges the two "
                             "texts of a pair")
        check_task_keys(self)
        return self

    def resolve(self, path: str) -> Path:
        p = Path(path).expanduser()
        if not p.is_absolute() and self.source:
            p = Path(self.source).parent / p
        return p

    def fingerprint(self) -> str:
        return sha256_json(self.model_dump(mode="json"))

    @property
    def student_length(self) -> int:
        """Tokens per input the student reads (every step after the teacher, and the artifact)."""
        return self.student.max_length or self.teacher.max_length

    def sections(self, names: tuple[str, ...]) -> dict:
        """The named sections as a step's fingerprint hashes them: a key added after runs were made is left
        out while it holds its default (ADDED_KEYS), so that those runs' finished steps are still reused. The task
        goes with the data: every step depends on both."""
        dump = self.model_dump(mode="json")
        parts = {name: dict(dump[name]) for name in names}
        if "data" in parts and self.task != "classification":
            parts["task"] = self.task
        for path, default in ADDED_KEYS.items():
            section, key = path.split(".")
            if section in parts and parts[section].get(key) == default:
                del parts[section][key]
        return parts


# Keys added after runs were made, with their defaults: see Recipe.sections.
ADDED_KEYS = {"train.length_grouped": False, "onnx_quantize.dynamic": False, "data.score": None,
              "teacher.pooling": None, "teacher.normalize": None, "student.cosine_weight": 0.0}


def load_recipe(path: str | Path, overrides: list[str] = ()) -> Recipe:
    path = Path(path)
    raw = apply_overrides(read_yaml_mapping(path, "recipe"), list(overrides))
    overridden = {".".join(parse_override(text)[0]): text for text in overrides}
    return validate_recipe(raw, str(path), source=str(path.resolve()), overridden=overridden, lines=key_lines(path))


def validate_recipe(raw: dict, where: str = "recipe", source: Optional[str] = None,
                    overridden: Optional[dict[str, str]] = None, lines: Optional[dict[tuple, int]] = None) -> Recipe:
    try:
        recipe = Recipe.model_validate(raw)
    except ValidationError as e:
        # One line, the first problem: fixing one usually changes the rest.
        err = e.errors()[0]
        text = (overridden or {}).get(key_path(error_loc(err)))
        raise UserError(explain(err, raw, f"{where} (--set {text})" if text else where, Recipe, RENAMED_KEYS,
                                None if text else lines)) from None
    recipe.source = source
    return recipe
