"""What several commands share: argument types whose errors read like every other bad input, the options more
than one command takes (--set, --signing-key, --trusted-key), and how cautions are printed."""
from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path
from typing import Optional


class Parser(argparse.ArgumentParser):
    """Bad options end like any other bad input: exit 2 and one line naming the command and the option."""

    def error(self, message: str):
        self.exit(2, f"error: {self.prog}: {message} (see {self.prog} --help)\n")


def count(text: str) -> int:
    if not text.isdigit():
        raise argparse.ArgumentTypeError(f"{text!r} — a whole number, 0 or more")
    return int(text)


def positive_int(text: str) -> int:
    if not text.isdigit() or int(text) < 1:
        raise argparse.ArgumentTypeError(f"{text!r} — a whole number, 1 or more")
    return int(text)


def at_least(low: int, high: Optional[int] = None):
    """A whole number in [low, high]: for counts whose floor is not 0 or 1 (timed runs, opsets)."""
    def parse(text: str) -> int:
        if not text.isdigit() or int(text) < low or (high is not None and int(text) > high):
            allowed = f"from {low} to {high}" if high is not None else f"{low} or more"
            raise argparse.ArgumentTypeError(f"{text!r} — a whole number, {allowed}")
        return int(text)
    return parse


def finite(what: str, above_zero: bool = False):
    """A finite number, 0 or more (above 0 with `above_zero`); float() alone takes 'nan', 'inf' and '-1'. `what`
    completes the error: "'-1' — <what>"."""
    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            value = math.nan
        if not math.isfinite(value) or value < 0 or (above_zero and value == 0):
            raise argparse.ArgumentTypeError(f"{text!r} — {what}")
        return value
    return parse


seconds = finite("a finite number of seconds, 0 or more")


def add_min_confidence(p, still: str) -> None:
    """--min-confidence, as predict and serve take it; `still` ends the help ("printed ...", "given ...")."""
    p.add_argument("--min-confidence", type=probability, default=0.0, metavar="P",
                   help=f"abstain below this calibrated top score: such a text gets \"label\": null, its scores "
                        f"still {still}")


def probability(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} — a number from 0 to 1") from None
    if not 0.0 <= value <= 1.0:  # also refuses nan
        raise argparse.ArgumentTypeError(f"{text!r} — a number from 0 to 1")
    return value


def field_bounds(model, name: str, *keys: str) -> tuple:
    """The bounds (`ge`, `le`, ...) a recipe schema field sets, so that an option and the recipe key agree."""
    metadata = model.model_fields[name].metadata
    return tuple(next(getattr(m, k) for m in metadata if getattr(m, k, None) is not None) for k in keys)


# Options renamed since they first shipped: the old name is refused with the new one.
RENAMED_OPTIONS = {"--warmup-time": "--warm-seconds", "--min-time": "--timed-seconds"}


class Renamed(argparse.Action):
    def __init__(self, option_strings, dest, new: str, **kwargs):
        self.new = new
        super().__init__(option_strings, dest, nargs="?", **kwargs)

    def __call__(self, parser, namespace, values, option_string=None):
        parser.error(f"{option_string} is now {self.new}")


def add_set(parser: argparse.ArgumentParser, example: str) -> None:
    parser.add_argument("--set", action="append", default=[], metavar="KEY.PATH=VALUE",
                        help=f"override a recipe key, e.g. {example} (repeatable)")


def add_signing_key(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--signing-key", metavar="PRIVATE.pem",
                        help="Ed25519 private key (PEM) to sign the artifact's manifest with (manifest.sig); an "
                             "encrypted key takes its passphrase from $SHRINKWRAP_SIGNING_PASSPHRASE")


def add_trusted_key(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--trusted-key", metavar="PUBLIC.pem",
                        help="Ed25519 public key (PEM): refuse the artifact unless manifest.sig is its valid "
                             "signature of manifest.json (exit 2)")


def signing_key(args) -> Optional[Path]:
    """--signing-key, loaded once before any work so that a bad key fails before minutes of it."""
    if not args.signing_key:
        return None
    from shrinkwrap.serve.signing import load_private_key

    load_private_key(Path(args.signing_key))
    return Path(args.signing_key)


def print_cautions(lines: list[str]) -> None:
    """After the table, on stderr: what the averages hide, one line each."""
    sys.stdout.flush()
    for line in lines:
        print(f"caution: {line}", file=sys.stderr)
    sys.stderr.flush()


def logger(prefix: str, quiet: bool):
    """Progress lines on stderr as `[prefix] message`, or none."""
    if quiet:
        return lambda message: None
    return lambda message: print(f"[{prefix}] {message}", file=sys.stderr, flush=True)
