"""Student trimmed: only the vocabulary pieces the training (and transfer) texts use, and their embeddings.

A 30k-piece vocabulary is about half of a small student's bytes, a 250k-piece multilingual one most of them,
and a domain uses a fraction of it. The step writes a smaller tokenizer of the same kind (WordPiece, BPE or
Unigram: shrinkwrap.ml.vocab says what each keeps) that splits every training text into the same pieces as
before (checked here on each of them) and the student with only those pieces' embedding rows, so that on
those texts its logits are the untrimmed student's (checked on some). Validation and test texts may split
otherwise where they hold what no training text did; the share that does is measured, not promised. This step
changes the tokenizer: every later step reads texts with this one.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from shrinkwrap.ml.data import Split
from shrinkwrap.ml.models import save_model
from shrinkwrap.ml.train import predict_outputs
from shrinkwrap.ml.vocab import (changed_share, kind_of, oov_rate, pieces_kept, plain_backend, special_ids,
                                 trim_embeddings, trimmed_tokenizer)
from shrinkwrap.serve.batches import encode
from shrinkwrap.serve.errors import StepFailed
from shrinkwrap.serve.rundir import STUDENT_TRIMMED

# Largest logit gap allowed between the student and its trimmed copy on training texts: the same rows are read,
# so only float noise may differ.
LOGIT_TOLERANCE = 1e-5
LOGIT_CHECK_TEXTS = 64


def text_batches(ctx, size: int = 1024):
    """The texts whose pieces are kept, a batch at a time: training texts (both sides of a pair) and
    transfer texts (read from disk: there can be millions)."""
    train = ctx.data.train
    labelled = list(train.texts) + list(train.pairs or [])
    for start in range(0, len(labelled), size):
        yield labelled[start:start + size]
    yield from ctx.transfer_batches(size)


def run(ctx, src: Path, out: Path) -> dict:
    tokens = ctx.student_tokens(src)
    tokenizer = tokens.tokenizer
    special = special_ids(tokenizer)
    kept = pieces_kept(tokenizer, text_batches(ctx))
    small = trimmed_tokenizer(tokenizer, kept)

    # The promise of this step, checked on every text it was built from: the same pieces, renumbered.
    new_id = {old: new for new, old in enumerate(kept)}
    full, trimmed = plain_backend(tokenizer), plain_backend(small)
    checked = 0
    for batch in text_batches(ctx):
        before, after = full.encode_batch(batch), trimmed.encode_batch(batch)
        for i, (b, a) in enumerate(zip(before, after)):
            if a.ids != [new_id[t] for t in b.ids]:
                raise StepFailed(f"{STUDENT_TRIMMED}: the trimmed tokenizer splits training text {checked + i + 1} "
                                 f"differently ({b.tokens[:8]}… vs {a.tokens[:8]}…)")
        checked += len(batch)
    # Texts it was not built from may split otherwise where the model reads them: how many, measured, not promised.
    changed = {s: changed_share(tokens.encoded[s], encode(small, getattr(ctx.data, s), ctx.student_length,
                                                          truncation=ctx.recipe.data.truncation), kept)
               for s in ("validation", "test")}

    model = ctx.task.load(str(src))
    vocab_before = model.config.vocab_size
    width = model.get_input_embeddings().embedding_dim
    element = model.get_input_embeddings().weight.element_size()
    train, n = ctx.data.train, min(LOGIT_CHECK_TEXTS, len(ctx.data.train))
    sample = Split(train.texts[:n], train.labels[:n], train.pairs[:n] if train.pairs is not None else None)
    before_logits = predict_outputs(model, tokens.encoded["train"][:n], tokens.pad_id, task=ctx.task)
    trim_embeddings(model, kept, small.pad_token_id)
    # Position ids, pooling and heads that read special ids must see the renumbered ones as they saw the old.
    after_logits = predict_outputs(model, encode(small, sample, ctx.student_length,
                                                 truncation=ctx.recipe.data.truncation),
                                   small.pad_token_id, task=ctx.task)
    gap = float(np.abs(before_logits - after_logits).max()) if n else 0.0
    if gap > LOGIT_TOLERANCE:
        raise StepFailed(f"{STUDENT_TRIMMED}: the trimmed student's outputs on training texts differ from the "
                         f"student's by {gap:.2e} (allowed {LOGIT_TOLERANCE:g})")
    save_model(model, small, out)
    rate, test_tokens = oov_rate(tokens.encoded["test"], set(kept), special)
    return {"tokenizer_kind": kind_of(tokenizer), "vocab_size_before": vocab_before, "vocab_size": len(kept),
            "special_tokens": len(special), "texts": checked, "embedding_bytes_before": vocab_before * width * element,
            "embedding_bytes": len(kept) * width * element, "max_abs_logit_diff": gap,
            # under the original tokenizer, the tokens the model reads (cut at the student's max_length), specials excluded
            "test_oov_rate": round(rate, 6), "test_tokens": test_tokens,
            # texts (a pair counts once) whose tokens the model reads the trimmed tokenizer changes
            "validation_changed_share": round(changed["validation"], 6),
            "test_changed_share": round(changed["test"], 6), "test_texts": len(tokens.encoded["test"])}
