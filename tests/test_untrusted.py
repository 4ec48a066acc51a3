"""Untrusted files: nothing we read can run code. Weights come from safetensors (or ONNX) only, anything
pickled is read weights-only or refused, YAML is parsed safely, remote code stays off unless the recipe
asks, relative paths resolve against the recipe's folder and outputs stay inside the run folder."""
from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import ROOT, tiny_recipe, write_recipe


class RunsCode:
    """Unpickling this runs a shell command: the marker file appears if anything unpickles it."""

    def __init__(self, marker: Path):
        self.marker = marker

    def __reduce__(self):
        return os.system, (f"touch {self.marker}",)


def evil_pickle(path: Path, marker: Path) -> Path:
    import torch

    torch.save({"weight": RunsCode(marker)}, path)  # a pickle, as pytorch_model.bin files are
    return path


def model_folder_with_pickle_weights(tiny_base: Path, folder: Path, marker: Path) -> Path:
    shutil.copytree(tiny_base, folder)
    for f in folder.glob("*.safetensors"):
        f.unlink()
    evil_pickle(folder / "pytorch_model.bin", marker)
    return folder


def test_the_marker_works(tmp_path):
    # Guards the tests below: unpickling the file without weights_only does run the command.
    import torch

    marker = tmp_path / "marker"
    path = evil_pickle(tmp_path / "x.bin", marker)
    torch.load(path, weights_only=False)
    assert marker.exists()


def test_load_classifier_refuses_pickled_weights(tmp_path, tiny_base):
    from shrinkwrap.ml.classification import load as load_classifier
    from shrinkwrap.serve.errors import UserError

    marker = tmp_path / "marker"
    folder = model_folder_with_pickle_weights(tiny_base, tmp_path / "model", marker)
    with pytest.raises(UserError, match=r"no \.safetensors weights \(found pytorch_model\.bin\)"):
        load_classifier(str(folder), label_names=["a", "b"])
    assert not marker.exists()


def test_teacher_base_with_pickled_weights_is_refused_before_anything_runs(tmp_path, tiny_base, keyword_csv):
    marker = tmp_path / "marker"
    folder = model_folder_with_pickle_weights(tiny_base, tmp_path / "model", marker)
    recipe = write_recipe(tmp_path / "r.yaml", tiny_recipe(folder, keyword_csv))
    out = tmp_path / "run"
    proc = subprocess.run([sys.executable, "-m", "shrinkwrap", "run", str(recipe), "--out", str(out)], cwd=ROOT,
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "teacher.base" in lines[0] and "no .safetensors weights" in lines[0]
    assert not marker.exists() and not out.exists()


def test_a_pickled_checkpoint_is_refused(tmp_path):
    from shrinkwrap.ml.checkpoint import CHECKPOINT_DIR, Checkpoint
    from shrinkwrap.serve.errors import UserError

    marker = tmp_path / "marker"
    folder = tmp_path / CHECKPOINT_DIR
    folder.mkdir()
    evil_pickle(folder / "train.pt", marker)
    with pytest.raises(UserError, match="refused — not a plain-tensor checkpoint"):
        Checkpoint(folder, "any", every=5).load()
    assert not marker.exists()


def test_a_pickled_checkpoint_planted_in_a_run_is_refused_by_the_runner(tmp_path, tiny_base, keyword_csv):
    """The planted file sits where a killed run's checkpoint would, for the right fingerprint."""
    from shrinkwrap.chain.preflight import prepare
    from shrinkwrap.chain.runner import run_chain, step_fingerprint
    from shrinkwrap.chain.steps import chain
    from shrinkwrap.ml.checkpoint import CHECKPOINT_DIR, open_scratch
    from shrinkwrap.recipe.schema import load_recipe
    from shrinkwrap.serve.errors import UserError

    marker = tmp_path / "marker"
    recipe = load_recipe(write_recipe(tmp_path / "r.yaml", tiny_recipe(tiny_base, keyword_csv)))
    out = tmp_path / "run"
    ctx = prepare(recipe, out, quiet=True)
    partial = out / ".partial-teacher"
    open_scratch(partial, step_fingerprint(ctx, chain()[0]))
    evil_pickle(partial / CHECKPOINT_DIR / "train.pt", marker)
    with pytest.raises(UserError, match="train.pt: refused"):
        run_chain(recipe, out, quiet=True)
    assert not marker.exists()


def test_a_pickled_int8_state_dict_is_refused(tmp_path, tiny_run):
    from shrinkwrap.ml.int8 import load_int8
    from shrinkwrap.serve.errors import UserError
    from shrinkwrap.serve.rundir import INT8_WEIGHTS

    marker = tmp_path / "marker"
    folder = tmp_path / "int8"
    shutil.copytree(tiny_run / "student-int8", folder)
    evil_pickle(folder / INT8_WEIGHTS, marker)
    with pytest.raises(UserError, match="refused"):
        load_int8(folder)
    assert not marker.exists()


def test_yaml_python_tags_are_refused(tmp_path):
    from shrinkwrap.recipe.schema import load_recipe
    from shrinkwrap.serve.errors import UserError

    marker = tmp_path / "marker"
    path = tmp_path / "r.yaml"
    path.write_text(f"name: x\ndata: !!python/object/apply:os.system ['touch {marker}']\n")
    with pytest.raises(UserError, match="line 2 is not valid YAML"):
        load_recipe(path)
    assert not marker.exists()


def test_set_values_are_parsed_safely(tmp_path, tiny_base, keyword_csv):
    from shrinkwrap.recipe.schema import load_recipe
    from shrinkwrap.serve.errors import UserError

    marker = tmp_path / "marker"
    path = write_recipe(tmp_path / "r.yaml", tiny_recipe(tiny_base, keyword_csv))
    with pytest.raises(UserError, match="--set"):
        load_recipe(path, [f"teacher.seeds=!!python/object/apply:os.system ['touch {marker}']"])
    assert not marker.exists()


def test_trust_remote_code_is_off_unless_the_recipe_says_so_and_then_warns(tmp_path, tiny_base, keyword_csv):
    from shrinkwrap.chain.preflight import prepare
    from shrinkwrap.recipe.schema import load_recipe

    plain = load_recipe(write_recipe(tmp_path / "a.yaml", tiny_recipe(tiny_base, keyword_csv)))
    assert plain.teacher.trust_remote_code is False
    with pytest.warns(UserWarning, match="teacher.trust_remote_code is on"):
        prepare(load_recipe(write_recipe(tmp_path / "b.yaml", tiny_recipe(tiny_base, keyword_csv,
                                                                          teacher={"trust_remote_code": True}))),
                tmp_path / "run", quiet=True)


def test_no_code_path_loads_pickles_or_enables_remote_code():
    """Every place that reads a file that could hold code does it safely (a scan of the package source)."""
    unsafe = [
        (r"torch\.load\((?![^)]*weights_only=True)", "torch.load without weights_only=True"),
        (r"\bpickle\.loads?\(|\bjoblib\.load\(|\bdill\.", "unpickling"),
        (r"allow_pickle\s*=\s*True", "numpy loading pickles"),
        (r"\byaml\.(load|unsafe_load|full_load)\(", "unsafe YAML"),
        (r"trust_remote_code\s*=\s*True", "remote code forced on"),
        (r"use_safetensors\s*=\s*False", "non-safetensors weights"),
    ]
    found = []
    for path in sorted((ROOT / "shrinkwrap").rglob("*.py")):
        text = path.read_text(encoding="utf-8")
        for pattern, what in unsafe:
            for m in re.finditer(pattern, text):
                found.append(f"{path.relative_to(ROOT)}:{text[:m.start()].count(chr(10)) + 1}: {what}")
    assert not found, "\n".join(found)


def test_relative_paths_resolve_against_the_recipe_folder(tmp_path, tiny_base, keyword_csv, monkeypatch):
    from shrinkwrap.chain.preflight import prepare
    from shrinkwrap.recipe.schema import load_recipe

    project = tmp_path / "project"
    (project / "data").mkdir(parents=True)
    shutil.copy(keyword_csv, project / "data" / "tickets.csv")
    shutil.copytree(tiny_base, project / "models" / "base")
    raw = tiny_recipe(Path("models/base"), Path("data/tickets.csv"))
    recipe_path = write_recipe(project / "recipe.yaml", json.loads(json.dumps(raw, default=str)))
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    recipe = load_recipe(Path("..") / "project" / "recipe.yaml")
    ctx = prepare(recipe, Path("run"), quiet=True)
    assert Path(ctx.base).resolve() == (project / "models" / "base").resolve()
    assert recipe.resolve(recipe.data.path).resolve() == (project / "data" / "tickets.csv").resolve()
    assert len(ctx.data.train) > 0
    assert recipe_path.exists() and not (elsewhere / "run").exists()


def test_outputs_stay_inside_the_run_folder(tiny_run):
    from shrinkwrap.chain.steps import chain

    for step in chain():
        assert re.fullmatch(r"[a-z0-9][a-z0-9-]*", step.name), step.name  # a plain folder name, no path parts
    results = json.loads((tiny_run / "results.json").read_text())
    root = tiny_run.resolve()
    for entry in results["steps"]:
        assert Path(entry["path"]).resolve().is_relative_to(root)
    for f in tiny_run.rglob("*"):
        assert f.resolve().is_relative_to(root), f"{f} points outside the run folder"
