"""Every command's options are range-checked at parse time: a bad value is exit 2 and one line on stderr,
before anything is loaded. The table must cover every option that takes a typed value (checked below)."""
from __future__ import annotations

import argparse

import pytest

from shrinkwrap.cli import build_parser, main

POSITIONAL = {"run": ["r.yaml"], "gate": ["results.json"], "report": ["results.json"], "bench": ["m.onnx"],
              "predict": ["art", "t"], "package": ["m", "--out", "o"]}
BAD = {
    ("bench", "--max-length"): ["0", "-5", "x"],
    ("bench", "--batch-size"): ["0", "-1", "1.5"],
    ("bench", "--sequence-length"): ["0", "-3", "long"],
    ("bench", "--threads"): ["0", "two"],
    ("bench", "--warmup"): ["-3", "1.5"],
    ("bench", "--warmup-time"): ["nan", "-1", "inf", "soon"],
    ("bench", "--repeats"): ["2", "0", "-1"],
    ("bench", "--min-time"): ["-1", "nan", "-inf"],
    ("bench", "--eval-batch-size"): ["0", "-2"],
    ("predict", "--batch-size"): ["0", "-1"],
    ("predict", "--threads"): ["-1", "x"],
    ("predict", "--min-confidence"): ["-0.1", "1.5", "nan", "x"],
    ("package", "--max-length"): ["0", "-1"],
    ("package", "--opset"): ["13", "99", "-1", "x"],
    ("package", "--threads"): ["0"],
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


@pytest.mark.parametrize("option,value", [("--repeats", "3"), ("--warmup", "0"), ("--min-time", "0"),
                                          ("--warmup-time", "0.5")])
def test_edge_values_are_accepted(option, value):
    args = build_parser().parse_args(["bench", "m.onnx", option, value])
    assert getattr(args, option[2:].replace("-", "_")) == float(value)
