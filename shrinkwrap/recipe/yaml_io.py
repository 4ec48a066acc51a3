"""Reading a YAML mapping, `--set key.path=value` overrides, and a pydantic error as one line that names the
key, the value and what is allowed. Knows no keys: recipe.py (the recipe and budget schemas) calls it."""
from __future__ import annotations

import difflib
import json
from pathlib import Path
from typing import Any, Optional

import yaml

from shrinkwrap.serve.errors import UserError


def printable(text: str) -> str:
    """One printable line: a newline or control character from a key, a value or a YAML parser's message is
    shown escaped, so an error stays one line whatever the user typed."""
    return "".join(c if c.isprintable() else repr(c)[1:-1] for c in " ".join(text.split("\n")))


def key_path(loc: tuple) -> str:
    """A pydantic error location as the user writes it: student.layers[2]."""
    out = ""
    for part in loc:
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
    return out


def _dig(data: Any, loc: tuple) -> Any:
    for part in loc:
        try:
            data = data[part]
        except (KeyError, IndexError, TypeError):
            return None
    return data


def error_loc(err: dict) -> tuple:
    return tuple(p for p in err["loc"] if not (isinstance(p, str) and p.startswith("function-")))


def explain(err: dict, raw: dict, where: str, root: Any, renamed: dict[str, str],
            lines: Optional[dict[tuple, int]] = None) -> str:
    """A pydantic error as one printable line: the place (with its line in the file, from `lines`: key path ->
    line number), the value and what is allowed (`root`: the model validated; `renamed`: old key path -> new,
    for a key that was renamed since it shipped)."""
    return printable(_explain_raw(err, raw, where, root, renamed, lines or {}))


def _explain_raw(err: dict, raw: dict, where: str, root: Any, renamed: dict[str, str], lines: dict[tuple, int]) -> str:
    loc = error_loc(err)
    place = key_path(loc) or "(top level)"
    kind = err["type"]
    msg = err["msg"].removeprefix("Value error, ")
    line = next((f" (line {lines[loc[:n]]})" for n in range(len(loc), 0, -1) if loc[:n] in lines), "")
    if kind == "extra_forbidden":
        parent = key_path(loc[:-1])
        if place in renamed:
            return f"{where}: {place} is now {renamed[place]} — rename the key{line}"
        model: Any = root
        for part in loc[:-1]:
            model = model.model_fields[part].annotation if isinstance(part, str) else model
        keys = [k for k, f in model.model_fields.items() if not f.exclude] if hasattr(model, "model_fields") else []
        near = difflib.get_close_matches(str(loc[-1]), keys, n=1)
        guess = f" — did you mean {key_path((*loc[:-1], near[0]))}?" if near else ""
        return (f"{where}: unknown key {place!s}{line}{guess}"
                + (f" — allowed keys in {parent or 'the top level'}: {', '.join(keys)}" if keys else ""))
    if kind == "missing":
        return f"{where}: {place}{line} is missing — it is required"
    value = _dig(raw, loc)
    if not loc or isinstance(value, dict):  # a rule across several keys: its message names them
        return f"{where}: {place + ' — ' if loc else ''}{msg}{line}"
    return f"{where}: {place} = {json.dumps(value) if value is not None else 'null'}{line} — {msg}"


def parse_override(text: str) -> tuple[list[str], Any]:
    if "=" not in text:
        raise UserError(printable(f"--set {text} — expected key.path=value"))
    key, value = text.split("=", 1)
    if not key or any(not p for p in key.split(".")):
        raise UserError(printable(f"--set {text} — expected key.path=value"))
    try:
        return key.split("."), yaml.safe_load(value) if value != "" else ""
    except yaml.YAMLError as e:
        problem = " ".join(str(getattr(e, "problem", None) or e).split())
        raise UserError(printable(f"--set {text} — the value is not valid YAML ({problem})")) from None


def apply_overrides(raw: dict, overrides: list[str]) -> dict:
    for text in overrides:
        path, value = parse_override(text)
        node = raw
        for part in path[:-1]:
            if not isinstance(node.get(part, {}), dict):
                raise UserError(printable(f"--set {text} — {part} is not a section"))
            node = node.setdefault(part, {})
        node[path[-1]] = value
    return raw


def key_lines(path: Path) -> dict[tuple, int]:
    """Key path (as a pydantic error locates it) -> the line it stands on in the YAML file, for errors that
    point there; empty for a file that cannot be read as YAML (read_yaml_mapping says why)."""
    try:
        node = yaml.compose(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, yaml.YAMLError):
        return {}
    out: dict[tuple, int] = {}

    def walk(n, prefix: tuple) -> None:
        if isinstance(n, yaml.MappingNode):
            for key, value in n.value:
                here = (*prefix, key.value)
                out[here] = key.start_mark.line + 1
                walk(value, here)
        elif isinstance(n, yaml.SequenceNode):
            for i, item in enumerate(n.value):
                out[(*prefix, i)] = item.start_mark.line + 1
                walk(item, (*prefix, i))

    walk(node, ())
    return out


def read_yaml_mapping(path: Path, kind: str) -> dict:
    where = str(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise UserError(f"{where}: no such {kind} file")
    except UnicodeDecodeError as e:
        line = path.read_bytes()[:e.start].count(b"\n") + 1
        raise UserError(f"{where}: not UTF-8 text — line {line} (byte {e.start})") from None
    except OSError as e:
        raise UserError(f"{where}: cannot read — {e.strerror}")
    try:
        raw = yaml.safe_load(text)  # safe_load: a file we read can never construct Python objects
    except yaml.YAMLError as e:
        mark = getattr(e, "problem_mark", None)
        line = f" line {mark.line + 1}" if mark else ""
        problem = getattr(e, "problem", None) or str(e).splitlines()[0]
        raise UserError(f"{where}:{line} is not valid YAML — {problem}") from None
    if not isinstance(raw, dict):
        raise UserError(f"{where}: expected a mapping of keys at the top level")
    return raw
