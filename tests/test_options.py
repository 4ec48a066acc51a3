"""Every command's options are range-checked at parse time: a bad value is exit 2 and one line on stderr,
before anything is loaded. The table must cover every option that takes a typed value (checked below)."""
from __future__ import annotations

import argparse

import pytest

from shrinkwrap.cli import build_parser, main

POSITIONAL = {"run": ["r.yaml"], "gate": ["results.json"], "report": ["results.json"], "bench": ["m.onnx"],
              "predict": ["art", "t"], "package": ["m", "--out", "o"], "serve": ["art"]}
SERVER = {"--workers": ["0", "-1", "two"], "--max-batch": ["0", "1.5"], "--max-wait-ms": ["-1", "nan", "inf", "x"],
          "--max-queue": ["0", "-4"], "--max-body-mb": ["0", "-1", "nan", "big"]}
BAD = {
    ("bench", "--max-length"): ["0", "-5", "x"],
    ("bench", "--batch-size"): ["0", "-1", "1.5"],
    ("bench", "--sequence-length"): ["0", "-3", "long"],
    ("bench", "--threads"): ["0", "two"],
    ("bench", "--warmup"): ["-3", "1.5"],
    ("bench", "--warm-seconds"): ["nan", "-1", "inf", "soon"],
    ("bench", "--repeats"): ["2", "0", "-1"],
    ("bench", "--timed-seconds"): ["-1", "nan", "-inf"],
    ("bench", "--eval-batch-size"): ["0", "-2"],
    ("predict", "--batch-size"): ["0", "-1"],
    ("predict", "--threads"): ["-1", "x"],
    ("predict", "--min-confidence"): ["1.5", "-0.1", "nan", "sure"],
    ("package", "--max-length"): ["0", "-1"],
    ("package", "--opset"): ["13", "99", "-1", "x"],
    ("package", "--threads"): ["0"],
    ("bench", "--load"): ["0", "-5", "nan", "fast"],
    ("bench", "--load-seconds"): ["-1", "nan"],
    ("bench", "--max-p95-ms"): ["-1", "inf", "x"],
    ("bench", "--load-minutes"): ["-1", "nan"],
    ("serve", "--port"): ["-1", "65536", "http"],
    ("serve", "--threads"): ["0", "x"],
    ("serve", "--min-confidence"): ["2", "nan"],
    **{(command, option): values for command in ("bench", "serve") for option, values in SERVER.items()},
}


def _typed_options():
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    for name, p in sub.choices.items():
        for action in p._actions:
            if action.option_strings and action.type is not None:
                yield name, action.option_strings[0]


def test_the_table_covers_every_typed_option():
    assert set(_typed_options()) <= set(BAD), set(_typed_options()) - set(BAD)


@pytest.mark.parametrize("command,option,value", [(c, o, v) for (c, o), vs in BAD.items() for v in vs])
def test_bad_value_is_exit_2_and_one_line(command, option, value, capsys):
    argv = [command, *POSITIONAL[command], f"{option}={value}"]
    assert main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and option in err[0] and value in err[0], err
    assert "Traceback" not in err[0]


@pytest.mark.parametrize("option,value", [("--repeats", "3"), ("--warmup", "0"), ("--timed-seconds", "0"),
                                          ("--warm-seconds", "0.5")])
def test_edge_values_are_accepted(option, value):
    args = build_parser().parse_args(["bench", "m.onnx", option, value])
    assert getattr(args, option[2:].replace("-", "_")) == float(value)
