"""Peak resident memory (RSS) while a target is loaded and run.

On Linux the kernel keeps each process's RSS high-water mark (VmHWM in /proc/self/status), and
writing 5 to /proc/self/clear_refs resets it to the current RSS (see proc(5)). So the peak of one
window — load, accuracy pass, timing — is exact, with no sampling thread to disturb the timing.
Where that reset is unavailable we fall back to getrusage's ru_maxrss, the peak of the whole
process so far: it is the target's own only when the process measured nothing bigger before it.

Both peaks include the interpreter and the libraries already imported; `rss_before_load_bytes`
says how much that was, and `peak_over_start_bytes` is the part the target added (an underestimate
when the target reuses memory freed by an earlier one in the same process).
"""
from __future__ import annotations

import resource
import sys

import psutil


def _vm_hwm_bytes() -> int | None:
    try:
        with open("/proc/self/status", encoding="ascii") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return None


def _reset_hwm() -> bool:
    try:
        with open("/proc/self/clear_refs", "w", encoding="ascii") as f:
            f.write("5")
        return True
    except OSError:
        return False


def _ru_maxrss_bytes() -> int:
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return peak if sys.platform == "darwin" else peak * 1024  # bytes on macOS, KiB elsewhere


class PeakWindow:
    """Peak RSS between construction and `stop()`."""

    def __init__(self) -> None:
        self.exact = _reset_hwm() and _vm_hwm_bytes() is not None
        self.rss_before = psutil.Process().memory_info().rss

    def stop(self) -> dict:
        if self.exact:
            peak, method = _vm_hwm_bytes(), "VmHWM of /proc/self/status, reset through /proc/self/clear_refs before loading"
        else:
            peak, method = _ru_maxrss_bytes(), "ru_maxrss of getrusage (peak of the whole process so far)"
        return {"peak_rss_bytes": int(peak), "rss_before_load_bytes": int(self.rss_before),
                "peak_over_start_bytes": int(max(0, peak - self.rss_before)), "method": method}
