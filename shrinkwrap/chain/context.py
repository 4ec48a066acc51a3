"""What every step is given: the recipe, the checked data and its encodings, the teacher's tokenizer, and
the outputs of the steps before it (`outputs`, by step name). Made once by shrinkwrap.chain.preflight.prepare."""
from __future__ import annotations

import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Optional

from shrinkwrap.recipe.schema import Recipe
from shrinkwrap.serve.fingerprint import tokenizer_fingerprint_of_file
from shrinkwrap.serve.rundir import STUDENT, STUDENT_PRUNED, STUDENT_TRIMMED, TEACHER, TOKENIZER_FILE


def last_student(recipe: Optional[Recipe]) -> str:
    """The last fp32 PyTorch student step the recipe makes: the one the ONNX steps export."""
    if recipe is not None and recipe.trim_vocab.enabled:
        return STUDENT_TRIMMED
    return STUDENT_PRUNED if recipe is not None and recipe.prune.enabled else STUDENT


@dataclass
class Tokens:
    """A tokenizer, its fingerprint, the splits encoded with it (as Context.encoded) and its pad id."""
    tokenizer: object
    fingerprint: str
    encoded: dict
    pad_id: int


@dataclass
class Context:
    recipe: Recipe
    run_dir: Path
    base: str
    tokenizer: object
    tokenizer_fp: str
    data: object
    data_fingerprint: str
    encoded: dict
    pad_id: int
    outputs: dict[str, Path] = field(default_factory=dict)
    fingerprints: dict[str, str] = field(default_factory=dict)
    quiet: bool = False
    teacher_hidden_size: int = 0
    transfer: Optional["TransferTexts"] = None   # checked at start; its table is built on first use
    teacher_weights: Optional[str] = None        # a teacher used as is: the fingerprint of its weights
    pooling: Optional[dict] = None               # task: embedding — how the teacher pools {"pooling", "normalize"}
    tokenizer_fps: dict[str, str] = field(default_factory=dict)   # step -> fingerprint of its output's tokenizer
    _tokens: dict[tuple, Tokens] = field(default_factory=dict)
    _augmented: Optional[tuple] = None

    @property
    def transfer_fingerprint(self) -> Optional[str]:
        return self.transfer.fingerprint if self.transfer else None

    def log(self, message: str) -> None:
        if not self.quiet:
            print(message, file=sys.stderr, flush=True)

    @property
    def student_length(self) -> int:
        """Tokens per input the student (and every step after it, and the artifact) reads."""
        return self.recipe.student_length

    @property
    def last_student_dir(self) -> Path:
        """The output folder of the last fp32 PyTorch student (chain.context.last_student)."""
        return self.outputs[last_student(self.recipe)]

    def length_of(self, step: str) -> int:
        return self.recipe.teacher.max_length if step == TEACHER else self.student_length

    @property
    def task(self):
        """The task the recipe runs, on the training side: how its models load, what they output, how a student
        learns (shrinkwrap.ml.tasks)."""
        from shrinkwrap.ml.tasks import of_recipe

        return of_recipe(self.recipe)

    @property
    def teacher_dir(self) -> Path:
        """The teacher step's output folder."""
        return self.outputs[TEACHER]

    @property
    def teacher_fingerprint(self) -> str:
        return self.fingerprints[TEACHER]

    def timing_batch(self, folder: Path, length: int) -> dict:
        """What a step's output is timed on: bench.batch_size test texts read with the folder's tokenizer,
        padded or cut to the tokens the model reads (bench.sequence_length, or its own `length` when fewer)."""
        from shrinkwrap.bench.grid import fixed_batch

        return fixed_batch(*self.timing_examples(folder, length), self.recipe.bench.batch_size,
                           min(length, self.recipe.bench.sequence_length))

    def timing_examples(self, folder: Path, length: int) -> tuple[list[dict], int]:
        """(the test texts read with the folder's tokenizer and cut where the model stops reading, its pad id)."""
        from shrinkwrap.serve.batches import encode

        tokens = self.tokens_of(folder)
        read = min(length, self.recipe.bench.sequence_length)
        return encode(tokens.tokenizer, self.data.test, read, truncation=self.recipe.data.truncation), tokens.pad_id

    def tokens_of(self, folder: Path, max_length: Optional[int] = None) -> Tokens:
        """The tokenizer a step's output carries and the splits encoded with it, cut at `max_length`
        (default: the teacher's): the teacher's own encodings, unless a step on the way changed the
        tokenizer or the length differs (then encoded once, and kept)."""
        fp = tokenizer_fingerprint_of_file(Path(folder) / TOKENIZER_FILE)
        n = max_length or self.recipe.teacher.max_length
        if fp == self.tokenizer_fp and n == self.recipe.teacher.max_length:
            return Tokens(self.tokenizer, fp, self.encoded, self.pad_id)
        if (fp, n) not in self._tokens:
            from shrinkwrap.ml.models import load_tokenizer
            from shrinkwrap.serve.batches import encode

            tok = self.tokenizer if fp == self.tokenizer_fp else load_tokenizer(str(folder), str(folder))
            encoded = {s: encode(tok, getattr(self.data, s), n, truncation=self.recipe.data.truncation)
                       for s in ("train", "validation", "test")}
            self._tokens[(fp, n)] = Tokens(tok, fp, encoded, tok.pad_token_id or 0)
        return self._tokens[(fp, n)]

    def student_tokens(self, folder: Path) -> Tokens:
        """tokens_of(folder) cut at the student's length: what a student step reads."""
        return self.tokens_of(folder, self.student_length)

    def transfer_examples(self, max_length: Optional[int] = None) -> list:
        """The transfer texts encoded with the teacher's tokenizer (rows on disk), cut at `max_length`
        (default: the teacher's), or none."""
        if self.transfer is None:
            return []
        return self.transfer.encoded(self.run_dir / "cache", self.tokenizer, self.tokenizer_fp,
                                     max_length or self.recipe.teacher.max_length, quiet=self.quiet,
                                     truncation=self.recipe.data.truncation)

    def transfer_batches(self, size: int = 1024):
        """The transfer texts a batch at a time."""
        if self.transfer is not None:
            yield from self.transfer.batches(self.run_dir / "cache", size, quiet=self.quiet)

    def augmented(self):
        """(copies, their training-text indices, their encodings) of augment: (None, None, []) without it.
        Made from the training split only, once per run."""
        a = self.recipe.augment
        if not a.copies:
            return None, None, []
        if self._augmented is None:
            from shrinkwrap.ml.augment import augment_split
            from shrinkwrap.serve.batches import encode

            mask = self.tokenizer.mask_token or self.tokenizer.unk_token
            split, source = augment_split(self.data.train, a.copies, a.transforms, a.seed, mask)
            self._augmented = (split, source, encode(self.tokenizer, split, self.recipe.teacher.max_length))
        return self._augmented
