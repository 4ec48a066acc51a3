"""`shrinkwrap predict ARTIFACT [TEXT ...]`: JSON lines {"text", "label", "scores"} from a classifier artifact
(with "text_pair" for a model that classifies pairs of texts), {"text", "embedding"} from a sentence encoder's, or
with --npy FILE the encoder's vectors as one float32 matrix, a row per text in input order.

Scores are calibrated: the softmax of the logits divided by the temperature the manifest records.
With --min-confidence P, a text whose top score is below P gets "label": null.

Texts come from the arguments, from --file (one per line; JSON lines for .jsonl, a table for .csv/.tsv),
or from stdin (one per line; JSON lines for a pair model). All input
is read and checked before the first line is printed, so a bad line never leaves half an output;
then it is classified a chunk at a time, so a file of millions of lines runs in flat memory.
Torch-free like shrinkwrap.serve.artifact: this path must run in a slim image.
"""
from __future__ import annotations

import json
import sys
import tempfile
from pathlib import Path
from typing import BinaryIO, Iterator, Optional, TextIO

from shrinkwrap.serve import tasks
from shrinkwrap.serve.artifact import load, verify
from shrinkwrap.serve.errors import EXIT_OK, UserError
from shrinkwrap.serve.quantization import batch_note
from shrinkwrap.serve.textfiles import json_line, utf8_lines

CHUNK = 4096  # texts classified and written at a time: memory stays flat on a file of millions of lines
PAIR_HELP = ('give --file with JSON lines {"text": ..., "text_pair": ...} (.jsonl), a .csv/.tsv with --text '
             'and --text-pair columns, or JSON lines on stdin')


def file_kind(path: Path) -> str:
    """How a --file is read: JSON lines (.jsonl, .ndjson), a table (.csv, .tsv), else one text per line."""
    suffix = path.suffix.lower()
    return {".jsonl": "jsonl", ".ndjson": "jsonl", ".csv": "csv", ".tsv": "tsv"}.get(suffix, "lines")


def _records(stream: BinaryIO, kind: str, where: str, text_col: str, pair_col: str,
             copy: Optional[BinaryIO] = None, id_col: Optional[str] = None) -> Iterator[tuple]:
    """(place, text, text pair or None, id or None) of every input in the stream; `place` names it in errors;
    the id is the value of `id_col`, passed through to the output."""
    if kind in ("csv", "tsv"):
        yield from _table_records(stream, kind, where, text_col, pair_col, id_col)
        return
    raw = (line.encode("utf-8") if isinstance(line, str) else line for line in stream)
    for number, line in utf8_lines(raw, where, copy):
        if not line.strip():
            raise UserError(f"{where}: line {number} is empty — one text per line, none empty")
        if kind == "lines":
            yield f"line {number}", line.rstrip("\r\n"), None, None
            continue
        obj = json_line(line, number, where) if line.lstrip().startswith("{") else None
        if not isinstance(obj, dict):
            raise UserError(f"{where}: line {number} is not a JSON object — expected {{\"{text_col}\": ..., "
                            f"\"{pair_col}\": ...}} on each line")
        text, pair = obj.get(text_col), obj.get(pair_col)
        for key, value in ((text_col, text), (pair_col, pair)):
            if value is not None and not isinstance(value, str):
                raise UserError(f"{where}: line {number}: {key!r} is {type(value).__name__} — expected a string")
        if text is None:
            raise UserError(f"{where}: line {number} has no {text_col!r} — keys: {', '.join(map(repr, obj)) or 'none'}")
        if id_col is not None and id_col not in obj:
            raise UserError(f"{where}: line {number} has no {id_col!r} (--id) — keys: {', '.join(map(repr, obj))}")
        yield f"line {number}", text, pair, (obj[id_col] if id_col is not None else None)


def _table_records(stream: BinaryIO, kind: str, where: str, text_col: str, pair_col: str, id_col: Optional[str]):
    import csv
    import io

    reader = csv.reader(io.TextIOWrapper(stream, encoding="utf-8", newline=""),
                        delimiter="\t" if kind == "tsv" else ",")
    try:
        header = next(reader, None)
        if header is None:
            return
        if text_col not in header:
            raise UserError(f"{where}: --text {text_col!r} is not a column — columns: {', '.join(header)}")
        t, p = header.index(text_col), header.index(pair_col) if pair_col in header else None
        if id_col is not None and id_col not in header:
            raise UserError(f"{where}: --id {id_col!r} is not a column — columns: {', '.join(header)}")
        k = header.index(id_col) if id_col is not None else None
        for row in reader:
            if not row:
                continue
            place = f"row {reader.line_num - 1} (line {reader.line_num})"
            if len(row) != len(header):
                raise UserError(f"{where}: {place} has {len(row)} fields where the header has {len(header)}")
            yield place, row[t], (row[p] if p is not None else None), (row[k] if k is not None else None)
    except UnicodeDecodeError as e:
        raise UserError(f"{where}: not UTF-8 text — after row {reader.line_num - 1} (byte {e.start} of a "
                        f"read block); save the file as UTF-8") from None
    except csv.Error as e:
        raise UserError(f"{where}: cannot parse line {reader.line_num} — {e}") from None


def _checked(records, where: str, pairs: bool) -> Iterator[tuple]:
    """The records' (text, pair, id), each checked: a text and, for a pair model, a second text; none for a
    single-text model. One line naming the place otherwise."""
    for place, text, pair, ident in records:
        if not text.strip():
            raise UserError(f"{where + ': ' if where else ''}{place} is empty — every text needs at least one character")
        if pairs and (pair is None or not pair.strip()):
            raise UserError(f"{where}: {place} is a single text (no text_pair), but this model classifies pairs "
                            f"of texts — {PAIR_HELP}")
        if not pairs and pair is not None and pair.strip():
            raise UserError(f"{where}: {place} gives a text_pair, but this model classifies single texts")
        yield text, (pair if pairs else None), ident


def _chunked(items: Iterator[tuple]) -> Iterator[list[tuple]]:
    chunk: list = []
    for item in items:
        chunk.append(item)
        if len(chunk) == CHUNK:
            yield chunk
            chunk = []
    if chunk:
        yield chunk


# Fields predict prints for a text: an id column passed through with --id may not take one of their names.
OUTPUT_FIELDS = ("text", "text_pair", "label", "scores", "truncated")


def read_inputs(texts: list[str], file: Optional[str], stdin, pairs: bool = False, text_col: str = "text",
                pair_col: str = "text_pair", id_col: Optional[str] = None) -> Iterator[list[tuple]]:
    """Checks every input first (so that a bad line never leaves half an output), then returns an iterator
    over (text, pair, id) in chunks of CHUNK (pair None for a single-text model; id the value of `id_col`, else
    None). A file is read twice; stdin is copied to a temporary file as it is checked. Neither is held in memory
    whole. Stdin holds one text per line, or JSON lines for a pair model."""
    if texts and file:
        raise UserError("give texts as arguments or with --file, not both")
    if id_col is not None and (not file or file_kind(Path(file)) == "lines"):
        raise UserError(f"--id {id_col}: ids come from a column of --file, a .csv/.tsv table or JSON lines (.jsonl)")
    if id_col in OUTPUT_FIELDS:
        raise UserError(f"--id {id_col}: a field predict prints has that name ({', '.join(OUTPUT_FIELDS)}) — "
                        f"rename the column")
    if texts:
        if pairs:
            raise UserError(f"TEXT argument 1 is a single text, but this model classifies pairs of texts — {PAIR_HELP}")
        records = [(f"TEXT argument {i + 1}", t, None, None) for i, t in enumerate(texts)]
        checked = list(_checked(iter(records), "", False))
        return iter([checked[i:i + CHUNK] for i in range(0, len(checked), CHUNK)])
    if file:
        path = Path(file)
        kind, where = file_kind(path), f"--file {path}"

        def passes():
            with open(path, "rb") as f:
                yield from _checked(_records(f, kind, where, text_col, pair_col, id_col=id_col), where, pairs)
        try:
            count = sum(1 for _ in passes())
        except FileNotFoundError:
            raise UserError(f"{where}: no such file") from None
        except IsADirectoryError:
            raise UserError(f"{where}: is a folder, not a file") from None
        if not count:
            raise UserError(f"{where}: no texts in it")
        return _chunked(passes())
    if stdin.isatty():
        raise UserError("no texts — give them as arguments, with --file, or one per line on stdin")
    kind = "jsonl" if pairs else "lines"
    spool = tempfile.TemporaryFile()
    try:
        count = sum(1 for _ in _checked(_records(getattr(stdin, "buffer", stdin), kind, "stdin", text_col, pair_col,
                                                 copy=spool), "stdin", pairs))
    except BaseException:
        spool.close()
        raise
    if not count:
        spool.close()
        raise UserError("stdin: no texts in it")
    spool.seek(0)

    def from_spool():
        with spool:
            yield from _chunked(_checked(_records(spool, kind, "stdin", text_col, pair_col), "stdin", pairs))
    return from_spool()


def write_vectors(path: Path, chunks: Iterator[list[tuple]], model, batch_size: int) -> int:
    """path (.npy): the artifact's vectors of every text, float32, one row per text in input order. Written a chunk
    at a time to a scratch file beside it and renamed into place once whole: memory stays flat, and a failure
    leaves no half-written matrix. Returns the number of rows."""
    import os

    import numpy as np

    width = model.task.width(model.info)
    raw = path.with_name(f".{path.name}.rows")
    scratch = path.with_name(f".{path.name}.partial")
    rows = 0
    try:
        with open(raw, "wb") as f:
            for chunk in chunks:
                vectors = np.ascontiguousarray(model.outputs([t for t, _, _ in chunk], batch_size), dtype=np.float32)
                f.write(vectors.tobytes())
                rows += len(vectors)
        out = np.lib.format.open_memmap(scratch, "w+", np.float32, (rows, width))
        if rows:
            src = np.memmap(raw, np.float32, "r", shape=(rows, width))
            for start in range(0, rows, CHUNK):
                out[start:start + CHUNK] = src[start:start + CHUNK]
            del src
        out.flush()
        del out
        os.replace(scratch, path)
    except OSError as e:
        raise UserError(f"--npy {path}: cannot write — {e.strerror or e}") from None
    finally:
        for leftover in (raw, scratch):
            leftover.unlink(missing_ok=True)
    return rows


def run_predict(artifact: str, texts: list[str], file: Optional[str], batch_size: int, threads: int,
                stdin: Optional[TextIO] = None, stdout: Optional[TextIO] = None, trusted_key: Optional[Path] = None,
                min_confidence: float = 0.0, text_col: str = "text", pair_col: Optional[str] = None,
                id_col: Optional[str] = None, npy: Optional[Path] = None) -> int:
    stdin, stdout = stdin or sys.stdin, stdout or sys.stdout  # looked up per call: a caller may have swapped them
    if trusted_key is not None:  # the signature vouches for the manifest, whose hashes vouch for the rest
        from shrinkwrap.serve.signing import check_signature

        check_signature(Path(artifact), trusted_key)
    manifest = verify(artifact)  # before reading stdin, so a bad artifact fails fast
    pairs = bool((manifest.get("tokenizer") or {}).get("text_pair"))
    if pair_col is not None and not pairs:
        raise UserError(f"--text-pair {pair_col}: this model classifies single texts, not pairs")
    if npy is not None:
        npy = Path(npy)
        if manifest.get("task") != "embedding":
            raise UserError(f"--npy {npy}: this artifact is a classifier — --npy writes a sentence encoder's vectors")
        if id_col is not None:
            raise UserError(f"--id {id_col}: the --npy matrix has no ids — its row k is input k")
        if npy.suffix != ".npy" or npy.is_dir() or not npy.parent.is_dir():
            raise UserError(f"--npy {npy}: expected a .npy file in an existing folder")
    tasks.check_min_confidence(manifest, min_confidence, artifact)
    chunks = read_inputs(texts, file, stdin, pairs, text_col, pair_col or "text_pair", id_col)
    model = load(artifact, threads, verified=manifest)
    if model.batch_dependent:
        print(batch_note(artifact, list(model.batch_dependent)), file=sys.stderr, flush=True)
    if npy is not None:
        rows = write_vectors(npy, chunks, model, batch_size)
        print(f"wrote {npy}: {rows} × {model.task.width(model.info)} float32", file=sys.stderr, flush=True)
        return EXIT_OK
    for chunk in chunks:
        batch_texts = [t for t, _, _ in chunk]
        batch_pairs = [p for _, p, _ in chunk] if pairs else None
        for (_, _, ident), row in zip(chunk, model.predict(batch_texts, batch_size, min_confidence, pairs=batch_pairs)):
            row = {id_col: ident, **row} if id_col is not None else row  # the id first: what a join reads
            stdout.write(json.dumps(row, ensure_ascii=False) + "\n")
    stdout.flush()
    return EXIT_OK
