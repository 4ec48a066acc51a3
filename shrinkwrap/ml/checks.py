"""The recipe's student settings against the teacher's config, before anything runs: layers, length, and what
the teacher's family allows (kept layers, pruning). `shrinkwrap run` checks its recipe here and `shrinkwrap
search` every candidate."""
from __future__ import annotations

from pathlib import Path

from shrinkwrap.recipe.schema import Recipe
from shrinkwrap.serve.errors import UserError


def teacher_config(recipe: Recipe, where: str):
    """(the teacher base's folder, its transformers config), or a UserError naming teacher.base."""
    from transformers import AutoConfig

    from shrinkwrap.ml.models import resolve_base

    base = resolve_base(recipe.teacher.base, where, root=Path(recipe.source).parent if recipe.source else None)
    try:
        return base, AutoConfig.from_pretrained(base, trust_remote_code=recipe.teacher.trust_remote_code)
    except (OSError, ValueError) as e:
        raise UserError(f"{where}: teacher.base = {recipe.teacher.base!r} — cannot load its config "
                        f"({str(e).splitlines()[0]})") from None


def check_student(recipe: Recipe, config, where: str) -> None:
    """The student's settings against the teacher's config: layers, length, pruning."""
    n_layers = getattr(config, "num_hidden_layers", None) or getattr(config, "n_layers", None)
    layers = recipe.student.layers
    if layers is not None and n_layers is not None and max(layers) >= n_layers:
        bad = next(i for i, v in enumerate(layers) if v >= n_layers)
        raise UserError(f"{where}: student.layers[{bad}] = {layers[bad]} — the teacher has {n_layers} layers "
                        f"(0–{n_layers - 1})")
    if layers is None and n_layers is not None and recipe.student.num_layers > n_layers:
        raise UserError(f"{where}: student.num_layers = {recipe.student.num_layers} — the teacher has {n_layers} layers")
    max_pos = getattr(config, "max_position_embeddings", None)
    if max_pos and recipe.teacher.max_length > max_pos:
        raise UserError(f"{where}: teacher.max_length = {recipe.teacher.max_length} — the model takes at most {max_pos} tokens")
    student_length = recipe.student.max_length
    if student_length is not None and student_length > recipe.teacher.max_length:
        raise UserError(f"{where}: student.max_length = {student_length} — at most teacher.max_length "
                        f"({recipe.teacher.max_length}): the teacher's outputs the student learns from are computed "
                        f"on texts cut there")
    if recipe.student.init == "teacher_layers":
        from shrinkwrap.ml.models import evenly_spaced
        from shrinkwrap.ml.tasks import of_recipe

        kept = layers or (evenly_spaced(n_layers, recipe.student.num_layers) if n_layers else None)
        check_layers(config, where, kept, "student.layers" if layers else "student.num_layers", of_recipe(recipe))
    from shrinkwrap.ml.pruning import check_prune

    check_prune(recipe, config, where)


def check_layers(config, where: str, kept: list[int] | None = None, key: str = "student.layers",
                 task=None) -> None:
    """Refuses, before anything runs, student.init: teacher_layers for a family whose layers cannot be
    kept one by one: no list of layers found, or one layer's weights shared across depth (ALBERT); and `kept`
    layers (the recipe's `key` chose them) that a student could not hold with their own attention kinds
    (ModernBERT's global and sliding-window layers). `task`: the recipe's (shrinkwrap.ml.tasks; default
    classification)."""
    from shrinkwrap.ml import classification
    from shrinkwrap.ml.models import encoder_layers, evenly_spaced, global_attention_period

    family = getattr(config, "model_type", "?")
    if getattr(config, "num_hidden_groups", None) is not None:  # ALBERT: every layer runs the same weights
        raise UserError(f"{where}: student.init = teacher_layers — a {family!r} model shares one layer's weights "
                        f"across its depth, so step student cannot keep some of its layers; use init: pretrained or config")
    try:
        model = (task or classification).empty(config)
    except (ValueError, KeyError):
        return  # not a classifier family transformers knows: loading the teacher reports it
    try:
        encoder_layers(model)
    except UserError:
        raise UserError(f"{where}: student.init = teacher_layers — step student finds no list of layers in a "
                        f"{family!r} model to keep some of; use init: pretrained or config") from None
    if not kept:
        return
    try:
        global_attention_period(config, kept)
    except ValueError as e:
        every, n = config.global_attn_every_n_layers, config.num_hidden_layers
        globals_ = list(range(0, n, every))
        # Layers that attend globally, spread over the depth; else the teacher's first layers, its own pattern.
        hint = ([globals_[i] for i in evenly_spaced(len(globals_), len(kept))] if 1 < len(kept) <= len(globals_)
                else list(range(len(kept))))
        value = kept if key == "student.layers" else len(kept)
        raise UserError(f"{where}: {key} = {value} — a {family!r} student of teacher layers {kept} cannot keep each "
                        f"layer's own attention (global every {every} layers, else a {config.local_attention}-token "
                        f"window): {e}; e.g. student.layers: {hint}") from None
