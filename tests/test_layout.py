"""The house's rules, read from the code with `ast` (imports inside functions included): arrows between
modules and between sub-packages point down only, a step never imports another step, the serving side imports
nothing beyond itself and the plain install, no module takes another's private names, none is over 400 lines,
the sub-packages stack in at most 10 floors, and only outputs/results.py indexes results.json.

Each rule is a function over {module name: source}, so that the tests below also feed it a tree broken on
purpose and see it caught."""
from __future__ import annotations

import ast
import re
import sys
import tomllib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "shrinkwrap"
MAX_LINES = 400
MAX_FLOORS = 10


def read_tree() -> dict[str, str]:
    """{dotted module name: source} of every module of the package (a package's __init__ as the package)."""
    out = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        parts = path.relative_to(ROOT).with_suffix("").parts
        name = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
        out[name] = path.read_text(encoding="utf-8")
    return out


def imports(tree: dict[str, str]) -> dict[str, set[tuple[str, str]]]:
    """Module -> {(imported module or external top-level name, the names taken)}: every import statement,
    at any depth. `from shrinkwrap.ml import distributed` is an import of shrinkwrap.ml.distributed."""
    out: dict[str, set[tuple[str, str]]] = {}
    for name, source in tree.items():
        found: set[tuple[str, str]] = set()
        for node in ast.walk(ast.parse(source)):
            if isinstance(node, ast.Import):
                found |= {(a.name, "") for a in node.names}
            elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
                for a in node.names:
                    sub = f"{node.module}.{a.name}"
                    found.add((sub, "") if sub in tree else (node.module, a.name))
        out[name] = found
    return out


def internal_edges(tree: dict[str, str]) -> dict[str, set[str]]:
    edges = {}
    for name, found in imports(tree).items():
        edges[name] = {m for m, _ in found if m in tree and m != name}
    return edges


def group(module: str) -> str:
    """The room a module stands in: its sub-package (shrinkwrap.ml), or itself for a top-level module."""
    parts = module.split(".")
    return ".".join(parts[:2])


def cycles(edges: dict[str, set[str]]) -> list[list[str]]:
    """Every strongly connected set of more than one node (Tarjan's algorithm)."""
    index, low, stack, on, found = {}, {}, [], set(), []

    def visit(v):
        index[v] = low[v] = len(index)
        stack.append(v)
        on.add(v)
        for w in edges.get(v, ()):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                found.append(sorted(comp))

    sys.setrecursionlimit(max(10_000, sys.getrecursionlimit()))
    for v in list(edges):
        if v not in index:
            visit(v)
    return found


def group_edges(tree: dict[str, str]) -> dict[str, set[str]]:
    out: dict[str, set[str]] = {}
    for a, targets in internal_edges(tree).items():
        out.setdefault(group(a), set())
        for b in targets:
            if group(b) != group(a):
                out[group(a)].add(group(b))
    return out


def floors(edges: dict[str, set[str]]) -> int:
    """Nodes on the longest path down the (acyclic) graph: how many floors the house has."""
    memo: dict[str, int] = {}

    def depth(v):
        if v not in memo:
            memo[v] = 1 + max((depth(w) for w in edges.get(v, ())), default=0)
        return memo[v]

    return max(depth(v) for v in edges)


def plain_install() -> set[str]:
    """Import names of the plain install's own dependencies (pyproject's [project] dependencies)."""
    deps = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["dependencies"]
    names = {d.split(">")[0].split("=")[0].split("<")[0].split("[")[0].strip().replace("-", "_") for d in deps}
    return names | {"yaml"} - {"pyyaml"}  # pyyaml is imported as yaml


def serve_violations(tree: dict[str, str]) -> list[str]:
    allowed = plain_install() | set(sys.stdlib_module_names)
    out = []
    for name, found in imports(tree).items():
        if group(name) != "shrinkwrap.serve":
            continue
        for module, _ in found:
            top = module.split(".")[0]
            if module.startswith("shrinkwrap") and group(module) != "shrinkwrap.serve":
                out.append(f"{name} imports {module}")
            elif top != "shrinkwrap" and top not in allowed and top != "__future__":
                out.append(f"{name} imports {module}, not part of the plain install")
    return out


def step_violations(tree: dict[str, str]) -> list[str]:
    steps = "shrinkwrap.chain.steps"
    return [f"{a} imports {b}" for a, targets in internal_edges(tree).items() if a.startswith(steps + ".")
            for b in targets if b == steps or b.startswith(steps + ".")]


def private_violations(tree: dict[str, str]) -> list[str]:
    return [f"{name} takes {taken} from {module}" for name, found in imports(tree).items()
            for module, taken in found
            if module.startswith("shrinkwrap") and taken.startswith("_") and not taken.startswith("__")]


def long_modules(tree: dict[str, str]) -> list[str]:
    return [f"{name}: {len(src.splitlines())} lines" for name, src in tree.items() if len(src.splitlines()) > MAX_LINES]


# A results dict indexed by a key of results.json's top level (a step's row is read by its own keys).
RESULTS_KEY = re.compile(r"results\w*(\[[\"'](steps|data|recipe|test_labels|recipe_fingerprint|machine|artifact|cautions)"
                         r"[\"']\]|\.get\([\"'](steps|data|recipe|artifact|cautions)[\"'])")


def results_key_violations(tree: dict[str, str]) -> list[str]:
    """results.json's structure is read only through shrinkwrap.outputs.results."""
    return [f"{name} indexes results.json ({m.group(0)})" for name, src in tree.items()
            if name != "shrinkwrap.outputs.results" for m in RESULTS_KEY.finditer(src)]


def test_no_module_imports_itself_back():
    assert cycles(internal_edges(read_tree())) == []


def test_sub_packages_point_down_only_and_stack_in_at_most_ten_floors():
    edges = group_edges(read_tree())
    assert cycles(edges) == []
    assert floors(edges) <= MAX_FLOORS, floors(edges)


def test_the_serving_side_imports_only_itself_and_the_plain_install():
    assert serve_violations(read_tree()) == []


def test_a_step_never_imports_another_step():
    assert step_violations(read_tree()) == []


def test_no_private_name_crosses_a_module():
    assert private_violations(read_tree()) == []


def test_no_module_is_over_400_lines():
    assert long_modules(read_tree()) == []


def test_only_the_results_module_indexes_results_json():
    assert results_key_violations(read_tree()) == []


# ---- the rules catch what they are meant to ---------------------------------------------------------------


def _with(tree: dict[str, str], module: str, line: str) -> dict[str, str]:
    broken = dict(tree)
    broken[module] = tree[module] + "\n\ndef _broken():\n    " + line + "\n"
    return broken


@pytest.mark.parametrize("module, line, rule", [
    # the serving side reaching for the training side, inside a function (where a lazy import would hide it)
    ("shrinkwrap.serve.artifact", "import torch", serve_violations),
    ("shrinkwrap.serve.predict", "from shrinkwrap.ml.classification import load as load_classifier", serve_violations),
    ("shrinkwrap.chain.steps.student", "from shrinkwrap.chain.steps.teacher import run", step_violations),
    ("shrinkwrap.outputs.card", "from shrinkwrap.outputs.classification import _drop_cell", private_violations),
    ("shrinkwrap.search.space", "x = results['steps']", results_key_violations),
])
def test_each_rule_catches_a_tree_broken_on_purpose(module, line, rule):
    tree = read_tree()
    assert rule(tree) == [] and rule(_with(tree, module, line)) != []


def test_an_import_back_up_makes_a_cycle_between_sub_packages():
    tree = _with(read_tree(), "shrinkwrap.outputs.results", "from shrinkwrap.chain.pipeline import run_recipe")
    assert any("shrinkwrap.chain" in c and "shrinkwrap.outputs" in c for c in cycles(group_edges(tree)))
    assert cycles(internal_edges(tree)) != []


def test_a_long_module_is_caught():
    tree = read_tree()
    tree["shrinkwrap.serve.errors"] += "\n" * MAX_LINES
    assert long_modules(tree) == ["shrinkwrap.serve.errors: " + str(len(tree["shrinkwrap.serve.errors"].splitlines())) + " lines"]
