"""The command line: `shrinkwrap COMMAND ...`. Each command is a module beside this one with `add(sub)`,
which builds its parser, and `main(args)`, which runs it; this module assembles them and maps every outcome
to an exit code (shrinkwrap.serve.errors): 0 ok, 1 a budget failed, 2 bad input, 3 a step could not produce
an acceptable result, 4 an internal error (a bug), 130 interrupted.
"""
from __future__ import annotations

import os
import sys
import tempfile
import time
import traceback
import warnings
from pathlib import Path

from shrinkwrap import __version__
from shrinkwrap.cli import bench, gate, package, predict, report, run, search, serve
from shrinkwrap.cli.options import Parser
from shrinkwrap.serve.errors import EXIT_INPUT, EXIT_INTERNAL, EXIT_INTERRUPTED, StepFailed, UserError

COMMANDS = (run, search, gate, report, bench, predict, package, serve)


def build_parser() -> Parser:
    p = Parser(prog="shrinkwrap", description="Shrink a fine-tuned BERT-family text classifier for CPU "
               "serving, measuring what every step costs and buys. Exit codes: 0 ok, 1 a budget failed, 2 bad "
               "input, 3 a step could not produce an acceptable result, 4 an internal error, 130 interrupted.")
    p.add_argument("--version", action="version", version=f"shrinkwrap {__version__}")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for command in COMMANDS:
        command.add(sub)
    return p


def _write_traceback() -> Path | None:
    """The current exception's traceback in a file of its own (the console gets one line); None if it
    cannot be written."""
    name = f"shrinkwrap-traceback-{time.strftime('%Y%m%d-%H%M%S')}-{os.getpid()}.txt"
    path = Path(tempfile.gettempdir()) / name
    try:
        path.write_text(f"shrinkwrap {__version__}, {' '.join(sys.argv)}\n\n{traceback.format_exc()}",
                        encoding="utf-8")
    except OSError:
        return None
    return path


def _where(e: BaseException) -> str:
    """file:line of the innermost frame in shrinkwrap's own code (else the innermost frame)."""
    frames = traceback.extract_tb(e.__traceback__)
    ours = [f for f in frames if f"{os.sep}shrinkwrap{os.sep}" in f.filename]
    frame = (ours or frames or [None])[-1]
    if frame is None:
        return "?"
    name = frame.filename.split(f"{os.sep}shrinkwrap{os.sep}", 1)[-1]
    return f"{'shrinkwrap/' + name if ours else name}:{frame.lineno}"


def _notice(message, category, filename, lineno, file=None, line=None):
    """shrinkwrap's own notices (UserWarnings, which the Python API leaves as warnings) as plain `note:` lines:
    each names its file and place itself; Python's warning line would add a source path and line of ours."""
    if issubclass(category, UserWarning) and f"{os.sep}shrinkwrap{os.sep}" in filename:
        print(f"note: {message}", file=file or sys.stderr, flush=True)
    else:
        _show_warning(message, category, filename, lineno, file, line)


_show_warning = warnings.showwarning


def main(argv: list[str] | None = None) -> int:
    os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
    try:
        args = build_parser().parse_args(argv)
    except SystemExit as e:  # a bad option (exit 2, one line), --help or --version (0): returned like any outcome
        return e.code if isinstance(e.code, int) else EXIT_INPUT
    warnings.showwarning = _notice
    try:
        return _run(args)
    finally:
        warnings.showwarning = _show_warning


def _run(args) -> int:
    try:
        return args.func(args)
    except UserError as e:
        print(f"error: {e}", file=sys.stderr)
        return e.exit_code
    except StepFailed as e:
        print(f"step failed: {e}", file=sys.stderr)
        return e.exit_code
    except KeyboardInterrupt:
        print("interrupted: finished steps are kept; run the same command again to resume", file=sys.stderr)
        return EXIT_INTERRUPTED
    except Exception as e:  # a bug: one line, and the traceback a maintainer needs in a file
        path = _write_traceback()
        summary = " ".join(str(e).split())[:300]
        where = f"internal error: {type(e).__name__}{': ' + summary if summary else ''} (at {_where(e)})"
        if path is None:
            traceback.print_exc()
            print(f"{where} — please report it with the traceback above", file=sys.stderr)
        else:
            print(f"{where} — traceback written to {path}; please report it with that file", file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":
    raise SystemExit(main())
