"""The candidates of `shrinkwrap search`: a recipe's `search:` section (key paths -> lists of values)
checked before anything runs, and each combination of values turned into a recipe of its own.

A candidate is the recipe with its settings applied, the way `--set` applies a value, so that every
rule a recipe key has holds for a candidate too and its error reads like any other recipe error.
"""
from __future__ import annotations

import copy
import itertools
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from shrinkwrap.recipe.keys import key_paths
from shrinkwrap.recipe.schema import Recipe, validate_recipe
from shrinkwrap.recipe.yaml_io import apply_overrides, read_yaml_mapping
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.fingerprint import sha256_json

# Sections a candidate may not change, and why: every candidate shares one teacher, fine-tuned once,
# its outputs computed once, and is timed at one shape against one budget.
REFUSED = {"data": "the data", "teacher": "the teacher", "train": "the teacher's training",
           "bench": "the shape every candidate is timed at", "budget": "the budget every candidate is held to",
           "search": "the search itself", "name": "the run's name"}
# The pruning amounts switch the pruning step on: `prune.neurons_removed_share: [0.0, 0.5]` means
# "unpruned, and half the neurons removed", without a separate prune.enabled list.
PRUNE_AMOUNTS = ("prune.heads_removed", "prune.neurons_removed_share")


@dataclass
class Candidate:
    index: int
    settings: dict[str, Any]     # key path -> value, in the order of the search section
    recipe: Recipe

    @property
    def folder_name(self) -> str:
        """Stable across reruns and edits of other lists: the settings' own hash."""
        return "c-" + sha256_json(self.settings)[:10]

    def label(self) -> str:
        return "{" + ", ".join(f"{k}: {json.dumps(v)}" for k, v in self.settings.items()) + "}"


@dataclass
class Space:
    recipe: Recipe               # the recipe as written (with --set), its search section included
    candidates: list[Candidate]


def _check_key(key: str, values: Any, where: str) -> None:
    head = key.split(".")[0]
    if head in REFUSED:
        raise UserError(f"{where}: search.{key} — a search cannot change {REFUSED[head]}: every candidate shares "
                        f"one teacher, fine-tuned once on one data set, and one timing shape and budget")
    leaves = key_paths()
    if key not in leaves:
        section = key.rsplit(".", 1)[0] if "." in key else ""
        near = [k for k in leaves if k.startswith(section + ".") and k.split(".")[0] not in REFUSED] if section else []
        allowed = near or [k for k in leaves if k.split(".")[0] not in REFUSED]
        raise UserError(f"{where}: search.{key} — not a recipe key; keys a search may set"
                        + (f" in {section}" if near else "") + f": {', '.join(allowed)}")
    if not isinstance(values, list):
        raise UserError(f"{where}: search.{key} = {json.dumps(values)} — expected a list of the values to try")
    if not values:
        raise UserError(f"{where}: search.{key} = [] — an empty list leaves no candidate; give at least one value")
    for i, v in enumerate(values):
        if values.index(v) != i:
            raise UserError(f"{where}: search.{key}[{i}] = {json.dumps(v)} — repeated (it is also [{values.index(v)}])")


def _with_settings(raw: dict, settings: dict[str, Any]) -> dict:
    raw = copy.deepcopy(raw)
    raw.pop("search", None)
    for key, value in settings.items():  # as --set places a value (keys are checked leaf paths)
        *sections, leaf = key.split(".")
        node = raw
        for part in sections:
            if not isinstance(node.get(part), dict):
                node[part] = {}
            node = node[part]
        node[leaf] = copy.deepcopy(value)
    if any(k in settings for k in PRUNE_AMOUNTS) and "prune.enabled" not in settings:
        prune = raw.setdefault("prune", {})
        prune["enabled"] = bool(prune.get("heads_removed", 0) or prune.get("neurons_removed_share", 0.0))
    return raw


def load_search(path: str | Path, overrides: list[str] = ()) -> Space:
    """The recipe at `path` (with `--set` overrides) and its candidates, every one validated — as a
    recipe and against the teacher's config — before anything runs. Raises UserError naming the place."""
    from shrinkwrap.recipe.schema import load_recipe

    path = Path(path)
    where = str(path)
    recipe = load_recipe(path, overrides)
    space = recipe.search.space
    if not space:
        raise UserError(f"{where}: no search: section with key paths to try — e.g. "
                        f"search: {{student.num_layers: [2, 3], student.max_length: [64, 128]}}")
    for key, values in space.items():
        _check_key(key, values, where)
    raw = apply_overrides(read_yaml_mapping(path, "recipe"), list(overrides))
    source = str(path.resolve())
    # Each value on its own first, so that a value a key refuses is named as the search's.
    for key, values in space.items():
        for i, v in enumerate(values):
            validate_recipe(_with_settings(raw, {key: v}), f"{where} (search.{key}[{i}] = {json.dumps(v)})", source)
    candidates = []
    for index, combo in enumerate(itertools.product(*space.values())):
        settings = dict(zip(space, combo))
        label = ", ".join(f"{k}={json.dumps(v)}" for k, v in settings.items())
        candidate = validate_recipe(_with_settings(raw, settings), f"{where} (search candidate {label})", source)
        candidates.append(Candidate(index, settings, candidate))
    if recipe.search.strategy == "halving" and any(c.recipe.student.epochs is None for c in candidates):
        raise UserError(f"{where}: search.strategy = halving doubles the epochs up to student.epochs — set "
                        f"student.epochs (it is left to scale with the data otherwise)")
    _check_against_teacher(recipe, candidates, where)
    return Space(recipe, candidates)


def _check_against_teacher(recipe: Recipe, candidates: list[Candidate], where: str) -> None:
    """Each candidate's student against the teacher's config (layers, length, heads) — what `run`'s
    preflight checks, for every candidate, before the teacher is trained."""
    from shrinkwrap.ml.checks import check_student, teacher_config

    _, config = teacher_config(recipe, where)
    for c in candidates:
        label = ", ".join(f"{k}={json.dumps(v)}" for k, v in c.settings.items())
        check_student(c.recipe, config, f"{where} (search candidate {label})")
