"""A run's log as a CI system keeps it (stderr not a terminal): one line per epoch, no progress-bar
updates, no notice about the fresh head (said once in the teacher's line instead), none about attention
falling back from sdpa when attention maps are distilled, no warnings."""
from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

from conftest import tiny_recipe, write_recipe

ROOT = Path(__file__).resolve().parents[1]


def test_log_off_a_terminal_is_one_line_per_epoch(tiny_base, keyword_csv, tmp_path):
    # attention_weight: the student and the teacher-output pass ask for attention maps, which sdpa cannot give
    recipe = tiny_recipe(tiny_base, keyword_csv, student={"epochs": 1, "attention_weight": 1.0})
    epochs = recipe["teacher"]["epochs"]
    path = write_recipe(tmp_path / "recipe.yaml", recipe)
    # -W default: every warning shown once, deprecations included (a plain run hides those from libraries).
    proc = subprocess.run([sys.executable, "-W", "default", "-m", "shrinkwrap", "run", str(path), "--out",
                           str(tmp_path / "run"), "--until", "student-int8"],
                          capture_output=True, text=True, cwd=ROOT)
    assert proc.returncode == 0, proc.stderr
    err = proc.stderr
    assert "\r" not in err and "batch/s" not in err  # no progress bar
    seen = re.findall(rf"^teacher seed 0: epoch (\d+)/{epochs}, training loss [\d.]+, validation accuracy [\d.]+$",
                      err, re.M)
    assert seen and seen == [str(i) for i in range(1, len(seen) + 1)], err  # early stopping may end it sooner
    assert len(re.findall(r"^student: epoch 1/1, training loss", err, re.M)) == 1, err
    assert "are newly initialized" not in err and "TRAIN this model" not in err
    assert len(re.findall(r"fresh classification head", err)) == 1, err
    assert "Falling back to the manual attention" not in err, err
    assert "Warning" not in err, err
