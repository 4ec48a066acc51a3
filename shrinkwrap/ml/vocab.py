"""Vocabulary trimming: keep only the WordPiece pieces some texts use, and the embedding rows they index.

WordPiece splits each word greedily, longest matching piece first. Every piece a training word was
split into is kept, and a kept vocabulary holds no piece the full one lacked, so the longest match
at each point of such a word is still the same piece: the trimmed tokenizer splits every training
text exactly as before. A word never seen falls back as WordPiece itself does with the smaller
vocabulary: to shorter pieces, or to [UNK] when some part of it has no piece left.
"""
from __future__ import annotations

import json

import torch
from torch import nn

from shrinkwrap.serve.batches import plain_backend  # noqa: F401  (used here and by the trimming step)
from shrinkwrap.serve.errors import StepFailed, UserError
from shrinkwrap.serve.rundir import STUDENT_TRIMMED


def check_trim(tokenizer, where: str, family: str | None = None) -> None:
    """Refuses, before anything runs, trimming a tokenizer that is not WordPiece (the only kind it renumbers)."""
    kind = json.loads(tokenizer.backend_tokenizer.to_str())["model"].get("type")
    if kind != "WordPiece":
        model = f" of the {family!r} teacher" if family else ""
        raise UserError(f"{where}: trim_vocab.enabled — the tokenizer{model} is {kind}; step student-trimmed "
                        f"rebuilds WordPiece tokenizers only (BPE and Unigram vocabularies are not trimmed)")


def special_ids(tokenizer) -> set[int]:
    """Ids of the special tokens (those the tokenizer names and its added tokens), always kept."""
    backend = json.loads(tokenizer.backend_tokenizer.to_str())
    return set(tokenizer.all_special_ids) | {t["id"] for t in backend.get("added_tokens", [])}


def used_ids(tokenizer, texts: list[str]) -> set[int]:
    """Every piece id the texts are split into, whole texts (no truncation), special tokens left out."""
    backend = plain_backend(tokenizer)
    used: set[int] = set()
    for start in range(0, len(texts), 1024):
        for e in backend.encode_batch(texts[start:start + 1024], add_special_tokens=False):
            used.update(e.ids)
    return used


def _remap_post_processor(node, new_id: dict[str, int], where: str):
    """The post-processor with its special tokens' ids replaced by their new ids."""
    kind = node.get("type") if isinstance(node, dict) else None
    if node is None:
        return None
    if kind == "TemplateProcessing":
        for entry in node["special_tokens"].values():
            entry["ids"] = [new_id[t] for t in entry["tokens"]]
        return node
    if kind in ("BertProcessing", "RobertaProcessing"):
        for key in ("sep", "cls"):
            node[key] = [node[key][0], new_id[node[key][0]]]
        return node
    if kind == "ByteLevel":
        return node
    if kind == "Sequence":
        node["processors"] = [_remap_post_processor(p, new_id, where) for p in node["processors"]]
        return node
    raise StepFailed(f"{where}: the tokenizer's post-processor {kind!r} is not one trimming knows how to renumber "
                     f"(TemplateProcessing, BertProcessing, RobertaProcessing, ByteLevel)")


def trimmed_tokenizer(tokenizer, kept: list[int], where: str = STUDENT_TRIMMED):
    """A tokenizer of the same kind whose vocabulary is the pieces `kept` (old ids, in increasing order),
    numbered 0.. in that order; normaliser, pre-tokenizer and special tokens unchanged but renumbered."""
    from tokenizers import Tokenizer

    spec = json.loads(tokenizer.backend_tokenizer.to_str())
    if spec["model"].get("type") != "WordPiece":
        raise StepFailed(f"{where}: the tokenizer's model is {spec['model'].get('type')!r} — trimming supports "
                         f"WordPiece (BERT-family) tokenizers")
    piece_of = {i: p for p, i in spec["model"]["vocab"].items()}
    new_id = {piece_of[old]: new for new, old in enumerate(kept)}
    spec["model"]["vocab"] = new_id
    for token in spec.get("added_tokens", []):
        token["id"] = new_id[token["content"]]
    spec["post_processor"] = _remap_post_processor(spec.get("post_processor"), new_id, where)
    if spec.get("padding"):
        spec["padding"]["pad_id"] = new_id[spec["padding"]["pad_token"]]
    backend = Tokenizer.from_str(json.dumps(spec))
    # The same transformers class with the same options (lower-casing, special tokens) over the new backend;
    # file paths and the old id table are left out so that nothing is read back from the old files.
    options = {k: v for k, v in tokenizer.init_kwargs.items()
               if k not in ("vocab_file", "tokenizer_file", "added_tokens_decoder", "name_or_path", "tokenizer_object")}
    return type(tokenizer)(tokenizer_object=backend, **options)


def trim_embeddings(model: nn.Module, kept: list[int], pad_id: int | None) -> None:
    """Keeps only the rows `kept` of the word-embedding matrix, in that order (row k = old row kept[k])."""
    old = model.get_input_embeddings()
    new = nn.Embedding(len(kept), old.embedding_dim, padding_idx=pad_id)
    with torch.no_grad():
        new.weight.copy_(old.weight[torch.as_tensor(kept)])
    model.set_input_embeddings(new)
    model.config.vocab_size = len(kept)
    if pad_id is not None:
        model.config.pad_token_id = pad_id


def oov_rate(encoded: list[dict], kept: set[int], special: set[int]) -> tuple[float, int]:
    """Share of the non-special tokens in `encoded` (ids of the full vocabulary) whose piece was dropped."""
    tokens = [i for e in encoded for i in e["input_ids"] if i not in special]
    dropped = sum(i not in kept for i in tokens)
    return (dropped / len(tokens) if tokens else 0.0), len(tokens)
