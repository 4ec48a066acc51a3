"""The recipe's keys as dotted paths (`student.num_layers`), read from the schema: what `--set` and a search
may name, and the README's key table (tests/test_docs.py keeps README in step with it)."""
from __future__ import annotations

import json
from typing import Any

from pydantic import BaseModel

from shrinkwrap.recipe.schema import Recipe


def key_paths(model: type[BaseModel] = Recipe, prefix: str = "") -> dict[str, Any]:
    """Dotted key path -> pydantic field info of every leaf key, in schema order."""
    out: dict[str, Any] = {}
    for name, info in model.model_fields.items():
        if info.exclude:
            continue
        ann = info.annotation
        if isinstance(ann, type) and issubclass(ann, BaseModel):
            out |= key_paths(ann, f"{prefix}{name}.")
        else:
            out[prefix + name] = info
    return out


def key_table() -> str:
    """The recipe's keys as a Markdown table: key, default, meaning."""
    from pydantic_core import PydanticUndefined

    rows = ["| key | default | meaning |", "|---|---|---|"]
    for path, info in key_paths().items():
        if info.default is not PydanticUndefined:
            default = json.dumps(info.default)
        elif info.default_factory is not None:
            default = json.dumps(info.default_factory())
        else:
            default = "required"
        rows.append(f"| `{path}` | `{default}` | {(info.description or '').replace('|', '/')} |")
    return "\n".join(rows)
