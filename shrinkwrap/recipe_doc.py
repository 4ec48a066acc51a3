"""The recipe's keys as documentation: the Markdown key table README.md carries (tests/test_docs.py
keeps the two in step).

    python -m shrinkwrap.recipe_doc                          # prints the table
    python -m shrinkwrap.recipe_doc --write-readme README.md # rewrites the block between the markers

"""
from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Any

from pydantic import BaseModel

from shrinkwrap.recipe import Recipe


def key_paths(model: type[BaseModel] = Recipe, prefix: str = "") -> list[tuple[str, Any]]:
    """(dotted key path, field info) of every leaf key of the recipe, in schema order."""
    out = []
    for name, info in model.model_fields.items():
        if info.exclude:
            continue
        ann = info.annotation
        if isinstance(ann, type) and issubclass(ann, BaseModel):
            out += key_paths(ann, f"{prefix}{name}.")
        else:
            out.append((prefix + name, info))
    return out


def key_table() -> str:
    """The recipe's keys as a Markdown table (README.md carries it; a test keeps the two in step)."""
    from pydantic_core import PydanticUndefined

    rows = ["| key | default | meaning |", "|---|---|---|"]
    for path, info in key_paths():
        if info.default is not PydanticUndefined:
            default = json.dumps(info.default)
        elif info.default_factory is not None:
            default = json.dumps(info.default_factory())
        else:
            default = "required"
        rows.append(f"| `{path}` | `{default}` | {(info.description or '').replace('|', '/')} |")
    return "\n".join(rows)


README_BEGIN, README_END = "<!-- recipe keys: begin -->", "<!-- recipe keys: end -->"


def with_key_table(readme: str) -> str:
    """README text with the block between the markers replaced by the current key table."""
    head, rest = readme.split(README_BEGIN, 1)
    _, tail = rest.split(README_END, 1)
    return f"{head}{README_BEGIN}\n{key_table()}\n{README_END}{tail}"


def main(argv: list[str] | None = None) -> None:
    argv = sys.argv[1:] if argv is None else argv
    if argv[:1] == ["--write-readme"]:
        target = Path(argv[1])
        target.write_text(with_key_table(target.read_text(encoding="utf-8")), encoding="utf-8")
    else:
        print(key_table())


if __name__ == "__main__":
    main()
