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
        from shrinkwrap.ml import transfer as transfer_file

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
