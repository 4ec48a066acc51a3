"""How much of the machine other processes took while something was timed.

A steady timing can still be a wrong one: with both cores of a 2-core machine taken by other work, PyTorch's
two threads wait on each other at every operator and a 7 ms model times 500 ms, round after round alike
(benchmarks/noisy_neighbour.py). Its rounds agree and its p95 is close to its p50, so the steadiness rule
passes it. What gives it away is the machine itself: the CPU time all processes used (Linux's /proc/stat)
minus this process's own (os.times: every thread of it), over the wall time the timing took and the cores.

    others = (Δ busy CPU seconds of the machine − Δ CPU seconds of this process) / (Δ wall seconds × cores)

Where /proc/stat cannot be read (not Linux), the share is None and nothing is judged on it.
"""
from __future__ import annotations

import os
import time
from dataclasses import dataclass
from typing import Optional

STAT_FILE = "/proc/stat"
# Above this share of the machine taken by other processes, a timing is not trusted. A quiet 2-core machine
# measured here gives 0–3 % (the kernel, the shell); one busy neighbour process is 50 % of it. This project's
# rule of thumb.
MAX_OTHERS_SHARE = 0.15


@dataclass(frozen=True)
class Snapshot:
    wall: float               # time.monotonic()
    own: float                # this process's user + system CPU seconds
    busy: Optional[float]     # the machine's busy CPU seconds, all cores (None: unknown)
    cores: int


def _machine_busy(path: str = STAT_FILE) -> tuple[Optional[float], int]:
    """(busy CPU seconds over all cores since boot, number of cores) from /proc/stat; (None, cpu_count) when
    it cannot be read. Busy = user + nice + system + irq + softirq + steal (idle and iowait are not)."""
    try:
        with open(path) as f:
            lines = f.read().splitlines()
    except OSError:
        return None, os.cpu_count() or 1
    total = next((line.split() for line in lines if line.startswith("cpu ")), None)
    cores = sum(1 for line in lines if line.startswith("cpu") and line[3:4].isdigit())
    if total is None or len(total) < 9 or not cores:
        return None, os.cpu_count() or 1
    user, nice, system, _idle, _iowait, irq, softirq, steal = (int(v) for v in total[1:9])
    return (user + nice + system + irq + softirq + steal) / os.sysconf("SC_CLK_TCK"), cores


def snapshot(path: str = STAT_FILE) -> Snapshot:
    busy, cores = _machine_busy(path)
    t = os.times()
    return Snapshot(wall=time.monotonic(), own=t.user + t.system, busy=busy, cores=cores)


def others_share(before: Snapshot, after: Snapshot) -> Optional[float]:
    """The share of the machine (0 to 1) other processes used between two snapshots; None when unknown."""
    wall = after.wall - before.wall
    if before.busy is None or after.busy is None or wall <= 0:
        return None
    others = (after.busy - before.busy) - (after.own - before.own)
    return min(1.0, max(0.0, others / (wall * after.cores)))


def verdict(share: Optional[float]) -> Optional[str]:
    """Why a timing is not trusted for the machine's other work, or None."""
    if share is None or share <= MAX_OTHERS_SHARE:
        return None
    return f"other processes used {share:.0%} of the machine's CPU while it was timed (limit {MAX_OTHERS_SHARE:.0%})"
