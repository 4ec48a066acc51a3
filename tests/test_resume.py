"""Crash safety: a run killed with SIGKILL resumes from its last checkpoint and ends exactly where an
uninterrupted run ends; a scratch folder is never mistaken for a finished step; a full disk is a clear
error that leaves the previous results intact.

Tolerance: the resumed run must match the uninterrupted one exactly — same predictions, same metrics,
same training curves and bit-identical weights (same machine, same seed, same thread count).
"""
from __future__ import annotations

import errno
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from conftest import ROOT, keyword_rows, tiny_recipe, write_csv, write_recipe

CKPT = "checkpoint"


def resume_recipe(base: Path, data: Path) -> dict:
    # Patience = epochs: early stopping must not end training before the kill; two teacher seeds so that the
    # sweep has to resume at the right seed; small checkpoint interval so a checkpoint appears early.
    return tiny_recipe(base, data,
                       teacher={"epochs": 4, "patience": 4, "seeds": [0, 1], "checkpoint_every_steps": 8},
                       student={"epochs": 3, "patience": 3, "checkpoint_every_steps": 8},
                       bench={"threads": 1})


@pytest.fixture(scope="module")
def resume_setup(tmp_path_factory, tiny_base):
    folder = tmp_path_factory.mktemp("resume")
    data = write_csv(folder / "tickets.csv", keyword_rows(300, seed=1))
    recipe = write_recipe(folder / "recipe.yaml", resume_recipe(tiny_base, data))
    return folder, recipe


# One thread: the machine's cores are shared, and two threads fighting over a busy core run ~7x slower.
ENV = os.environ | {"OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}


def command(recipe: Path, out: Path) -> list[str]:
    # --until student: the steps after it do not train, and their crash safety is tested below in-process.
    return [sys.executable, "-m", "shrinkwrap", "run", str(recipe), "--out", str(out), "--until", "student"]


def run_to_end(recipe: Path, out: Path) -> str:
    proc = subprocess.run(command(recipe, out), cwd=ROOT, env=ENV, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr[-3000:]
    return proc.stderr


def run_and_kill(recipe: Path, out: Path, when, log: Path, timeout: float = 240) -> None:
    """Starts the run and sends SIGKILL as soon as `when()` is true; fails if the run ends first."""
    with open(log, "w") as err:
        proc = subprocess.Popen(command(recipe, out), cwd=ROOT, env=ENV, stdout=subprocess.DEVNULL, stderr=err)
        deadline = time.monotonic() + timeout
        try:
            while not when():
                assert proc.poll() is None, f"the run ended before it could be killed:\n{log.read_text()[-3000:]}"
                assert time.monotonic() < deadline, "no checkpoint appeared in time"
                time.sleep(0.005)
            proc.send_signal(signal.SIGKILL)
        finally:
            proc.kill()
            proc.wait()
    assert proc.returncode == -signal.SIGKILL


@pytest.fixture(scope="module")
def reference(resume_setup):
    folder, recipe = resume_setup
    out = folder / "uninterrupted"
    run_to_end(recipe, out)
    return out


def assert_same_outcome(run: Path, ref: Path) -> None:
    import torch
    from safetensors.torch import load_file

    a, b = (json.loads((p / "results.json").read_text()) for p in (run, ref))
    assert [s["name"] for s in a["steps"]] == [s["name"] for s in b["steps"]] == ["teacher", "student"]
    for sa, sb in zip(a["steps"], b["steps"]):
        assert sa["predictions"] == sb["predictions"]
        assert sa["metrics"] == sb["metrics"]
    ta, tb = a["steps"][0]["info"], b["steps"][0]["info"]
    assert [r["seed"] for r in ta["seeds"]] == [0, 1]
    assert [(r["curve"], r["best_epoch"], r["steps"]) for r in ta["seeds"]] == \
        [(r["curve"], r["best_epoch"], r["steps"]) for r in tb["seeds"]]
    assert ta["kept_seed"] == tb["kept_seed"]
    assert a["steps"][1]["info"]["curve"] == b["steps"][1]["info"]["curve"]
    for step in ("teacher", "student"):
        wa, wb = load_file(run / step / "model.safetensors"), load_file(ref / step / "model.safetensors")
        assert wa.keys() == wb.keys()
        assert all(torch.equal(wa[k], wb[k]) for k in wa), f"{step}: weights differ after resuming"
        assert not (run / step / CKPT).exists()  # a finished step never carries a checkpoint


def test_killed_teacher_resumes_at_the_right_seed_and_batch(resume_setup, reference, tmp_path):
    _, recipe = resume_setup
    out = tmp_path / "run"
    scratch = out / ".partial-teacher" / CKPT
    # First kill: inside seed 0, once its first checkpoint exists.
    run_and_kill(recipe, out, lambda: (scratch / "train.pt").exists() and not (scratch / "sweep.pt").exists(),
                 tmp_path / "kill1.log")
    assert not (out / "teacher" / "step.json").exists()
    # Second kill: inside seed 1, after the sweep has recorded seed 0.
    run_and_kill(recipe, out, lambda: (scratch / "sweep.pt").exists() and (scratch / "train.pt").exists(),
                 tmp_path / "kill2.log")
    assert "teacher seed 0: resuming from a checkpoint at step" in (tmp_path / "kill2.log").read_text()
    assert not (out / "teacher" / "step.json").exists()
    log = run_to_end(recipe, out)
    assert "[teacher] resuming" in log
    assert "teacher seed 0" not in log  # once the sweep holds seed 0, it is never trained (nor logged) again
    assert_same_outcome(out, reference)


def test_killed_student_resumes_and_the_finished_teacher_is_kept(resume_setup, reference, tmp_path):
    _, recipe = resume_setup
    out = tmp_path / "run"
    scratch = out / ".partial-student" / CKPT
    run_and_kill(recipe, out, lambda: (scratch / "train.pt").exists(), tmp_path / "kill.log")
    teacher_record = (out / "teacher" / "step.json").read_bytes()
    teacher_mtime = (out / "teacher" / "model.safetensors").stat().st_mtime_ns
    assert not (out / "student" / "step.json").exists()
    log = run_to_end(recipe, out)
    assert "[teacher] unchanged" in log
    assert "student: resuming from a checkpoint at step" in log
    assert (out / "teacher" / "step.json").read_bytes() == teacher_record
    assert (out / "teacher" / "model.safetensors").stat().st_mtime_ns == teacher_mtime
    assert_same_outcome(out, reference)


# ---- scratch folders and checkpoints, without a subprocess ----

def test_scratch_folder_is_kept_only_for_the_same_fingerprint(tmp_path):
    from shrinkwrap.ml.checkpoint import Checkpoint, open_scratch

    partial = tmp_path / ".partial-teacher"
    assert open_scratch(partial, "fp-a") is False
    Checkpoint(partial / CKPT, "fp-a", every=5).save({"steps": 5})
    (partial / "model.safetensors").write_bytes(b"half-written")
    assert open_scratch(partial, "fp-a") is True
    assert (partial / CKPT / "train.pt").exists() and not (partial / "model.safetensors").exists()
    # A changed recipe (another fingerprint) starts over instead of resuming a stale checkpoint.
    assert open_scratch(partial, "fp-b") is False
    assert not (partial / CKPT / "train.pt").exists()


def test_checkpoint_of_another_key_is_not_resumed(tmp_path):
    import torch

    from shrinkwrap.ml.checkpoint import Checkpoint

    folder = tmp_path / CKPT
    Checkpoint(folder, "fp seed 0", every=5).save({"model": {"w": torch.ones(2)}, "steps": 5})
    assert Checkpoint(folder, "fp seed 0", every=5).load()["steps"] == 5
    assert Checkpoint(folder, "fp seed 1", every=5).load() is None
    assert not (folder / "train.pt").exists()  # the stale one is removed
    assert Checkpoint(folder, "fp seed 1", every=0).load() is None  # checkpoints off: never read


def test_rng_state_round_trips_through_a_weights_only_load(tmp_path):
    import random

    import numpy as np
    import torch

    from shrinkwrap.ml.checkpoint import Checkpoint, rng_state, set_rng_state

    gen = torch.Generator().manual_seed(3)
    random.seed(1), np.random.seed(2), torch.manual_seed(4)
    ck = Checkpoint(tmp_path, "k", every=1)
    ck.save({"rng": rng_state(gen)})
    expected = (random.random(), np.random.rand(), torch.rand(1).item(), torch.rand(1, generator=gen).item())
    set_rng_state(ck.load()["rng"], gen)
    assert (random.random(), np.random.rand(), torch.rand(1).item(), torch.rand(1, generator=gen).item()) == expected


def test_partial_folder_without_step_json_is_redone(tiny_run_copy, tiny_base, keyword_csv, tmp_path):
    """A kill during export or quantisation leaves .partial-<step> without step.json: it is redone."""
    import onnx

    from shrinkwrap.chain.runner import run_chain
    from shrinkwrap.recipe.schema import load_recipe

    step = "student-onnx-int8"
    shutil.rmtree(tiny_run_copy / step)
    partial = tiny_run_copy / f".partial-{step}"
    partial.mkdir()
    (partial / "model.onnx").write_bytes(b"\x08\x07half an ONNX file")
    kept = {s: (tiny_run_copy / s / "step.json").stat().st_mtime_ns
            for s in ("teacher", "student", "student-int8", "student-onnx")}
    recipe = load_recipe(write_recipe(tmp_path / "r.yaml", tiny_recipe(tiny_base, keyword_csv)))
    results = run_chain(recipe, tiny_run_copy, quiet=True)
    assert not partial.exists()
    assert json.loads((tiny_run_copy / step / "step.json").read_text())["name"] == step
    onnx.checker.check_model(str(tiny_run_copy / step / "model.onnx"), full_check=True)
    assert [s["name"] for s in results["steps"]][-1] == step
    # Finished steps are never recomputed.
    assert kept == {s: (tiny_run_copy / s / "step.json").stat().st_mtime_ns for s in kept}


# ---- disk full ----

def _tree(folder: Path) -> dict:
    return {str(p.relative_to(folder)): (p.stat().st_size, p.stat().st_mtime_ns)
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _enospc(*_args, **_kwargs):
    raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))


def test_disk_full_while_checkpointing_is_a_clear_error_and_keeps_previous_results(
        tiny_run_copy, tiny_base, keyword_csv, tmp_path, monkeypatch):
    import torch

    from shrinkwrap.chain.runner import run_chain
    from shrinkwrap.recipe.schema import load_recipe
    from shrinkwrap.serve.errors import UserError

    before = json.loads((tiny_run_copy / "results.json").read_text())
    finished = {s: _tree(tiny_run_copy / s) for s in ("teacher", "student")}
    recipe = load_recipe(write_recipe(tmp_path / "r.yaml", tiny_recipe(tiny_base, keyword_csv)),
                         ["student.temperature=3.0", "student.checkpoint_every_steps=2"])
    monkeypatch.setattr(torch, "save", _enospc)  # the checkpoint write of the re-run student
    with pytest.raises(UserError) as err:
        run_chain(recipe, tiny_run_copy, quiet=True)
    message = str(err.value)
    assert "no space left on device" in message and ".partial-student" in message and "train.pt" in message
    assert "\n" not in message
    # The finished steps are untouched (the old student stays until a new one is complete) ...
    assert {s: _tree(tiny_run_copy / s) for s in finished} == finished
    assert not list((tiny_run_copy / ".partial-student" / CKPT).glob(".*.tmp"))
    # ... and results.json is whole: the teacher entry it now holds is the one it held before.
    after = json.loads((tiny_run_copy / "results.json").read_text())
    assert after["steps"][0]["predictions"] == before["steps"][0]["predictions"]


def test_disk_full_while_writing_results_exits_2_and_keeps_the_old_file(tiny_run_copy, tiny_base, keyword_csv,
                                                                       tmp_path, monkeypatch, capsys):
    from shrinkwrap.cli import main

    recipe = write_recipe(tmp_path / "r.yaml", tiny_recipe(tiny_base, keyword_csv))
    results = (tiny_run_copy / "results.json").read_bytes()
    monkeypatch.setattr(os, "fsync", _enospc)  # where a full disk often shows first: flushing a written file
    code = main(["run", str(recipe), "--out", str(tiny_run_copy), "--json"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert len(err) == 1 and "results.json: no space left on device" in err[0] and "Traceback" not in err[0]
    assert (tiny_run_copy / "results.json").read_bytes() == results
    assert not list(tiny_run_copy.glob(".results.json.*"))


def test_length_grouping_changes_the_training_fingerprints_only_when_on(tmp_path, tiny_base, keyword_csv):
    """Turned on, train.length_grouped changes every training step's fingerprint (its batches change), so a
    finished step trained without it is not reused."""
    from shrinkwrap.chain.preflight import prepare
    from shrinkwrap.chain.runner import step_fingerprint
    from shrinkwrap.chain.steps import chain
    from shrinkwrap.recipe.schema import load_recipe

    def fingerprints(train):
        recipe = load_recipe(write_recipe(tmp_path / "r.yaml", tiny_recipe(tiny_base, keyword_csv) | train))
        ctx = prepare(recipe, tmp_path / "run", quiet=True)
        for step in chain()[:2]:  # teacher, student (whose fingerprint includes the teacher's)
            ctx.fingerprints[step.name] = step_fingerprint(ctx, step)
        return dict(ctx.fingerprints)

    default, on = fingerprints({}), fingerprints({"train": {"length_grouped": True}})
    assert all(on[k] != default[k] for k in default)
