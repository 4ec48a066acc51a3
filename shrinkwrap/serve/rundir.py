"""The run folder: the steps' names (each names its folder), file names, atomic writes, scratch-then-rename
folders, JSON reading.

Imports nothing else of the package but its errors, so that every module — the torch-free predict path
included — can use it.
"""
from __future__ import annotations

import errno
import json
import os
import shutil
import socket
import sys
import time
from contextlib import contextmanager
from pathlib import Path
from typing import Callable, Iterator

from shrinkwrap.serve.errors import UserError

# The steps, by name: each names the step's folder in the run folder, its row in results.json and `run --until`.
TEACHER = "teacher"
STUDENT = "student"
STUDENT_PRUNED = "student-pruned"
STUDENT_TRIMMED = "student-trimmed"
STUDENT_INT8 = "student-int8"
STUDENT_ONNX = "student-onnx"
STUDENT_ONNX_INT8_STATIC = "student-onnx-int8-static"
STUDENT_ONNX_INT8_DYNAMIC = "student-onnx-int8-dynamic"
STUDENT_ONNX_INT8 = "student-onnx-int8"

STEP_FILE = "step.json"          # a step's record: fingerprint, tokenizer fingerprint, what it did
BENCH_FILE = "bench.json"        # a step's benchmark, keyed by what it measured
TIMING_FILE = "timing.json"      # the batch a step's output is timed on (token ids as the model reads them)
TEST_OUTPUTS_FILE = "test_outputs.npy"   # a step's outputs on the test texts, as its benchmark measured them
RESULTS_FILE = "results.json"    # every figure of a run
REPORT_FILE = "report.md"
REPORT_HTML_FILE = "report.html"
ARTIFACT_DIR = "artifact"        # the deployable folder inside a run folder
MODEL_FILE = "model.onnx"        # the ONNX graph of an ONNX step and of an artifact
MANIFEST_FILE = "manifest.json"
LABELS_FILE = "labels.json"
TOKENIZER_FILE = "tokenizer.json"
TOKENIZER_CONFIG = "tokenizer_config.json"   # its model_max_length: the tokens a step's model was trained to read
CONFIG_FILE = "config.json"
INT8_WEIGHTS = "model_int8.pt"   # a PyTorch int8 step's quantised state dict (loaded weights-only)
CARD_FILE = "README.md"           # an artifact's model card
SIGNATURE_FILE = "manifest.sig"   # an artifact's optional Ed25519 signature of manifest.json (base64)
LOCK_FILE = ".lock"               # who is running in a run folder now: pid, host, start time

DISK_FULL = (errno.ENOSPC, errno.EDQUOT)


def is_disk_full(e: BaseException) -> bool:
    # torch and safetensors sometimes re-raise a failed write as a RuntimeError carrying the text only.
    return (isinstance(e, OSError) and e.errno in DISK_FULL) or "No space left on device" in str(e)


def write_error(path: Path | str, e: BaseException) -> UserError:
    """The one-line error for a write that failed: disk full gets its own message (exit 2 like any UserError)."""
    if is_disk_full(e):
        return UserError(f"{path}: no space left on device — free some space and run the same command again "
                         f"(finished steps and checkpoints are kept)")
    return UserError(f"{path}: cannot write — {getattr(e, 'strerror', None) or e}")


def write_atomic(path: Path, data: bytes | Callable) -> None:
    """Writes `data` (bytes, or a function given the open file) so that `path` is either old or whole."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        with open(tmp, "wb") as f:  # a Python file object: a full disk surfaces as OSError(ENOSPC)
            data(f) if callable(data) else f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except OSError as e:
        tmp.unlink(missing_ok=True)
        raise write_error(path, e) from None


def write_json_atomic(path: Path, obj) -> None:
    write_atomic(path, json.dumps(obj, indent=2).encode("utf-8"))


def write_npy_atomic(path: Path, array) -> None:
    """An array as a .npy file (numpy's format), written atomically."""
    import io

    import numpy as np

    buffer = io.BytesIO()
    np.save(buffer, np.asarray(array), allow_pickle=False)
    write_atomic(path, buffer.getvalue())


def write_text_atomic(path: Path, text: str) -> None:
    write_atomic(path, text.encode("utf-8"))


def read_json(path: Path, what: str = "JSON file"):
    """Reads a JSON file; a missing or unreadable one is a one-line UserError naming it."""
    path = Path(path)
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise UserError(f"{path}: no such {what}") from None
    except UnicodeDecodeError:
        raise UserError(f"{path}: not a {what} (not UTF-8 text)") from None
    except ValueError as e:
        raise UserError(f"{path}: not a valid {what} ({e})") from None
    except OSError as e:
        raise UserError(f"{path}: cannot read — {e.strerror or e}") from None


def read_json_or_none(path: Path):
    """A JSON file's content, or None when it is missing or unreadable (e.g. a record a killed run never wrote)."""
    try:
        return json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def swap_in(scratch: Path, final: Path) -> None:
    """Renames a finished scratch folder into place: the old one (if any) is moved aside first and removed last."""
    old = final.parent / f".old-{final.name}"
    shutil.rmtree(old, ignore_errors=True)
    if final.exists():
        os.replace(final, old)
    os.replace(scratch, final)
    shutil.rmtree(old, ignore_errors=True)


def scratch_path(final: Path) -> Path:
    """Where the folder `final` is built before it is renamed into place."""
    return final.parent / f".partial-{final.name}"


@contextmanager
def scratch(final: Path, keep: bool = False) -> Iterator[Path]:
    """Builds the folder `final` in a scratch folder beside it and renames it into place only when the
    block completes: a crash leaves `final` as it was (old or absent), never half-written. With `keep`,
    an existing scratch folder is reused (resumable work inside it); otherwise it starts empty."""
    tmp = scratch_path(final)
    if not keep:
        shutil.rmtree(tmp, ignore_errors=True)
    tmp.mkdir(parents=True, exist_ok=True)
    try:
        yield tmp
    except BaseException:
        if not keep:
            shutil.rmtree(tmp, ignore_errors=True)
        raise
    swap_in(tmp, final)


def check_out_dir(out: Path, flag: str = "--out", replaced: bool = False) -> None:
    """An output folder must be a folder (or not exist yet) under a writable parent. A folder that is
    `replaced` as a whole (swapped in beside the old one) needs its parent writable, not itself."""
    out = Path(out)
    if replaced and out.exists() and not out.is_dir():
        raise UserError(f"{flag} {out}: is a file, not a folder")
    start = out.parent if replaced else out
    probe = next((p for p in [start, *start.parents] if p.exists()), Path("."))
    if probe.exists() and not probe.is_dir():
        raise UserError(f"{flag} {out}: {probe} is a file, not a folder")
    if not os.access(probe, os.W_OK | os.X_OK):
        raise UserError(f"{flag} {out}: {probe} is not writable")


def record_trained_length(folder: Path, length: int) -> None:
    """Records in the folder's tokenizer_config.json (model_max_length, where the transformers libraries keep the
    longest input a model reads) the tokens the step's model was trained to read, so that whoever reads the folder
    later (bench --data, package) cuts texts where training did."""
    path = Path(folder) / TOKENIZER_CONFIG
    config = read_json_or_none(path)
    if isinstance(config, dict) and config.get("model_max_length") != length:
        write_json_atomic(path, {**config, "model_max_length": int(length)})


def trained_length(folder: Path, positions: int | None = None) -> int | None:
    """The tokens the model in `folder` was trained to read (record_trained_length), or None where the folder
    says nothing sane: no tokenizer_config.json, or the libraries' 'no limit' (a huge number), or more than the
    model's `positions`."""
    config = read_json_or_none(Path(folder) / TOKENIZER_CONFIG)
    n = config.get("model_max_length") if isinstance(config, dict) else None
    if isinstance(n, bool) or not isinstance(n, int) or n < 1 or n > (positions or 1_000_000):
        return None
    return n


def make_run_dir(out: Path) -> None:
    """Creates the run folder `out` (and its parents) if needed; a one-line UserError when it cannot."""
    try:
        Path(out).mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise UserError(f"--out {out}: cannot create the run folder — {e.strerror or e}") from None


def check_out_file(out: Path, flag: str = "--out") -> None:
    """An output file must not be a folder, and its folder must exist and be writable (checked before any
    work, so that a bad path fails before minutes of it)."""
    out = Path(out)
    if out.is_dir() or not out.parent.is_dir() or not os.access(out.parent, os.W_OK):
        raise UserError(f"{flag} {out}: not a writable file path (its folder must exist)")


def _holder_text(holder) -> str:
    if not isinstance(holder, dict):
        return "a holder that has not written its details yet"
    return f"pid {holder.get('pid')} on {holder.get('host')}, started {holder.get('started')}"


def _read_holder(fd: int):
    os.lseek(fd, 0, os.SEEK_SET)
    try:
        return json.loads(os.read(fd, 4096) or b"null")
    except ValueError:
        return None


@contextmanager
def run_lock(out: Path, log: Callable[[str], None] = lambda m: print(m, file=sys.stderr, flush=True)) -> Iterator[None]:
    """Holds an exclusive lock on `out`/.lock while the block runs, so that two runs never work in one
    folder at once; the file says who holds it (pid, host, start time). A second run stops at once
    (UserError naming the holder). The lock is the kernel's (flock), so a killed holder's lock is free;
    the details it left are reported as a takeover. The folder is created if needed and removed again if
    the block left it empty (bad input found by the preflight writes nothing)."""
    import fcntl

    out = Path(out)
    check_out_dir(out)  # the preflight's own message for a file in the way or a read-only parent
    created = not out.exists()
    make_run_dir(out)
    lock = out / LOCK_FILE
    for _ in range(5):
        fd = os.open(lock, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = _read_holder(fd)
            os.close(fd)
            raise UserError(f"--out {out}: busy — another run holds {lock} ({_holder_text(holder)}); wait for it "
                            f"or use another --out") from None
        # The previous holder may have removed the file between our open and our lock: then ours is a
        # lock on a file nobody else sees, and we must start again on the one at the path.
        try:
            same = os.stat(lock).st_ino == os.fstat(fd).st_ino
        except FileNotFoundError:
            same = False
        if same:
            break
        os.close(fd)
    else:
        raise UserError(f"--out {out}: cannot take the run-folder lock {lock} — try again")
    left = _read_holder(fd)
    if isinstance(left, dict):
        log(f"note: {lock} was left by {_holder_text(left)}, which is no longer running — taking it over")
    me = {"pid": os.getpid(), "host": socket.gethostname(), "started": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
          "command": " ".join(sys.argv)[:300]}
    os.ftruncate(fd, 0)
    os.pwrite(fd, json.dumps(me).encode(), 0)
    try:
        yield
    finally:
        os.unlink(lock)  # before unlocking, so that a waiting opener sees the inode change (above)
        os.close(fd)
        if created:
            try:
                out.rmdir()  # only if empty
            except OSError:
                pass
