"""Walks the chain: for each step, fingerprint -> reuse or run -> benchmark -> record.

Every input is checked before anything is written. Each step writes into a scratch folder that is
renamed into place only once complete, and results.json is rewritten (atomically) after every
step, so a crash never loses a finished step nor leaves a half-written one that looks finished.
"""
from __future__ import annotations

import json
import os
import shutil
import sys
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Optional

from shrinkwrap.checkpoint import close_scratch, open_scratch
from shrinkwrap.rundir import (BENCH_FILE, REPORT_FILE, REPORT_HTML_FILE, RESULTS_FILE, STEP_FILE, is_disk_full,
                               swap_in, write_error, write_json_atomic, write_text_atomic)
from shrinkwrap import distributed
from shrinkwrap.errors import UserError
from shrinkwrap.fingerprint import sha256_json, tokenizer_fingerprint_of, tokenizer_fingerprint_of_file
from shrinkwrap.recipe import Recipe

# Bumped when a step's code changes what it produces, so old outputs are not reused by mistake.
CODE_VERSION = 1


@dataclass
class Step:
    name: str
    format: str
    sections: tuple[str, ...]       # the recipe sections this step's output depends on
    after: Optional[str]            # the step whose output it reads
    run: Callable
    enabled: Callable[[Recipe], bool] = lambda r: True
    # Inputs beyond the recipe sections and the upstream output that the step's result depends on.
    extra: Callable[["Context"], object] = lambda ctx: None
    # A step that writes a tokenizer of its own (derived from its source's); every other step's output
    # carries exactly the tokenizer of the step it read.
    changes_tokenizer: bool = False
    # A step that trains: under several processes (accelerate launch, torchrun) all take part in it;
    # every other step runs in the main process alone.
    trains: bool = False


def chain(recipe: Optional[Recipe] = None) -> list[Step]:
    """The steps in order. Each reads the output of the step named in `after`: the PyTorch steps that
    follow the student read the last PyTorch student the recipe makes."""
    from shrinkwrap.steps import distill, export, finetune, prune, quantize, quantize_onnx, trim_vocab

    pruned = recipe is not None and recipe.prune.enabled
    trimmed = recipe is not None and recipe.trim_vocab.enabled
    last = "student-trimmed" if trimmed else "student-pruned" if pruned else "student"
    return [
        Step("teacher", "pytorch", ("data", "teacher", "train"), None, finetune.run, trains=True),
        Step("student", "pytorch", ("student", "train"), "teacher", distill.run, extra=lambda ctx: ctx.transfer_fingerprint,
             trains=True),
        Step("student-pruned", "pytorch", ("prune", "train"), "student", prune.run, lambda r: r.prune.enabled,
             trains=True),
        Step("student-trimmed", "pytorch", ("trim_vocab",), "student-pruned" if pruned else "student", trim_vocab.run,
             lambda r: r.trim_vocab.enabled, changes_tokenizer=True),
        Step("student-int8", "pytorch", ("quantize",), last, quantize.run, lambda r: r.quantize.enabled),
        Step("student-onnx", "onnx", ("export",), last, export.run, extra=lambda ctx: export.GRAPH_RULE),
        # Before the dynamic int8 step, so that the final step (budgets, the artefact) stays the dynamic one.
        Step("student-onnx-int8-static", "onnx", ("export", "onnx_quantize"), last, quantize_onnx.run_static,
             lambda r: r.onnx_quantize.static),
        Step("student-onnx-int8", "onnx", ("onnx_quantize",), "student-onnx", quantize_onnx.run),
    ]


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
    tokenizer_fps: dict[str, str] = field(default_factory=dict)   # step -> fingerprint of its output's tokenizer
    _tokens: dict[str, "Tokens"] = field(default_factory=dict)

    @property
    def transfer_fingerprint(self) -> Optional[str]:
        return self.transfer.fingerprint if self.transfer else None

    def log(self, message: str) -> None:
        if not self.quiet:
            print(message, file=sys.stderr, flush=True)

    def tokens_of(self, folder: Path) -> "Tokens":
        """The tokenizer a step's output carries and the splits encoded with it: the teacher's own
        encodings, unless a step on the way changed the tokenizer (then encoded once, and kept)."""
        fp = tokenizer_fingerprint_of_file(Path(folder) / "tokenizer.json")
        if fp == self.tokenizer_fp:
            return Tokens(self.tokenizer, fp, self.encoded, self.pad_id)
        if fp not in self._tokens:
            from shrinkwrap.data import encode
            from shrinkwrap.models import load_tokenizer

            tok = load_tokenizer(str(folder), str(folder))
            n = self.recipe.teacher.max_length
            encoded = {s: encode(tok, getattr(self.data, s), n) for s in ("train", "validation", "test")}
            self._tokens[fp] = Tokens(tok, fp, encoded, tok.pad_token_id or 0)
        return self._tokens[fp]

    def transfer_examples(self) -> list:
        """The transfer texts encoded with the teacher's tokenizer (rows on disk), or none."""
        if self.transfer is None:
            return []
        return self.transfer.encoded(self.run_dir / "cache", self.tokenizer, self.tokenizer_fp,
                                     self.recipe.teacher.max_length, quiet=self.quiet)

    def transfer_batches(self, size: int = 1024):
        """The transfer texts a batch at a time."""
        if self.transfer is not None:
            yield from self.transfer.batches(self.run_dir / "cache", size, quiet=self.quiet)


@dataclass
class Tokens:
    """A tokenizer, its fingerprint, the splits encoded with it (as Context.encoded) and its pad id."""
    tokenizer: object
    fingerprint: str
    encoded: dict
    pad_id: int


def _check_out_dir(out: Path) -> None:
    probe = out if out.exists() else next((p for p in out.parents if p.exists()), Path("."))
    if probe.exists() and not probe.is_dir():
        raise UserError(f"--out {out}: {probe} is a file, not a folder")
    if not os.access(probe, os.W_OK | os.X_OK):
        raise UserError(f"--out {out}: {probe} is not writable")


def prepare(recipe: Recipe, out: Path, quiet: bool = False) -> Context:
    """Loads and checks everything the chain needs. Writes nothing."""
    from transformers import AutoConfig

    from shrinkwrap.data import encode, load_dataset
    from shrinkwrap.models import load_tokenizer, resolve_base

    where = recipe.source or "recipe"
    _check_out_dir(out)
    base = resolve_base(recipe.teacher.base, where, root=Path(recipe.source).parent if recipe.source else None)
    if recipe.teacher.trust_remote_code:
        warnings.warn(f"{where}: teacher.trust_remote_code is on — Python code shipped with {base} will run")
    try:
        config = AutoConfig.from_pretrained(base, trust_remote_code=recipe.teacher.trust_remote_code)
    except (OSError, ValueError) as e:
        raise UserError(f"{where}: teacher.base = {recipe.teacher.base!r} — cannot load its config "
                        f"({str(e).splitlines()[0]})") from None
    n_layers = getattr(config, "num_hidden_layers", None) or getattr(config, "n_layers", None)
    layers = recipe.student.layers
    if layers is not None and n_layers is not None and max(layers) >= n_layers:
        bad = next(i for i, v in enumerate(layers) if v >= n_layers)
        raise UserError(f"{where}: student.layers[{bad}] = {layers[bad]} — the teacher has {n_layers} layers "
                        f"(0–{n_layers - 1})")
    if layers is None and n_layers is not None and recipe.student.num_layers > n_layers:
        raise UserError(f"{where}: student.num_layers = {recipe.student.num_layers} — the teacher has {n_layers} layers")
    max_pos = getattr(config, "max_position_embeddings", None)
    if max_pos and recipe.teacher.max_length > max_pos:
        raise UserError(f"{where}: teacher.max_length = {recipe.teacher.max_length} — the model takes at most {max_pos} tokens")
    from shrinkwrap.pruning import check_prune

    check_prune(recipe, config, where)
    tokenizer = load_tokenizer(base, where, recipe.teacher.trust_remote_code)
    if recipe.trim_vocab.enabled:
        from shrinkwrap.vocab import check_trim

        check_trim(tokenizer, where)
    data_path = recipe.resolve(recipe.data.path)
    if not data_path.exists():
        raise UserError(f"{where}: data.path = {recipe.data.path!r} — no such file or folder ({data_path})")
    data = load_dataset(recipe.data, data_path, str(data_path))
    encoded = {s: encode(tokenizer, getattr(data, s), recipe.teacher.max_length) for s in ("train", "validation", "test")}
    transfer = None
    st = recipe.student
    if st.transfer_path:
        from shrinkwrap import transfer as transfer_file

        if recipe.data.text_pair:
            raise UserError(f"{where}: student.transfer_path goes with single texts, but data.text_pair is set")
        path = recipe.resolve(st.transfer_path)
        transfer = transfer_file.check(path, st.transfer_column or recipe.data.text, str(path))
    if st.init == "pretrained":
        student_tok = load_tokenizer(str(recipe.resolve(st.base)), where)
        if tokenizer_fingerprint_of(student_tok) != tokenizer_fingerprint_of(tokenizer):
            raise UserError(f"{where}: student.base = {st.base!r} — its tokenizer differs from the teacher's "
                            f"(fingerprints {tokenizer_fingerprint_of(student_tok)[:12]} vs "
                            f"{tokenizer_fingerprint_of(tokenizer)[:12]}): a student must read the teacher's tokens")
    if st.attention_weight > 0 and st.init == "config" and st.num_attention_heads not in (None, config.num_attention_heads):
        raise UserError(f"{where}: student.attention_weight needs as many heads as the teacher "
                        f"({config.num_attention_heads}), not student.num_attention_heads = {st.num_attention_heads}")
    return Context(recipe=recipe, run_dir=out, base=base, tokenizer=tokenizer,
                   tokenizer_fp=tokenizer_fingerprint_of(tokenizer), data=data, data_fingerprint=data.fingerprint(),
                   encoded=encoded, pad_id=tokenizer.pad_token_id or 0, quiet=quiet or not distributed.is_main(),
                   teacher_hidden_size=config.hidden_size, transfer=transfer)


def step_fingerprint(ctx: Context, step: Step) -> str:
    dump = ctx.recipe.model_dump(mode="json")
    parts = {s: dump[s] for s in step.sections}
    upstream = ctx.fingerprints[step.after] if step.after else ctx.data_fingerprint
    return sha256_json({"step": step.name, "code": CODE_VERSION, "config": parts, "upstream": upstream,
                        "tokenizer": ctx.tokenizer_fp, "extra": step.extra(ctx)})


def _read_json(path: Path) -> Optional[dict]:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def check_output_tokenizer(ctx: Context, step: Step, folder: Path, recorded: Optional[dict] = None) -> str:
    """A step's output must carry the tokenizer of the step it read (the teacher's base tokenizer for the
    first step): any other one would turn texts into other ids. A step that changes the tokenizer may
    write a new one; reused, its output must still hold the tokenizer its step.json `recorded`."""
    path = folder / "tokenizer.json"
    if not path.exists():
        raise UserError(f"{path}: missing — every step's output carries its tokenizer")
    got = tokenizer_fingerprint_of_file(path)
    source = ctx.tokenizer_fps[step.after] if step.after else ctx.tokenizer_fp
    if step.changes_tokenizer:
        want = recorded.get("tokenizer_fingerprint") if recorded else got
        derived = recorded.get("tokenizer_derived_from") if recorded else source
        if got != want or derived != source:
            raise UserError(f"{step.name}: the tokenizer in {folder} (fingerprint {got[:12]}) is not the one the step "
                            f"wrote (fingerprint {str(want)[:12]}, derived from {str(derived)[:12]}; its source's is "
                            f"{source[:12]}) — remove {folder} to redo the step")
    elif got != source:
        raise UserError(f"{step.name}: the tokenizer in {folder} (fingerprint {got[:12]}) differs from the "
                        f"{step.after or 'teacher'}'s tokenizer (fingerprint {source[:12]}) — remove {folder} to "
                        f"redo the step")
    ctx.tokenizer_fps[step.name] = got
    return got


def run_step(ctx: Context, step: Step) -> dict:
    """Reuses the step's finished output when its fingerprint matches; otherwise runs it atomically."""
    fp = step_fingerprint(ctx, step)
    ctx.fingerprints[step.name] = fp
    final = ctx.run_dir / step.name
    done = _read_json(final / STEP_FILE)
    if done and done.get("fingerprint") == fp:
        check_output_tokenizer(ctx, step, final, done)
        ctx.log(f"[{step.name}] unchanged — reusing {final}")
        ctx.outputs[step.name] = final
        return done
    partial = ctx.run_dir / f".partial-{step.name}"
    main = distributed.is_main()
    if main:
        resumed = open_scratch(partial, fp)  # keeps a killed run's checkpoints only when made for this fingerprint
        ctx.log(f"[{step.name}] " + ("resuming from the checkpoint a killed run left" if resumed else "running"))
    distributed.barrier()  # the scratch folder (and any checkpoint in it) is ready before anyone trains
    started = time.perf_counter()
    if main or step.trains:
        try:
            info = step.run(ctx, ctx.outputs[step.after] if step.after else None, partial)
        except Exception as e:
            if is_disk_full(e):
                raise write_error(getattr(e, "filename", None) or partial, e) from None
            raise
    if not main:  # a helper process: the main one finishes the step and swaps it in
        distributed.barrier()
        ctx.outputs[step.name] = final
        return {}
    seconds = time.perf_counter() - started
    close_scratch(partial)
    tok_fp = check_output_tokenizer(ctx, step, partial)
    record = {"name": step.name, "format": step.format, "fingerprint": fp, "tokenizer_fingerprint": tok_fp,
              "after": step.after, "seconds": round(seconds, 2), "info": info}
    if step.changes_tokenizer:
        record["tokenizer_derived_from"] = ctx.tokenizer_fps[step.after] if step.after else ctx.tokenizer_fp
    write_json_atomic(partial / STEP_FILE, record)
    swap_in(partial, final)
    distributed.barrier()
    ctx.outputs[step.name] = final
    ctx.log(f"[{step.name}] done in {seconds:.1f} s")
    return record


def bench_step(ctx: Context, step: Step) -> dict:
    from shrinkwrap.bench.measure import measure
    from shrinkwrap.data import encode

    folder = ctx.outputs[step.name]
    key = sha256_json({"bench": ctx.recipe.model_dump(mode="json")["bench"], "step": ctx.fingerprints[step.name]})
    cached = _read_json(folder / BENCH_FILE)
    if cached and cached.get("key") == key:
        return cached["result"]
    b = ctx.recipe.bench
    tokens = ctx.tokens_of(folder)  # a step after one that changed the tokenizer reads texts with its own
    timing = encode(tokens.tokenizer, ctx.data.test, b.sequence_length)
    ctx.log(f"[{step.name}] benchmarking (batch {b.batch_size} × {b.sequence_length} tokens, {b.threads} threads)")
    result = measure(folder, tokens.encoded["test"], ctx.data.test.labels, len(ctx.data.label_names), timing,
                     tokens.pad_id, b)
    write_json_atomic(folder / BENCH_FILE, {"key": key, "result": result})
    return result


def step_entry(ctx: Context, step: Step, record: dict, bench: dict, teacher: Optional[dict]) -> dict:
    import numpy as np

    entry = {"name": step.name, "format": bench["format"], "path": str(ctx.outputs[step.name]),
             "metrics": bench["metrics"], "latency_ms": bench["latency_ms"], "size_bytes": bench["size_bytes"],
             "load_seconds": bench["load_seconds"], "memory": bench.get("memory"), "seconds": record["seconds"],
             "tokenizer_fingerprint": record["tokenizer_fingerprint"], "info": record["info"],
             "predictions": bench["predictions"]}
    if "agreement_with_fp32" in record["info"]:  # an int8 step against the fp32 graph it came from
        entry["agreement_with_fp32"] = record["info"]["agreement_with_fp32"]
    ref = teacher or entry
    entry["accuracy_drop"] = round((ref["metrics"]["accuracy"] - entry["metrics"]["accuracy"]) * 100, 4)
    entry["agreement_with_teacher"] = float(np.mean(np.array(ref["predictions"]) == np.array(entry["predictions"])))
    if teacher is not None:
        from shrinkwrap.bench.stats import compare_to_reference

        entry.update(compare_to_reference(ctx.data.test.labels, ref["predictions"], entry["predictions"]))
    return entry


def run_chain(recipe: Recipe, out: Path, quiet: bool = False, until: Optional[str] = None) -> dict:
    """Runs (or reuses) every enabled step in order, stopping after `until` when given."""
    names = [s.name for s in chain(recipe) if s.enabled(recipe)]
    if until is not None and until not in names:
        raise UserError(f"--until {until} — not a step of this recipe; steps: {', '.join(names)}")
    from shrinkwrap.bench.machine import describe
    from shrinkwrap.report import write_reports

    ctx = prepare(recipe, out, quiet)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise UserError(f"--out {out}: cannot create the run folder — {e.strerror or e}") from None
    # A killed run's .partial-<step> folders are never mistaken for finished steps (those have step.json
    # in <step>/); run_step resumes one from its checkpoint when the step's fingerprint still matches.
    results = {
        "recipe": recipe.model_dump(mode="json"), "recipe_fingerprint": recipe.fingerprint(),
        "machine": describe(),
        "data": {"path": str(recipe.resolve(recipe.data.path)), "label_names": ctx.data.label_names,
                 "sizes": {s: len(getattr(ctx.data, s)) for s in ("train", "validation", "test")},
                 "fingerprint": ctx.data_fingerprint, "notes": ctx.data.notes},
        "tokenizer_fingerprint": ctx.tokenizer_fp,
        "test_labels": ctx.data.test.labels.tolist(),
        "steps": [],
    }
    teacher = None
    for step in chain(recipe):
        if not step.enabled(recipe):
            continue
        record = run_step(ctx, step)
        if not distributed.is_main():  # benchmarks, results and reports are the main process's
            if step.name == until:
                break
            continue
        entry = step_entry(ctx, step, record, bench_step(ctx, step), teacher)
        teacher = teacher or entry
        results["steps"].append(entry)
        write_json_atomic(out / RESULTS_FILE, results)
        if step.name == until:
            break
    if not distributed.is_main():
        return {}
    if results["steps"][-1]["format"] == "onnx":
        from shrinkwrap.package import from_run

        results["artifact"] = str(from_run(results, out))
        write_json_atomic(out / RESULTS_FILE, results)
        ctx.log(f"[artifact] written to {results['artifact']}")
    write_reports(results, out)
    return results
