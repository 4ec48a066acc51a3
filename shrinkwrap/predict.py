"""`shrinkwrap predict ARTIFACT [TEXT ...]`: JSON lines {"text", "label", "scores"} from an artefact.

Texts come from the arguments, from --file (one per line), or from stdin (one per line). All input
is read and checked before the first line is printed, so a bad line never leaves half an output.
Torch-free like shrinkwrap.artifact: this path must run in a slim image.
"""
from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Optional, TextIO

from shrinkwrap.artifact import load, verify
from shrinkwrap.errors import EXIT_OK, UserError


def _lines(stream: TextIO, where: str) -> list[str]:
    try:
        text = stream.read()
    except UnicodeDecodeError as e:
        raise UserError(f"{where}: not UTF-8 text (byte {e.start})") from None
    lines = text.splitlines()
    blank = next((i for i, line in enumerate(lines) if not line.strip()), None)
    if blank is not None:
        raise UserError(f"{where}: line {blank + 1} is empty — one text per line, none empty")
    return lines


def read_texts(texts: list[str], file: Optional[str], stdin: TextIO) -> list[str]:
    if texts and file:
        raise UserError("give texts as arguments or with --file, not both")
    if texts:
        empty = next((i for i, t in enumerate(texts) if not t.strip()), None)
        if empty is not None:
            raise UserError(f"TEXT argument {empty + 1} is empty — every text needs at least one character")
        return list(texts)
    if file:
        path = Path(file)
        try:
            with open(path, encoding="utf-8") as f:
                lines = _lines(f, f"--file {path}")
        except FileNotFoundError:
            raise UserError(f"--file {path}: no such file") from None
        except IsADirectoryError:
            raise UserError(f"--file {path}: is a folder, not a file") from None
        if not lines:
            raise UserError(f"--file {path}: no texts in it")
        return lines
    if stdin.isatty():
        raise UserError("no texts — give them as arguments, with --file, or one per line on stdin")
    lines = _lines(stdin, "stdin")
    if not lines:
        raise UserError("stdin: no texts in it")
    return lines


def run_predict(artifact: str, texts: list[str], file: Optional[str], batch_size: int, threads: int,
                stdin: TextIO = sys.stdin, stdout: TextIO = sys.stdout) -> int:
    manifest = verify(artifact)  # before reading stdin, so a bad artefact fails fast
    if (manifest.get("tokenizer") or {}).get("text_pair"):
        raise UserError(f"{artifact}: this model classifies pairs of texts; predict takes single texts")
    inputs = read_texts(texts, file, stdin)
    model = load(artifact, threads, verified=manifest)
    for start in range(0, len(inputs), 4096):  # a bounded chunk at a time keeps memory flat on big files
        for row in model.predict(inputs[start:start + 4096], batch_size):
            stdout.write(json.dumps(row, ensure_ascii=False) + "\n")
    stdout.flush()
    return EXIT_OK
