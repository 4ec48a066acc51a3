"""Checks every input of a run before anything is written: the teacher's config and tokenizer, the data,
the student's layers and heads, the transfer texts. Returns the Context the steps are given."""
from __future__ import annotations

import warnings
from pathlib import Path

from shrinkwrap.chain.context import Context
from shrinkwrap.ml import distributed
from shrinkwrap.ml.checks import check_student, teacher_config
from shrinkwrap.recipe.schema import TRAINING_ONLY_TEACHER_KEYS, Recipe
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.fingerprint import tokenizer_fingerprint_of
from shrinkwrap.serve.rundir import check_out_dir


def prepare(recipe: Recipe, out: Path, quiet: bool = False) -> Context:
    """Loads and checks everything the chain needs. Writes nothing."""
    from shrinkwrap.ml.data import in_label_order, load_dataset
    from shrinkwrap.ml.models import load_tokenizer
    from shrinkwrap.serve.batches import encode

    where = recipe.source or "recipe"
    check_out_dir(out)
    base, config = teacher_config(recipe, where)
    if recipe.teacher.trust_remote_code:
        warnings.warn(f"{where}: teacher.trust_remote_code is on — Python code shipped with {base} will run")
    if recipe.teacher.trained:
        from shrinkwrap.ml import trained

        trained.check_head(Path(base), config, where)
        ignored = trained.unused_keys(recipe.teacher, TRAINING_ONLY_TEACHER_KEYS)
        if ignored and not quiet:
            warnings.warn(f"{where}: teacher.trained is true — the teacher is used as is, so "
                          f"{', '.join('teacher.' + k for k in ignored)} no longer apply")
    check_student(recipe, config, where)
    tokenizer = load_tokenizer(base, where, recipe.teacher.trust_remote_code)
    if recipe.trim_vocab.enabled:
        from shrinkwrap.ml.vocab import check_trim

        check_trim(tokenizer, where, getattr(config, "model_type", None))
    if recipe.augment.copies and "mask" in recipe.augment.transforms and not (tokenizer.mask_token or tokenizer.unk_token):
        raise UserError(f"{where}: augment.transforms lists mask, but the teacher's tokenizer has no mask (or unknown) "
                        f"token to put in a word's place — leave mask out")
    data_path = recipe.resolve(recipe.data.path)
    if not data_path.exists():
        raise UserError(f"{where}: data.path = {recipe.data.path!r} — no such file or folder ({data_path})")
    embedding = recipe.task == "embedding"
    data = load_dataset(recipe.data, data_path, str(data_path), labels_optional=embedding)
    weights, pooling = None, None
    if recipe.teacher.trained:  # the model's own class order: its logit k is the data's class k
        data = in_label_order(data, trained.match_labels(trained.model_labels(config), data.label_names, where))
        weights = trained.weights_fingerprint(Path(base))
    if embedding:  # a sentence encoder used as is: its weights and how it pools
        from shrinkwrap.ml import trained

        pooling = teacher_pooling(recipe, Path(base), where)
        ignored = trained.unused_keys(recipe.teacher, TRAINING_ONLY_TEACHER_KEYS)
        if ignored and not quiet:
            warnings.warn(f"{where}: task is embedding — the teacher is a sentence encoder used as is, so "
                          f"{', '.join('teacher.' + k for k in ignored)} do not apply")
        weights = trained.weights_fingerprint(Path(base))
        check_embedding(recipe, data, config, where)
        data = data.pairs_apart()
    encoded = {s: encode(tokenizer, getattr(data, s), recipe.teacher.max_length, truncation=recipe.data.truncation)
               for s in ("train", "validation", "test")}
    transfer = None
    st = recipe.student
    if st.transfer_path:
        from shrinkwrap.ml import transfer as transfer_file

        if recipe.data.text_pair and not embedding:
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
                   teacher_hidden_size=config.hidden_size, transfer=transfer, teacher_weights=weights,
                   pooling=pooling)


def teacher_pooling(recipe: Recipe, base: Path, where: str) -> dict:
    """How a sentence-encoder teacher pools: as its folder says (a sentence-transformers configuration, or a step's
    pooling.json), else as teacher.pooling / teacher.normalize say; a one-line UserError when neither does, or
    when the recipe contradicts the folder."""
    from shrinkwrap.ml.embedding import read_pooling

    found = read_pooling(base)
    t = recipe.teacher
    if found is None:
        if t.pooling is None:
            raise UserError(f"{where}: teacher.base = {t.base!r} — its folder does not say how it pools (no "
                            f"modules.json with a pooling module, no pooling.json): set teacher.pooling (mean, cls or "
                            f"max) and teacher.normalize")
        return {"pooling": t.pooling, "normalize": bool(t.normalize)}
    for key in ("pooling", "normalize"):
        if getattr(t, key) is not None and getattr(t, key) != found[key]:
            raise UserError(f"{where}: teacher.{key} = {getattr(t, key)} — the teacher's folder says {found[key]} "
                            f"(its pooling configuration); leave teacher.{key} out")
    return found


def check_embedding(recipe: Recipe, data, config, where: str) -> None:
    """What task: embedding needs of the data and the student: labels where a limit or metric asks for them, and
    a student as wide as the teacher (its vectors are compared with the teacher's, number for number)."""
    if not data.has_labels and recipe.budget.max_knn_accuracy_drop_points is not None:
        raise UserError(f"{where}: budget.max_knn_accuracy_drop_points needs labels — the data has no "
                        f"{recipe.data.label!r} column (set data.label to its label column)")
    st = recipe.student
    width = config.hidden_size
    if st.init == "config" and st.hidden_size not in (None, width):
        raise UserError(f"{where}: student.hidden_size = {st.hidden_size} with task: embedding — the student's vector "
                        f"must be as wide as the teacher's ({width}) to stay in its space")
    if st.init == "pretrained":
        from transformers import AutoConfig

        other = AutoConfig.from_pretrained(str(recipe.resolve(st.base))).hidden_size
        if other != width:
            raise UserError(f"{where}: student.base = {st.base!r} gives {other}-number vectors with task: embedding — "
                            f"the teacher's are {width}: a student must stay in the teacher's vector space")
