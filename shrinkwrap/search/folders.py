"""The search's folders share what candidates have in common: one cache (the teacher's outputs, the transfer
texts), and finished steps copied by hard links rather than made again."""
from __future__ import annotations

import os
import shutil
from pathlib import Path

from shrinkwrap.serve.rundir import scratch

CACHE = "cache"


def share_cache(run_dir: Path, shared: Path) -> None:
    """run_dir/cache is the search's one cache folder (teacher outputs, transfer texts): computed once."""
    run_dir.mkdir(parents=True, exist_ok=True)
    shared.mkdir(parents=True, exist_ok=True)
    link = run_dir / CACHE
    if link.is_symlink() or not link.exists():
        if link.is_symlink():
            link.unlink()
        link.symlink_to(os.path.relpath(shared, run_dir), target_is_directory=True)


def link_copy(src: Path, dst: Path) -> None:
    """A finished step's folder copied by hard links (no bytes copied; files are replaced, never edited)."""
    def link(a, b):
        try:
            os.link(a, b)
        except OSError:
            shutil.copy2(a, b)

    with scratch(dst) as tmp:
        shutil.copytree(src, tmp, dirs_exist_ok=True, copy_function=link)
