"""The artifact: one folder a service runs with onnxruntime, tokenizers and numpy alone.

    model.onnx        the graph
    tokenizer.json    (and the other tokenizer files) the tokenizer the model was trained with
    labels.json       a classifier's class names by id (what else a task carries: shrinkwrap.serve.tasks)
    README.md         the model card
    config.json       the transformers config, for tools that want it
    manifest.json     sha256 and size of every other file, the task, opset, inputs and outputs, tokenizer
                      fingerprint, max sequence length, metrics at export, versions

This module reads and checks artifacts; building them (which needs torch) is in shrinkwrap.outputs.package.
What differs between tasks (what the graph outputs, what predict prints) is the task module's
(shrinkwrap.serve.tasks). Torch-free, like the rest of shrinkwrap.serve (tests/test_layout.py checks).
"""
from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from types import ModuleType
from typing import Optional

import numpy as np

from shrinkwrap.serve import tasks
from shrinkwrap.serve.batches import TRUNCATION_RULES, all_outputs, encode_head_tail
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.fingerprint import sha256_file, tokenizer_fingerprint_of_file
from shrinkwrap.serve.rundir import MANIFEST_FILE, MODEL_FILE, TOKENIZER_FILE, read_json

FORMAT = "shrinkwrap-artifact"
FORMAT_VERSION = 1
REQUIRED_FILES = (MODEL_FILE, TOKENIZER_FILE)   # and the files its task carries
# The same default as the chain's accuracy pass (bench.eval_batch_size): with the same length-sorted
# batches, predict gives exactly the logits the chain recorded.
DEFAULT_BATCH_SIZE = 32


def is_artifact(path: str | Path) -> bool:
    return Path(path).is_dir() and (Path(path) / MANIFEST_FILE).is_file()


def file_entries(folder: Path, names: list[str]) -> dict[str, dict]:
    return {n: {"sha256": sha256_file(folder / n), "bytes": (folder / n).stat().st_size} for n in sorted(names)}


def read_manifest(folder: Path) -> dict:
    path = folder / MANIFEST_FILE
    if not folder.is_dir():
        raise UserError(f"{folder}: no such artifact folder")
    if not path.is_file():
        raise UserError(f"{folder}: no {MANIFEST_FILE} — not a shrinkwrap artifact (build one with "
                        f"`shrinkwrap package` or `shrinkwrap run`)")
    manifest = read_json(path, "artifact manifest")
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
        raise UserError(f"{path}: not a shrinkwrap artifact manifest (format must be {FORMAT!r})")
    if manifest.get("format_version") != FORMAT_VERSION:
        raise UserError(f"{path}: format_version = {manifest.get('format_version')!r} — this shrinkwrap reads "
                        f"version {FORMAT_VERSION}")
    if not isinstance(manifest.get("files"), dict):
        raise UserError(f"{path}: no `files` table — rebuild the artifact")
    return manifest


def verify(folder: str | Path) -> dict:
    """The manifest, once every file it lists is present with its recorded size and sha256; a
    one-line UserError otherwise. Nothing is loaded before this passes."""
    folder = Path(folder)
    manifest = read_manifest(folder)
    files = manifest["files"]
    for name in (*REQUIRED_FILES, *tasks.of_manifest(manifest).FILES):
        if name not in files:
            raise UserError(f"{folder}: incomplete artifact — its manifest does not list {name}")
    for name, entry in files.items():
        # Names are plain file names: a manifest must never point outside its folder.
        if not isinstance(name, str) or Path(name).name != name or name in (".", "..", MANIFEST_FILE):
            raise UserError(f"{folder / MANIFEST_FILE}: file name {name!r} — only plain file names of the folder")
        if not isinstance(entry, dict) or not isinstance(entry.get("sha256"), str) or \
                not isinstance(entry.get("bytes"), int):
            raise UserError(f"{folder / MANIFEST_FILE}: files[{name!r}] = {json.dumps(entry)} — expected "
                            f"{{\"sha256\": ..., \"bytes\": ...}}")
        path = folder / name
        if not path.is_file():
            raise UserError(f"{path}: missing — the artifact's manifest lists it; the artifact is incomplete")
        size = path.stat().st_size
        if size != entry["bytes"]:
            raise UserError(f"{path}: {size} bytes where the manifest records {entry['bytes']} — modified after "
                            f"packaging; rebuild the artifact")
        digest = sha256_file(path)
        if digest != entry["sha256"]:
            raise UserError(f"{path}: sha256 {digest[:16]}… differs from the manifest's {entry['sha256'][:16]}… — "
                            f"modified after packaging; rebuild the artifact")
    expected = (manifest.get("tokenizer") or {}).get("fingerprint")
    got = tokenizer_fingerprint_of_file(folder / TOKENIZER_FILE)
    if expected != got:
        raise UserError(f"{folder / TOKENIZER_FILE}: tokenizer fingerprint {got[:12]} differs from the manifest's "
                        f"{str(expected)[:12]} — rebuild the artifact")
    return manifest


def truncation_of(manifest: dict) -> str:
    """Which tokens of a long text the model was trained on (recipe key data.truncation; head when not recorded)."""
    rule = (manifest.get("tokenizer") or {}).get("truncation", "head")
    if rule not in TRUNCATION_RULES:
        raise UserError(f"{MANIFEST_FILE}: tokenizer.truncation = {rule!r} — expected one of {', '.join(TRUNCATION_RULES)}")
    return rule


@dataclass
class Artifact:
    folder: Path
    manifest: dict
    task: ModuleType      # what the graph outputs and what predict prints (shrinkwrap.serve.tasks)
    info: dict            # what the task read beside the graph (a classifier's labels and temperature)
    session: object
    tokenizer: object
    # Operators in the graph that scale activations over the whole batch (shrinkwrap.serve.quantization): with
    # any, a text's scores depend on its batch companions (an older or foreign int8 artifact).
    batch_dependent: tuple[str, ...] = ()

    @property
    def max_length(self) -> int:
        return int(self.manifest["tokenizer"]["max_length"])

    @property
    def truncation(self) -> str:
        return truncation_of(self.manifest)

    @property
    def reads_pairs(self) -> bool:
        return bool(self.manifest["tokenizer"].get("text_pair"))

    def outputs(self, texts: list[str], batch_size: int = DEFAULT_BATCH_SIZE,
                pairs: Optional[list[str]] = None) -> np.ndarray:
        """The graph's outputs for every text (or pair: texts[i] with pairs[i]) — a classifier's logits — in
        order, in the chain's own length-sorted batches (batches.all_outputs), so that padding costs little and
        the outputs are those the chain recorded."""
        return self._outputs(self.encode(texts, pairs)[0], batch_size)

    def encode(self, texts: list[str], pairs: Optional[list[str]] = None) -> tuple[list[dict], list[bool]]:
        """The model inputs of every text (or pair), cut at max_length tokens by the artifact's truncation rule,
        and whether each was cut. With the `head` rule, a very long single text is tokenised from a prefix
        ending at whitespace, grown until it yields more tokens than are kept: the kept tokens are those of the
        whole text (words are tokenised apart), without tokenising megabytes only to throw them away — a
        10 MB line would otherwise take seconds and gigabytes."""
        if self.truncation == "head_tail":  # the chain's own cut (batches.encode_head_tail), single texts only
            examples = encode_head_tail(self.tokenizer, list(texts), self.max_length)
            cut = [len(e["input_ids"]) >= self.max_length
                   and len(self.tokenizer.encode(t).ids) > self.max_length for t, e in zip(texts, examples)]
            return examples, cut
        inputs = list(texts) if pairs is None else list(zip(texts, pairs))
        limit = max(4096, 16 * self.max_length)
        prefix = pairs is None and self.truncation == "head"
        encodings = self.tokenizer.encode_batch([t if not prefix or len(t) <= limit else "" for t in inputs])
        if prefix:
            for i, text in enumerate(texts):
                if len(text) > limit:
                    encodings[i] = self._encode_long(text, limit)
        return ([{"input_ids": e.ids, "attention_mask": e.attention_mask, "token_type_ids": e.type_ids}
                 for e in encodings], [bool(e.overflowing) for e in encodings])

    def _encode_long(self, text: str, size: int):
        while size < len(text):
            cut = text.rfind(" ", size // 2, size)   # end at whitespace so no word is split
            enc = self.tokenizer.encode(text[:cut if cut > 0 else size])
            if enc.overflowing:                       # more tokens than are kept: the rest cannot matter
                return enc
            size *= 4
        return self.tokenizer.encode(text)

    def _outputs(self, examples: list[dict], batch_size: int) -> np.ndarray:
        from shrinkwrap.serve.sessions import run_outputs

        pad_id = int(self.manifest["tokenizer"].get("pad_id", 0))
        return all_outputs(lambda batch: run_outputs(self.session, batch),
                          examples, pad_id, self.task.width(self.info), batch_size)

    def predict(self, texts: list[str], batch_size: int = DEFAULT_BATCH_SIZE,
                min_confidence: float = 0.0, pairs: Optional[list[str]] = None) -> list[dict]:
        """One row per text, in order: {"text"} (and "text_pair" for a pair) with what the task gives — for a
        classifier "label" and "scores" (the softmax of the logits divided by the artifact's temperature; a
        text whose top score is below `min_confidence` gets label None, its scores still given). A text longer
        than the artifact's max_length tokens is cut by its truncation rule, as in training, and its row says
        "truncated": true."""
        examples, cut = self.encode(texts, pairs)
        answers = self.task.rows(self._outputs(examples, batch_size), self.info, min_confidence)
        return [{"text": t, **({"text_pair": pairs[i]} if pairs is not None else {}), **answer,
                 **({"truncated": True} if cut[i] else {})}
                for i, (t, answer) in enumerate(zip(texts, answers))]


def load(folder: str | Path, threads: int = 0, verified: Optional[dict] = None, spin: bool = True) -> Artifact:
    """Verifies the artifact (unless `verified` is the manifest `verify` just returned), then loads it.
    threads = 0 lets ONNX Runtime choose; spin=False keeps its idle threads from busy-waiting (a server's HTTP
    work shares the cores)."""
    folder = Path(folder)
    manifest = verified if verified is not None else verify(folder)
    return open_folder(folder, manifest, threads, spin)


def open_folder(folder: Path, manifest: dict, threads: int = 0, spin: bool = True) -> Artifact:
    """Loads model and tokenizer without checking hashes: for `load`, and for the packager measuring
    the artifact it is building through this very code path."""
    from tokenizers import Tokenizer

    from shrinkwrap.serve.quantization import batch_dependent_ops
    from shrinkwrap.serve.sessions import check_external_data, session

    check_external_data(folder / MODEL_FILE)  # before ONNX Runtime opens anything the graph points to
    tok_info = manifest.get("tokenizer") or {}
    if not isinstance(tok_info.get("max_length"), int) or tok_info["max_length"] < 1:
        raise UserError(f"{folder / MANIFEST_FILE}: tokenizer.max_length = {tok_info.get('max_length')!r} — "
                        f"expected a whole number of tokens")
    try:
        tokenizer = Tokenizer.from_file(str(folder / TOKENIZER_FILE))
    except Exception as e:  # the Rust library raises plain Exception for a file it cannot parse
        raise UserError(f"{folder / TOKENIZER_FILE}: cannot load — {str(e).splitlines()[0]}") from None
    # Truncation and padding are per-call settings a saved tokenizer may or may not carry: set ours, the
    # rule the chain cut texts by (head_tail cuts in Artifact.encode, from the whole text).
    tokenizer.no_padding()
    rule = truncation_of(manifest)
    if rule == "head_tail":
        tokenizer.no_truncation()
    else:
        tokenizer.enable_truncation(tok_info["max_length"], direction="left" if rule == "tail" else "right")
    try:
        sess = session(folder / MODEL_FILE, threads, spin)
    except Exception as e:  # onnxruntime raises its own exception types for a graph it cannot load
        raise UserError(f"{folder / MODEL_FILE}: ONNX Runtime cannot load it — {str(e).splitlines()[0]}") from None
    task = tasks.of_manifest(manifest)
    info = task.read(folder, manifest)  # a bad label list or temperature fails at load, not at the first text
    n_out = sess.get_outputs()[0].shape[-1]
    if isinstance(n_out, int) and n_out != task.width(info):
        raise task.width_error(folder, info, n_out)
    return Artifact(folder=folder, manifest=manifest, task=task, info=info, session=sess, tokenizer=tokenizer,
                    batch_dependent=tuple(batch_dependent_ops(folder / MODEL_FILE)))
