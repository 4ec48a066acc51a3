"""Checks every input of a run before anything is written: the teacher's config and tokenizer, the data,
the student's layers and heads, the transfer texts. Returns the Context the steps are given."""
from __future__ import annotations

import warnings
from pathlib import Path

from shrinkwrap import distributed
from shrinkwrap.context import Context
from shrinkwrap.errors import UserError
from shrinkwrap.fingerprint import tokenizer_fingerprint_of
from shrinkwrap.recipe import TRAINING_ONLY_TEACHER_KEYS, Recipe
from shrinkwrap.rundir import check_out_dir


def prepare(recipe: Recipe, out: Path, quiet: bool = False) -> Context:
    """Loads and checks everything the chain needs. Writes nothing."""
    from shrinkwrap.data import in_label_order, load_dataset
    from shrinkwrap.batches import encode
    from shrinkwrap.models import load_tokenizer

    where = recipe.source or "recipe"
    check_out_dir(out)
    base, config = teacher_config(recipe, where)
    if recipe.teacher.trust_remote_code:
        warnings.warn(f"{where}: teacher.trust_remote_code is on — Python code shipped with {base} will run")
    if recipe.teacher.trained:
        from shrinkwrap import trained

        trained.check_head(Path(base), config, where)
        ignored = trained.unused_keys(recipe.teacher, TRAINING_ONLY_TEACHER_KEYS)
        if ignored and not quiet:
            warnings.warn(f"{where}: teacher.trained is true — the teacher is used as is, so "
                          f"{', '.join('teacher.' + k for k in ignored)} no longer apply")
    check_student(recipe, config, where)
    tokenizer = load_tokenizer(base, where, recipe.teacher.trust_remote_code)
    if recipe.trim_vocab.enabled:
        from shrinkwrap.vocab import check_trim

        check_trim(tokenizer, where, getattr(config, "model_type", None))
    if recipe.augment.copies and "mask" in recipe.augment.transforms and not (tokenizer.mask_token or tokenizer.unk_token):
        raise UserError(f"{where}: augment.transforms lists mask, but the teacher's tokenizer has no mask (or unknown) "
                        f"token to put in a word's place — leave mask out")
    data_path = recipe.resolve(recipe.data.path)
    if not data_path.exists():
        raise UserError(f"{where}: data.path = {recipe.data.path!r} — no such file or folder ({data_path})")
    data = load_dataset(recipe.data, data_path, str(data_path))
    weights = None
    if recipe.teacher.trained:  # the model's own class order: its logit k is the data's class k
        data = in_label_order(data, trained.match_labels(trained.model_labels(config), data.label_names, where))
        weights = trained.weights_fingerprint(Path(base))
    encoded = {s: encode(tokenizer, getattr(data, s), recipe.teacher.max_length, truncation=recipe.data.truncation)
               for s in ("train", "validation", "test")}
    transfer = None
    st = recipe.student
    if st.transfer_path:
        from shrinkwrap import transfer as transfer_file

        if recipe.data.text_pair:
            raise UserError(f"{where}: student.transfer_path goes with single texts, but data.text_pair is set")
        path = recipe.resolve(st.transfer_path)
        transfer = transfer_file.check(path, st.transfer_column or recipe.data.text, str(path))
    if st.init == "pretrained":
        student_tok = load_tokenizer(str(recipe.resolve(st.base)), where)
        if tokenizer_fingerprint_of(student_tok) != tokenizer_fingerprint_of(tokenizer):
            raise UserError(f"{where}: student.base = {st.base!r} — its tokenizer differs from the teacher's "
                            f"(fingerprints {tokenizer_fingerprint_of(student_tok)[:12]} vs "
                            f"{tokenizer_fingerprint_of(tokenizer)[:12]}): a student must read the teacher's tokens")
    if st.attention_weight > 0 and st.init == "config" and st.num_attention_heads not in (None, config.num_attention_heads):
        raise UserError(f"{where}: student.attention_weight needs as many heads as the teacher "
                        f"({config.num_attention_heads}), not student.num_attention_heads = {st.num_attention_heads}")
    return Context(recipe=recipe, run_dir=out, base=base, tokenizer=tokenizer,
                   tokenizer_fp=tokenizer_fingerprint_of(tokenizer), data=data, data_fingerprint=data.fingerprint(),
                   encoded=encoded, pad_id=tokenizer.pad_token_id or 0, quiet=quiet or not distributed.is_main(),
                   teacher_hidden_size=config.hidden_size, transfer=transfer, teacher_weights=weights)


def teacher_config(recipe: Recipe, where: str):
    """(the teacher base's folder, its transformers config), or a UserError naming teacher.base."""
    from transformers import AutoConfig

    from shrinkwrap.models import resolve_base

    base = resolve_base(recipe.teacher.base, where, root=Path(recipe.source).parent if recipe.source else None)
    try:
        return base, AutoConfig.from_pretrained(base, trust_remote_code=recipe.teacher.trust_remote_code)
    except (OSError, ValueError) as e:
        raise UserError(f"{where}: teacher.base = {recipe.teacher.base!r} — cannot load its config "
                        f"({str(e).splitlines()[0]})") from None


def check_student(recipe: Recipe, config, where: str) -> None:
    """The student's settings against the teacher's config: layers, length, pruning (also used by
    `shrinkwrap search` on every candidate before anything runs)."""
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
        check_layers(config, where)
    from shrinkwrap.pruning import check_prune

    check_prune(recipe, config, where)


def check_layers(config, where: str) -> None:
    """Refuses, before anything runs, student.init: teacher_layers for a family whose layers cannot be
    kept one by one: no list of layers found, or one layer's weights shared across depth (ALBERT)."""
    import torch
    from transformers import AutoModelForSequenceClassification

    from shrinkwrap.models import encoder_layers

    family = getattr(config, "model_type", "?")
    if getattr(config, "num_hidden_groups", None) is not None:  # ALBERT: every layer runs the same weights
        raise UserError(f"{where}: student.init = teacher_layers — a {family!r} model shares one layer's weights "
                        f"across its depth, so step student cannot keep some of its layers; use init: pretrained or config")
    try:
        with torch.device("meta"), warnings.catch_warnings():
            warnings.simplefilter("ignore")
            model = AutoModelForSequenceClassification.from_config(config)
    except (ValueError, KeyError):
        return  # not a classifier family transformers knows: loading the teacher reports it
    try:
        encoder_layers(model)
    except UserError:
        raise UserError(f"{where}: student.init = teacher_layers — step student finds no list of layers in a "
                        f"{family!r} model to keep some of; use init: pretrained or config") from None
