"""README's generated blocks: the recipe's key table and every command's options table, from the schema and the
argument parsers themselves (tests/test_docs.py keeps README in step with them).

    python -m shrinkwrap.cli.docs                          # prints the key table
    python -m shrinkwrap.cli.docs --write-readme README.md # rewrites every block between the markers
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

from shrinkwrap.cli import build_parser
from shrinkwrap.recipe.keys import key_table

README_BEGIN, README_END = "<!-- recipe keys: begin -->", "<!-- recipe keys: end -->"


def with_key_table(readme: str) -> str:
    """README text with the block between the markers replaced by the current key table."""
    head, rest = readme.split(README_BEGIN, 1)
    _, tail = rest.split(README_END, 1)
    return f"{head}{README_BEGIN}\n{key_table()}\n{README_END}{tail}"


def commands() -> dict[str, argparse.ArgumentParser]:
    """Each command's parser, by name."""
    parser = build_parser()
    return next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction)).choices


def options_block(name: str) -> str:
    """One command's usage line and a table of its options, from the argument parser itself."""
    parser = commands()[name]
    usage = " ".join(parser.format_usage().removeprefix("usage: ").split())
    rows = [f"    {usage}", "", "| option | meaning |", "|---|---|"]
    for action in parser._actions:
        if action.help == argparse.SUPPRESS or isinstance(action, argparse._HelpAction):
            continue
        if action.option_strings:
            flags = ", ".join(action.option_strings)
            metavar = "" if action.nargs == 0 else f" {action.metavar or action.dest.upper()}"
            if action.nargs == "+":
                metavar += " ..."
            elif action.nargs == "*":
                metavar = f" [{metavar.strip()} ...]"
            name_cell = f"`{flags}{metavar}`"
        else:
            name_cell = f"`{action.metavar or action.dest.upper()}`"
        text = (action.help or "") % {"default": action.default} if "%(" in (action.help or "") else (action.help or "")
        rows.append(f"| {name_cell} | {text.replace('|', '/')} |")
    return "\n".join(rows)


def marks(name: str) -> tuple[str, str]:
    return f"<!-- options of {name}: begin -->", f"<!-- options of {name}: end -->"


def with_option_blocks(readme: str) -> str:
    """README text with every command's options block (where its markers are) replaced by the current one."""
    for name in commands():
        begin, end = marks(name)
        if begin in readme and end in readme:
            head, rest = readme.split(begin, 1)
            _, tail = rest.split(end, 1)
            readme = f"{head}{begin}\n{options_block(name)}\n{end}{tail}"
    return readme


def main(argv: list[str] | None = None) -> None:
    argv = sys.argv[1:] if argv is None else argv
    if argv[:1] == ["--write-readme"]:
        target = Path(argv[1])
        text = target.read_text(encoding="utf-8")
        target.write_text(with_option_blocks(with_key_table(text)), encoding="utf-8")
    else:
        print(key_table())


if __name__ == "__main__":
    main()
