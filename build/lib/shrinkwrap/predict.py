"""`shrinkwrap predict ARTIFACT [TEXT ...]`: JSON lines {"text", "label", "scores"} from an artifact.

Scores are calibrated: the softmax of the logits divided by the temperature the manifest records.
With --min-confidence P, a text whose top score is below P gets "label": null.

Texts come from the arguments, from --file (one per line), or from stdin (one per line). All input
is read and checked before the first line is printed, so a bad line never leaves half an output;
then it is classified a chunk at a time, so a file of millions of lines runs in flat memory.
Torch-free like shrinkwrap.artifact: this path must run in a slim image.
"""
from __future__ import annotations

import json
import sys
import tempfile
from pathlib import Path
from typing import BinaryIO, Iterator, Optional, TextIO

from shrinkwrap.artifact import load, verify
from shrinkwrap.errors import EXIT_OK, UserError
from shrinkwrap.textfiles import utf8_lines


CHUNK = 4096  # texts classified and written at a time: memory stays flat on a file of millions of lines


def _check_lines(stream: BinaryIO, where: str, copy: Optional[BinaryIO] = None) -> int:
    """Reads the stream once, line by line, and stops at the first line that is not UTF-8 or is empty;
    returns the number of lines. With `copy`, the bytes are written there as they are read."""
    raw = (line.encode("utf-8") if isinstance(line, str) else line for line in stream)
    count = 0
    for count, line in utf8_lines(raw, where, copy):
        if not line.strip():
            raise UserError(f"{where}: line {count} is empty — one text per line, none empty")
    return count


def _chunks_of_lines(stream: BinaryIO) -> Iterator[list[str]]:
    chunk: list[str] = []
    for raw in stream:
        chunk.append(raw.decode("utf-8").rstrip("\r\n"))
        if len(chunk) == CHUNK:
            yield chunk
            chunk = []
    if chunk:
        yield chunk


def read_texts(texts: list[str], file: Optional[str], stdin) -> Iterator[list[str]]:
    """Checks every text first (so that a bad line never leaves half an output), then returns an iterator
    over them in chunks of CHUNK. A file is read twice; stdin is copied to a temporary file as it is
    checked. Neither is held in memory whole."""
    if texts and file:
        raise UserError("give texts as arguments or with --file, not both")
    if texts:
        empty = next((i for i, t in enumerate(texts) if not t.strip()), None)
        if empty is not None:
            raise UserError(f"TEXT argument {empty + 1} is empty — every text needs at least one character")
        return iter([list(texts[i:i + CHUNK]) for i in range(0, len(texts), CHUNK)])
    if file:
        path = Path(file)
        try:
            with open(path, "rb") as f:
                count = _check_lines(f, f"--file {path}")
        except FileNotFoundError:
            raise UserError(f"--file {path}: no such file") from None
        except IsADirectoryError:
            raise UserError(f"--file {path}: is a folder, not a file") from None
        if not count:
            raise UserError(f"--file {path}: no texts in it")

        def from_file():
            with open(path, "rb") as f:
                yield from _chunks_of_lines(f)
        return from_file()
    if stdin.isatty():
        raise UserError("no texts — give them as arguments, with --file, or one per line on stdin")
    spool = tempfile.TemporaryFile()
    try:
        count = _check_lines(getattr(stdin, "buffer", stdin), "stdin", copy=spool)
    except BaseException:
        spool.close()
        raise
    if not count:
        spool.close()
        raise UserError("stdin: no texts in it")
    spool.seek(0)

    def from_spool():
        with spool:
            yield from _chunks_of_lines(spool)
    return from_spool()


def run_predict(artifact: str, texts: list[str], file: Optional[str], batch_size: int, threads: int,
                stdin: TextIO = sys.stdin, stdout: TextIO = sys.stdout, trusted_key: Optional[Path] = None,
                min_confidence: float = 0.0) -> int:
    if trusted_key is not None:  # the signature vouches for the manifest, whose hashes vouch for the rest
        from shrinkwrap.signing import check_signature

        check_signature(Path(artifact), trusted_key)
    manifest = verify(artifact)  # before reading stdin, so a bad artifact fails fast
    if (manifest.get("tokenizer") or {}).get("text_pair"):
        raise UserError(f"{artifact}: this model classifies pairs of texts; predict takes single texts")
    chunks = read_texts(texts, file, stdin)
    model = load(artifact, threads, verified=manifest)
    for chunk in chunks:
        for row in model.predict(chunk, batch_size, min_confidence):
            stdout.write(json.dumps(row, ensure_ascii=False) + "\n")
    stdout.flush()
    return EXIT_OK
