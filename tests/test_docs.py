"""The README documents what the code does: every recipe key, every command."""
from pathlib import Path

from shrinkwrap.cli.docs import with_key_table
from shrinkwrap.recipe.keys import key_paths

README = Path(__file__).resolve().parents[1] / "README.md"


def test_readme_key_table_is_current():
    text = README.read_text(encoding="utf-8")
    assert with_key_table(text) == text, "run: python -m shrinkwrap.cli.docs --write-readme README.md"
    for path in key_paths():
        assert f"`{path}`" in text


def test_readme_describes_every_command():
    from shrinkwrap.cli import build_parser

    parser = build_parser()
    commands = next(a for a in parser._actions if a.dest == "command").choices
    text = README.read_text(encoding="utf-8")
    for name in commands:
        assert f"### `shrinkwrap {name}" in text, name


def test_every_recipe_key_has_a_description():
    missing = [path for path, info in key_paths().items() if not info.description]
    assert not missing, missing


def test_readme_option_tables_are_current():
    """Every command's usage line and options in README.md are the parser's own (regenerate with
    python -m shrinkwrap.cli.docs --write-readme README.md)."""
    from shrinkwrap.cli.docs import commands, marks, with_option_blocks

    text = README.read_text(encoding="utf-8")
    for name in commands():
        begin, end = marks(name)
        assert begin in text and end in text, f"README.md has no options block for {name}"
    assert with_option_blocks(text) == text, "run: python -m shrinkwrap.cli.docs --write-readme README.md"
