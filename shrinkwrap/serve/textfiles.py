"""UTF-8 text files read line by line, with errors that name the line: the data table check, the
transfer file and `shrinkwrap predict` all read through here.

Standard library only (and shrinkwrap.serve.errors): the torch-free predict path uses it.
"""
from __future__ import annotations

import json
from pathlib import Path
from typing import BinaryIO, Iterable, Iterator, Optional

from shrinkwrap.serve.errors import UserError


def utf8_lines(f: Iterable[bytes], where: str, copy: Optional[BinaryIO] = None) -> Iterator[tuple[int, str]]:
    """(line number, text) of every line of the binary file `f`; a byte that is not UTF-8 stops it with
    one line naming the line. With `copy`, each line's bytes are written there as they are read."""
    for number, raw in enumerate(f, 1):
        if copy is not None:
            copy.write(raw)
        try:
            yield number, raw.decode("utf-8")
        except UnicodeDecodeError as e:
            raise UserError(f"{where}: not UTF-8 text — line {number}, byte {e.start + 1} of the line "
                            f"(0x{raw[e.start]:02x}); save the file as UTF-8") from None


def json_line(line: str, number: int, where: str):
    try:
        return json.loads(line)
    except ValueError as e:
        raise UserError(f"{where}: line {number} is not a JSON object — {e.msg} at column {e.colno}") from None


def check_text_file(path: Path, where: str, lines: bool) -> None:
    """Catches what the table readers report badly: an empty file, a non-UTF-8 byte (pandas reads in
    chunks, so its byte offsets are not the file's), and, with `lines`, a JSON Lines line that does
    not parse."""
    try:
        f = open(path, "rb")
    except OSError as e:
        raise UserError(f"{where}: cannot read — {e.strerror or e}") from None
    with f:
        seen_any = False
        for number, line in utf8_lines(f, where):
            seen_any = seen_any or bool(line.strip())
            if lines and line.strip():
                json_line(line, number, where)
    if not seen_any:
        raise UserError(f"{where}: the file is empty")


def byte_to_line(path: Path, offset: int) -> str:
    """`line L (byte B)` of a byte offset into the file."""
    with open(path, "rb") as f:
        line = f.read(offset).count(b"\n") + 1
    return f"line {line} (byte {offset})"
