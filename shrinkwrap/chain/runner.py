"""Walks the chain: for each step, fingerprint -> reuse or run -> benchmark -> record.

Every input is checked (shrinkwrap.chain.preflight) before anything is written. Each step writes into a
scratch folder that is renamed into place only once complete, and results.json is rewritten
(atomically) after every step, so a crash never loses a finished step nor leaves a half-written one
that looks finished. The artifact and the reports are built from the results afterwards (chain.pipeline).
"""
from __future__ import annotations

import time
from dataclasses import replace
from pathlib import Path
from typing import Optional

from shrinkwrap.bench.targets import size_of
from shrinkwrap.bench.timing import write_timing_batch
from shrinkwrap.chain.context import Context
from shrinkwrap.chain.preflight import prepare
from shrinkwrap.chain.steps import Step, chain
from shrinkwrap.ml import distributed
from shrinkwrap.ml.checkpoint import close_scratch, open_scratch
from shrinkwrap.outputs import results as results_file
from shrinkwrap.outputs.tasks import TASKS as OUTPUT_TASKS
from shrinkwrap.recipe.schema import Recipe
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.fingerprint import sha256_json, tokenizer_fingerprint_of_file
from shrinkwrap.serve.rundir import (BENCH_FILE, RESULTS_FILE, STEP_FILE, TEACHER, TEST_OUTPUTS_FILE, TOKENIZER_FILE,
                                     is_disk_full, make_run_dir, read_json_or_none, record_trained_length, scratch,
                                     scratch_path, write_error, write_json_atomic, write_npy_atomic)

# Bumped when a step's code changes what it produces, so old outputs are not reused by mistake.
CODE_VERSION = 1


def step_fingerprint(ctx: Context, step: Step) -> str:
    source = ctx.fingerprints[step.source] if step.source else ctx.data_fingerprint
    # "upstream": the key's name when fingerprints were first made; renaming it would redo every finished step.
    return sha256_json({"step": step.name, "code": CODE_VERSION, "config": ctx.recipe.sections(step.sections),
                        "upstream": source, "tokenizer": ctx.tokenizer_fp, "extra": step.extra(ctx)})


def check_output_tokenizer(ctx: Context, step: Step, folder: Path, recorded: Optional[dict] = None) -> str:
    """A step's output must carry the tokenizer of the step it read (the teacher's base tokenizer for the
    first step): any other one would turn texts into other ids. A step that changes the tokenizer may
    write a new one; reused, its output must still hold the tokenizer its step.json `recorded`."""
    path = folder / TOKENIZER_FILE
    if not path.exists():
        raise UserError(f"{path}: missing — every step's output carries its tokenizer")
    got = tokenizer_fingerprint_of_file(path)
    source = ctx.tokenizer_fps[step.source] if step.source else ctx.tokenizer_fp
    if step.changes_tokenizer:
        want = recorded.get("tokenizer_fingerprint") if recorded else got
        derived = recorded.get("tokenizer_derived_from") if recorded else source
        if got != want or derived != source:
            raise UserError(f"{step.name}: the tokenizer in {folder} (fingerprint {got[:12]}) is not the one the step "
                            f"wrote (fingerprint {str(want)[:12]}, derived from {str(derived)[:12]}; its source's is "
                            f"{source[:12]}) — remove {folder} to redo the step")
    elif got != source:
        raise UserError(f"{step.name}: the tokenizer in {folder} (fingerprint {got[:12]}) differs from the "
                        f"{step.source or TEACHER}'s tokenizer (fingerprint {source[:12]}) — remove {folder} to "
                        f"redo the step")
    ctx.tokenizer_fps[step.name] = got
    return got


def _call(ctx: Context, step: Step, out: Path) -> dict:
    """The step's own code, given its source's output folder; a full disk becomes a one-line error."""
    missing = [name for name in step.reads if name not in ctx.outputs]
    if missing:  # the chain's declaration is wrong: a bug, not a user's mistake
        raise RuntimeError(f"step {step.name} reads {', '.join(missing)}, which no earlier step wrote")
    try:
        return step.run(ctx, ctx.outputs[step.source] if step.source else None, out)
    except Exception as e:
        if is_disk_full(e):
            raise write_error(getattr(e, "filename", None) or out, e) from None
        raise


def run_step(ctx: Context, step: Step, finished_only: bool = False) -> dict:
    """Reuses the step's finished output when its fingerprint matches; otherwise runs it atomically (with
    `finished_only`, a one-line UserError instead: `run --retime` never trains)."""
    fp = step_fingerprint(ctx, step)
    ctx.fingerprints[step.name] = fp
    final = ctx.run_dir / step.name
    done = read_json_or_none(final / STEP_FILE)
    if done and done.get("fingerprint") == fp:
        check_output_tokenizer(ctx, step, final, done)
        ctx.log(f"[{step.name}] unchanged — reusing {final}")
        ctx.outputs[step.name] = final
        return done
    if finished_only:
        raise UserError(f"--retime: step {step.name} is not finished in {ctx.run_dir}"
                        + (" (the recipe changed since it ran)" if done else "")
                        + " — run without --retime to make it; --retime only times a finished run again")
    if not distributed.is_main():  # a helper process: it trains alongside; the main one finishes the step
        distributed.barrier()  # the scratch folder (and any checkpoint in it) is ready
        if step.trains:
            _call(ctx, step, scratch_path(final))
        distributed.barrier()
        ctx.outputs[step.name] = final
        return {}
    # The scratch folder outlives a crash: a killed run's checkpoints in it are resumed when made for
    # this very fingerprint (open_scratch), and removed otherwise.
    with scratch(final, keep=True) as partial:
        resumed = open_scratch(partial, fp)
        ctx.log(f"[{step.name}] " + ("resuming from the checkpoint a killed run left" if resumed else "running"))
        distributed.barrier()  # the scratch folder (and any checkpoint in it) is ready before anyone trains
        started = time.perf_counter()
        info = _call(ctx, step, partial)
        seconds = time.perf_counter() - started
        close_scratch(partial)
        record_trained_length(partial, ctx.length_of(step.name))  # where bench --data and package cut texts
        tok_fp = check_output_tokenizer(ctx, step, partial)
        # "after": the step.json key for the step's source since step.json was first written
        record = {"name": step.name, "format": step.format, "fingerprint": fp, "tokenizer_fingerprint": tok_fp,
                  "after": step.source, "seconds": round(seconds, 2), "info": info}
        if step.changes_tokenizer:
            record["tokenizer_derived_from"] = ctx.tokenizer_fps[step.source] if step.source else ctx.tokenizer_fp
        write_json_atomic(partial / STEP_FILE, record)
    distributed.barrier()
    ctx.outputs[step.name] = final
    ctx.log(f"[{step.name}] done in {seconds:.1f} s")
    return record


def bench_step(ctx: Context, step: Step) -> dict:
    from shrinkwrap.bench.measure import measure

    folder = ctx.outputs[step.name]
    b = ctx.recipe.bench
    # A step after one that changed the tokenizer reads texts with its own; a student cut at fewer
    # tokens than the benchmark's texts serves them at the cost of the tokens it reads.
    length = ctx.length_of(step.name)
    read = min(length, b.sequence_length)
    key = sha256_json({"bench": b.model_dump(mode="json"), "step": ctx.fingerprints[step.name], "tokens_read": read})
    cached = read_json_or_none(folder / BENCH_FILE)
    if cached and cached.get("key") == key and (folder / TEST_OUTPUTS_FILE).is_file():
        return cached["result"]
    ctx.log(f"[{step.name}] benchmarking (batch {b.batch_size} × {b.sequence_length} tokens"
            + (f", the first {read} read" if read < b.sequence_length else "") + f", {b.threads} threads)")
    result = measure(folder, bench_inputs(ctx, step, folder, length), b.model_copy(update={"sequence_length": read}))
    result["latency_ms"].update(sequence_length=b.sequence_length, tokens_read=read)
    write_npy_atomic(folder / TEST_OUTPUTS_FILE, result.pop("test_outputs"))
    write_json_atomic(folder / BENCH_FILE, {"key": key, "result": result})
    return result


def bench_inputs(ctx: Context, step: Step, folder: Path, length: int):
    """What a step's output is measured on: the test texts read with its tokenizer, cut where it stops reading,
    their labels, and the timing batch; for an embedding run also the teacher's test vectors (its benchmark's,
    kept beside it), the training texts (the probe) and each test text's pair partner with the pair's score."""
    from shrinkwrap.bench.measure import Inputs

    tokens = ctx.tokens_of(folder, length)
    timing, _ = ctx.timing_examples(folder, length)
    inputs = Inputs(timing=timing, pad_id=tokens.pad_id, test=tokens.encoded["test"], labels=ctx.data.test.labels,
                    n_labels=len(ctx.data.label_names))
    if ctx.recipe.task != "embedding":
        return inputs
    import numpy as np

    from shrinkwrap.ml.data import Split
    from shrinkwrap.serve.batches import encode

    test = ctx.data.test
    reference = None if step.name == TEACHER else np.load(ctx.teacher_dir / TEST_OUTPUTS_FILE)
    train = (tokens.encoded["train"], ctx.data.train.labels) if ctx.data.has_labels else None
    pairs = None
    if test.second is not None and test.scores is not None:
        partners = encode(tokens.tokenizer, Split(texts=test.second, labels=test.labels), length,
                          truncation=ctx.recipe.data.truncation)
        pairs = (partners, test.scores)
    return replace(inputs, labels=test.labels if ctx.data.has_labels else None, reference=reference, train=train,
                   pairs=pairs)


def calibrate_step(ctx: Context, step: Step, results: dict) -> dict:
    """Temperature scaling of the shipped step (Guo et al. 2017): one T fitted on the validation split's
    logits to minimise their NLL, then the test split's calibration with and without it, and the
    accuracy-against-coverage curve the report plots for abstention (predict --min-confidence). The shipped
    step's quality on the validation split is recorded too (a search ranks its candidates by it)."""
    from shrinkwrap.bench.targets import load_target
    from shrinkwrap.bench.tasks import TASKS
    from shrinkwrap.ml.temperature import fit_temperature
    from shrinkwrap.serve import calibration
    from shrinkwrap.serve.batches import all_outputs

    folder, b = ctx.outputs[step.name], ctx.recipe.bench
    tokens = ctx.tokens_of(folder, ctx.length_of(step.name))
    n = len(ctx.data.label_names)
    target = load_target(folder, b.threads)
    try:
        val = all_outputs(target.outputs, tokens.encoded["validation"], tokens.pad_id, n, b.eval_batch_size)
        test = all_outputs(target.outputs, tokens.encoded["test"], tokens.pad_id, n, b.eval_batch_size)
    finally:
        target.release()
    y_val, y_test = ctx.data.validation.labels, ctx.data.test.labels
    if len(y_val):
        results_file.set_validation(results, *TASKS[ctx.task.NAME].quality(val, y_val, n))
    t = fit_temperature(val, y_val) if len(y_val) else 1.0
    ctx.log(f"[{step.name}] temperature {t:.3f} fitted on {len(y_val)} validation texts")
    scaled, raw = calibration.figures(test, y_test, t), calibration.figures(test, y_test)
    return {"temperature": t, "fitted_on": "validation", "validation_texts": int(len(y_val)),
            "validation_nll_raw": calibration.nll(calibration.softmax(val), y_val) if len(y_val) else None,
            "validation_nll": calibration.nll(calibration.softmax(val, t), y_val) if len(y_val) else None,
            "ece": scaled["ece"], "ece_raw": raw["ece"], "brier": scaled["brier"], "nll": scaled["nll"],
            "reliability": scaled["reliability"],
            "coverage": calibration.coverage_curve(calibration.softmax(test, t), y_test)}


def validate_vectors(ctx: Context, step: Step) -> tuple[dict, list]:
    """The shipped step's quality on the validation split for an embedding run (what a search ranks candidates by):
    its validation vectors against the teacher's, with the labels where there are some."""
    from shrinkwrap.bench.embedding import quality
    from shrinkwrap.bench.targets import load_target
    from shrinkwrap.serve.batches import all_outputs

    def vectors(name: str):
        folder = ctx.outputs[name]
        tokens = ctx.tokens_of(folder, ctx.length_of(name))
        target = load_target(folder, ctx.recipe.bench.threads)
        try:
            size = 1 if target.batch_dependent else ctx.recipe.bench.eval_batch_size
            return all_outputs(target.outputs, tokens.encoded["validation"], tokens.pad_id, None, size)
        finally:
            target.release()

    labels = ctx.data.validation.labels if ctx.data.has_labels else None
    return quality(vectors(step.name), labels, vectors(TEACHER))


def time_together(ctx: Context, results: dict) -> None:
    """The teacher and every step's output timed together in interleaved rounds (bench.rounds), each on the
    batch it was benchmarked on: the figures results.json's `latency_ms` holds, and the gate reads. The timing
    taken right after each step stays as `latency_ms_alone`, a progress figure."""
    from shrinkwrap.bench.rounds import time_folders

    b = ctx.recipe.bench
    rows = results_file.steps_of(results)
    ctx.log(f"[timing] the teacher and {len(rows) - 1} step(s) together, {b.rounds} interleaved rounds (batch "
            f"{b.batch_size} × {b.sequence_length} tokens, {b.threads} threads)")
    timed = time_folders([Path(r["path"]) for r in rows], b, b.rounds)
    for row, latency in zip(rows, timed):
        results_file.set_latency(row, {**latency, "sequence_length": b.sequence_length})
    unsteady = [r["name"] for r in rows if r["latency_ms"]["unstable"]]
    if unsteady:
        ctx.log(f"[timing] unstable (the machine was busy): {', '.join(unsteady)} — the gate re-times before it "
                f"judges a latency limit on them; `shrinkwrap run RECIPE --retime` times the run again")


def _record_overlaps(ctx: Context, results: dict) -> None:
    """Transfer texts and augmented copies that are also test texts: the student is taught the teacher's
    answers on them (the cautions say so)."""
    if ctx.transfer is not None:
        test_texts = set(ctx.data.test.texts)
        results_file.set_data_overlap(results, "transfer_in_test",
                                      sum(t in test_texts for batch in ctx.transfer_batches() for t in batch))
    if ctx.recipe.augment.copies:
        from shrinkwrap.ml.augment import in_split

        results_file.set_data_overlap(results, "augmented_in_test", in_split(ctx.augmented()[0], ctx.data.test))


def run_chain(recipe: Recipe, out: Path, quiet: bool = False, until: Optional[str] = None,
              measure: bool = True, retime: bool = False) -> dict:
    """Runs (or reuses) every enabled step in order, stopping after `until` when given; returns the
    results (also in out/results.json). measure=False: no benchmark and no calibration, only each step's
    output, its size and its timing batch (a search's untrained candidates). retime=True: every step must be
    finished already (nothing trains); they are timed together again. A helper process of a distributed run
    returns {}."""
    steps = [s for s in chain(recipe) if s.enabled(recipe)]
    if until is not None and until not in [s.name for s in steps]:
        raise UserError(f"--until {until} — not a step of this recipe; steps: {', '.join(s.name for s in steps)}")
    from shrinkwrap.bench.machine import describe

    ctx = prepare(recipe, out, quiet)
    make_run_dir(out)
    # A killed run's .partial-<step> folders are never mistaken for finished steps (those have step.json
    # in <step>/); run_step resumes one from its checkpoint when the step's fingerprint still matches.
    results = results_file.header(recipe, describe(), ctx.data, ctx.data_fingerprint, ctx.tokenizer_fp)
    if distributed.is_main():
        _record_overlaps(ctx, results)
    teacher, outputs_task = None, OUTPUT_TASKS[recipe.task]
    for step in steps:
        record = run_step(ctx, step, finished_only=retime)
        if distributed.is_main():  # benchmarks and results are the main process's
            folder = ctx.outputs[step.name]
            write_timing_batch(folder, ctx.timing_batch(folder, ctx.length_of(step.name)))
            if measure:
                row = results_file.step_row(step.name, folder, record, bench_step(ctx, step))
                row.update(outputs_task.compare(row, teacher, ctx.data.test.labels))  # against the teacher's row
                teacher = teacher or row
            else:
                row = results_file.unmeasured_row(step.name, step.format, folder, record, size_of(folder))
            results_file.add_row(results, row)
            write_json_atomic(out / RESULTS_FILE, results)
        if step.name == until:
            break
    if measure and distributed.is_main() and results_file.steps_of(results):
        time_together(ctx, results)
        write_json_atomic(out / RESULTS_FILE, results)
        last = next(s for s in steps if s.name == results_file.final_row(results)["name"])
        if last.format == "onnx" and ctx.recipe.task == "embedding":
            if len(ctx.data.validation) > 1:
                results_file.set_validation(results, *validate_vectors(ctx, last))
                write_json_atomic(out / RESULTS_FILE, results)
        elif last.format == "onnx":
            results_file.set_calibration(results, calibrate_step(ctx, last, results))
            write_json_atomic(out / RESULTS_FILE, results)
    return results if distributed.is_main() else {}

