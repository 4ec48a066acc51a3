"""The run-folder lock (rundir.run_lock), with two real processes: a second run on a busy folder stops at once
with exit 2 naming the holder; a lock left by a killed process is taken over with a notice."""
from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import tiny_recipe, write_recipe

from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.rundir import LOCK_FILE, run_lock

HOLD = r"""
import sys, time
from pathlib import Path
from shrinkwrap.serve.rundir import run_lock
with run_lock(Path(sys.argv[1])):
    print("held", flush=True)
    time.sleep(float(sys.argv[2]))
"""


def _holder(out: Path, seconds: float) -> subprocess.Popen:
    p = subprocess.Popen([sys.executable, "-c", HOLD, str(out), str(seconds)], stdout=subprocess.PIPE, text=True)
    assert p.stdout.readline().strip() == "held"
    return p


def test_second_run_on_a_busy_folder_stops_at_once_naming_the_holder(tmp_path, tiny_base, keyword_csv):
    out = tmp_path / "run"
    recipe = write_recipe(tmp_path / "r.yaml", tiny_recipe(tiny_base, keyword_csv))
    holder = _holder(out, 120)
    try:
        r = subprocess.run([sys.executable, "-m", "shrinkwrap", "run", str(recipe), "--out", str(out)],
                           capture_output=True, text=True, cwd=tmp_path, timeout=120,
                           env=os.environ | {"OMP_NUM_THREADS": "1"})
        assert r.returncode == 2, r.stderr[-2000:]
        err = r.stderr.strip().splitlines()
        assert len(err) == 1 and "busy" in err[0] and f"pid {holder.pid}" in err[0] and "started" in err[0], err
        assert sorted(p.name for p in out.iterdir()) == [LOCK_FILE]  # the second run wrote nothing
        assert holder.poll() is None
    finally:
        holder.kill()
        holder.wait()


def test_lock_left_by_a_killed_process_is_taken_over_with_a_notice(tmp_path):
    out = tmp_path / "run"
    holder = _holder(out, 60)
    holder.send_signal(signal.SIGKILL)
    holder.wait()
    left = json.loads((out / LOCK_FILE).read_text())
    assert left["pid"] == holder.pid  # the dead holder's details are still there
    notes = []
    with run_lock(out, log=notes.append):
        assert json.loads((out / LOCK_FILE).read_text())["pid"] == os.getpid()
    assert len(notes) == 1 and f"pid {holder.pid}" in notes[0] and "taking it over" in notes[0]
    assert not (out / LOCK_FILE).exists()


def test_lock_is_released_and_an_unused_folder_removed(tmp_path):
    out = tmp_path / "fresh"
    with pytest.raises(UserError):
        with run_lock(out):
            raise UserError("preflight failed")
    assert not out.exists()
    with run_lock(out):
        with pytest.raises(UserError, match="busy"):  # the same process twice is busy too
            with run_lock(out):
                pass
    assert not out.exists()
