"""Student trimmed: only the vocabulary pieces the training (and transfer) texts use, and their embeddings.

A 30k-piece vocabulary is about half of a small student's bytes, and a domain uses a fraction of
it. The step writes a smaller tokenizer of the same kind that splits every training text into the
same pieces as before (checked here on each of them) and the student with only those pieces'
embedding rows, so that on those texts its logits are the untrimmed student's. This step changes the
tokenizer: every later step reads texts with this one.
"""
from __future__ import annotations

from pathlib import Path

from shrinkwrap.ml.models import save_model
from shrinkwrap.ml.vocab import oov_rate, plain_backend, special_ids, trim_embeddings, trimmed_tokenizer, used_ids
from shrinkwrap.serve.errors import StepFailed
from shrinkwrap.serve.rundir import STUDENT_TRIMMED


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
    used = set(special)
    for batch in text_batches(ctx):
        used |= used_ids(tokenizer, batch)
    kept = sorted(used)
    kept_set = set(kept)
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

    model = ctx.task.load(str(src))
    vocab_before = model.config.vocab_size
    width = model.get_input_embeddings().embedding_dim
    element = model.get_input_embeddings().weight.element_size()
    trim_embeddings(model, kept, small.pad_token_id)
    save_model(model, small, out)
    rate, test_tokens = oov_rate(tokens.encoded["test"], kept_set, special)
    return {"vocab_size_before": vocab_before, "vocab_size": len(kept), "special_tokens": len(special),
            "texts": checked, "embedding_bytes_before": vocab_before * width * element,
            "embedding_bytes": len(kept) * width * element,
            # under the original tokenizer, the tokens the model reads (cut at the student's max_length), specials excluded
            "test_oov_rate": round(rate, 6), "test_tokens": test_tokens}
