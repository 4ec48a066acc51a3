"""Resumable training: checkpoints in a step's scratch folder, written atomically, read weights-only.

A step runs in run_dir/.partial-<step>/ and its checkpoints live in `checkpoint/` inside it. The
runner keeps that folder after a crash only when it was made for the same step fingerprint, and
removes it before the step is declared finished (step.json in run_dir/<step>/), so a scratch folder
is never mistaken for a finished step and a finished step never carries a checkpoint.

A checkpoint holds tensors, numbers, strings and lists only: it is read with
torch.load(weights_only=True), which refuses anything that could run code when unpickled.
"""
from __future__ import annotations

import json
import pickle
import random
import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Optional

from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.rundir import read_json_or_none, write_atomic

# torch and numpy are imported where used: the runner imports this module on the command line's
# fast path, where a bad recipe must be reported without loading them.

CHECKPOINT_DIR = "checkpoint"
OWNER_FILE = "owner.json"   # the step fingerprint the checkpoints in the folder were made for
FORMAT = 1                  # bumped when the layout of a checkpoint changes; older ones are not resumed


def open_scratch(partial: Path, fingerprint: str) -> bool:
    """Makes a step's scratch folder. Returns True when a killed run left checkpoints there for this very
    fingerprint: they are kept (everything else in the folder is removed) and the step resumes from them."""
    folder = partial / CHECKPOINT_DIR
    if _owner(folder) == fingerprint and any(folder.glob("*.pt")):
        for p in partial.iterdir():
            if p.name != CHECKPOINT_DIR:
                shutil.rmtree(p) if p.is_dir() and not p.is_symlink() else p.unlink()
        for p in folder.glob(".*.tmp"):  # a save that was cut short
            p.unlink()
        return True
    shutil.rmtree(partial, ignore_errors=True)
    folder.mkdir(parents=True)
    write_atomic(folder / OWNER_FILE, json.dumps({"fingerprint": fingerprint}).encode())
    return False


def close_scratch(partial: Path) -> None:
    """Called once the step's output is complete, before it is declared finished."""
    shutil.rmtree(partial / CHECKPOINT_DIR, ignore_errors=True)


def _owner(folder: Path) -> Optional[str]:
    owner = read_json_or_none(folder / OWNER_FILE)
    return owner.get("fingerprint") if isinstance(owner, dict) else None


@dataclass
class Checkpoint:
    """One resumable state, e.g. a training run, in a step's scratch checkpoint folder."""
    folder: Path                 # <scratch>/checkpoint
    key: str                     # what the state belongs to: the step fingerprint, plus the seed where a step trains several
    every: int = 0               # optimizer steps between saves; 0 = no checkpoints at all
    name: str = "train"
    log: Callable[[str], None] = lambda message: None

    @property
    def path(self) -> Path:
        return self.folder / f"{self.name}.pt"

    @property
    def enabled(self) -> bool:
        return self.every > 0

    def due(self, step: int) -> bool:
        return self.enabled and step % self.every == 0

    def save(self, state: dict) -> None:
        from shrinkwrap.ml import distributed

        if not self.enabled or not distributed.is_main():  # one writer when several processes train
            return
        import torch

        self.folder.mkdir(parents=True, exist_ok=True)
        payload = {"format": FORMAT, "key": self.key, "state": state}
        write_atomic(self.path, lambda f: torch.save(payload, f))

    def load(self) -> Optional[dict]:
        """The saved state, or None when there is none or it belongs to something else (a stale one is removed)."""
        if not self.enabled or not self.path.exists():
            return None
        import torch

        try:
            payload = torch.load(self.path, map_location="cpu", weights_only=True)
        except pickle.UnpicklingError:
            # The weights-only reader met something other than tensors and plain data (or a damaged file).
            raise UserError(f"{self.path}: refused — not a plain-tensor checkpoint (a weights-only load failed); "
                            f"delete it to start the step over") from None
        except (RuntimeError, EOFError, ValueError) as e:
            self.log(f"ignoring an unreadable checkpoint {self.path} ({str(e).splitlines()[0][:120]})")
            self.clear()
            return None
        if not isinstance(payload, dict) or payload.get("format") != FORMAT or payload.get("key") != self.key:
            self.clear()
            return None
        return payload["state"]

    def clear(self) -> None:
        from shrinkwrap.ml import distributed

        if distributed.is_main():
            self.path.unlink(missing_ok=True)


def rng_state(generator=None) -> dict:
    """Every random number generator training draws from, as tensors and plain lists."""
    import numpy as np
    import torch

    version, internal, gauss = random.getstate()
    _, keys, pos, has_gauss, cached = np.random.get_state()
    state = {"python": [version, list(internal), gauss], "numpy": [torch.from_numpy(keys.astype(np.int64)), pos, has_gauss, cached],
             "torch": torch.get_rng_state()}
    if generator is not None:
        state["generator"] = generator.get_state()
    return state


def set_rng_state(state: dict, generator=None) -> None:
    import numpy as np
    import torch

    version, internal, gauss = state["python"]
    random.setstate((version, tuple(internal), gauss))
    keys, pos, has_gauss, cached = state["numpy"]
    np.random.set_state(("MT19937", keys.numpy().astype(np.uint32), pos, has_gauss, cached))
    torch.set_rng_state(state["torch"])
    if generator is not None:
        generator.set_state(state["generator"])
