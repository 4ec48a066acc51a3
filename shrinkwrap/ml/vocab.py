"""Vocabulary trimming: keep only the pieces some texts use (and what the tokenizer needs to split them the same
way), and the embedding rows they index. Three kinds of tokenizer, one promise: every text the pieces were
taken from is split exactly as before.

- WordPiece (BERT) splits each word greedily, longest matching piece first. Every piece a training word was
  split into is kept, and a kept vocabulary holds no piece the full one lacked, so the longest match at each
  point of such a word is still the same piece. A word never seen falls back as WordPiece itself does with the
  smaller vocabulary: to shorter pieces, or to the unknown token when some part of it has no piece left.
- BPE (byte-level for RoBERTa and ModernBERT) applies, among the merges whose two parts stand side by side, the
  one of lowest rank, until none applies. Every merge that makes a kept piece is kept with both its parts, and
  with them every piece that no merge makes (the base alphabet: the 256 byte symbols of a byte-level BPE), in
  the same order. Splitting a training word applies only merges that build its final pieces; the smaller
  list still holds each of them, and any merge it offers at a step the full list offered too, ranked the same,
  so the same merge wins at every step. Any text is still split into kept pieces, at worst single bytes: no
  text is ever unknown to a byte-level BPE.
- Unigram (SentencePiece: XLM-R, DeBERTa-v3, CamemBERT) splits each word into the sequence of pieces whose
  scores add up highest (Kudo 2018). The pieces used keep their scores; the best split of a training word uses
  only kept pieces, and a smaller vocabulary offers no split the full one did not, so it is still the best.
  Every single character the texts hold is kept too, so an unseen word of seen characters is still spelt out.
"""
from __future__ import annotations

import json

import torch
from torch import nn

from shrinkwrap.serve.batches import plain_backend  # noqa: F401  (used here and by the trimming step)
from shrinkwrap.serve.errors import StepFailed, UserError
from shrinkwrap.serve.rundir import STUDENT_TRIMMED

KINDS = ("WordPiece", "BPE", "Unigram")


def kind_of(tokenizer) -> str:
    """The tokenizer's model as tokenizer.json names it: WordPiece, BPE, Unigram, WordLevel."""
    return type(tokenizer.backend_tokenizer.model).__name__


def check_trim(tokenizer, where: str, family: str | None = None) -> None:
    """Refuses, before anything runs, trimming a tokenizer whose model is not one trimming renumbers."""
    kind = kind_of(tokenizer)
    if kind not in KINDS:
        model = f" of the {family!r} teacher" if family else ""
        raise UserError(f"{where}: trim_vocab.enabled — the tokenizer{model} is {kind}; step student-trimmed "
                        f"rebuilds {', '.join(KINDS)} tokenizers only")


def special_ids(tokenizer) -> set[int]:
    """Ids of the special tokens (those the tokenizer names and its added tokens), always kept."""
    return set(tokenizer.all_special_ids) | set(tokenizer.backend_tokenizer.get_added_tokens_decoder())


def used_ids(tokenizer, texts: list[str]) -> set[int]:
    """Every piece id the texts are split into, whole texts (no truncation), special tokens left out."""
    backend = plain_backend(tokenizer)
    used: set[int] = set()
    for start in range(0, len(texts), 1024):
        for e in backend.encode_batch(texts[start:start + 1024], add_special_tokens=False):
            used.update(e.ids)
    return used


def _merge_parts(merge) -> tuple[str, str]:
    """A merge as saved: a pair, or (older tokenizer.json files) one string 'left right'."""
    return tuple(merge.split(" ", 1)) if isinstance(merge, str) else tuple(merge)


def _merged(left: str, right: str, prefix: str | None) -> str:
    """The piece a BPE merge makes: a continuing-word prefix on the right part is dropped, as the library does."""
    return left + (right[len(prefix):] if prefix and right.startswith(prefix) else right)


def _bpe_pieces(model: dict, pieces: set[str]) -> set[str]:
    """`pieces` with every piece the merges that make them need, down to the base alphabet, and that alphabet."""
    made_by: dict[str, list[tuple[str, str]]] = {}
    for merge in model["merges"]:
        left, right = _merge_parts(merge)
        made_by.setdefault(_merged(left, right, model.get("continuing_subword_prefix")), []).append((left, right))
    kept = set(pieces) | {p for p in model["vocab"] if p not in made_by}
    todo = list(kept)
    while todo:
        for parts in made_by.get(todo.pop(), []):
            for part in parts:
                if part not in kept:
                    kept.add(part)
                    todo.append(part)
    return kept


def pieces_kept(tokenizer, batches) -> list[int]:
    """Old ids, increasing, of the pieces a trimmed vocabulary keeps for the texts in `batches` (an iterable of
    lists of texts): every piece they are split into and every special or added token; for BPE also the merges'
    parts and the base alphabet, for Unigram every single-character piece of their characters."""
    kind = kind_of(tokenizer)
    vocab = tokenizer.backend_tokenizer.get_vocab(with_added_tokens=True)
    used: set[int] = set()
    for batch in batches:
        used |= used_ids(tokenizer, batch)
    kept = used | special_ids(tokenizer)
    piece_of = {i: p for p, i in vocab.items()}
    if kind == "BPE":
        model = json.loads(tokenizer.backend_tokenizer.to_str())["model"]
        kept |= {vocab[p] for p in _bpe_pieces(model, {piece_of[i] for i in kept})}
    elif kind == "Unigram":
        # A character of the texts that has a piece of its own lies inside some piece of their best splits.
        kept |= {vocab[c] for i in used for c in piece_of[i] if c in vocab}
    return sorted(kept)


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


def _trimmed_model(model: dict, kept_pieces: list[str], where: str) -> dict:
    """The tokenizer.json `model` of the kept pieces, numbered 0.. in that order. Added tokens that were not
    among the model's own pieces stay out of it when they come last, as the library numbers them."""
    own = {v[0] for v in model["vocab"]} if model["type"] == "Unigram" else set(model.get("vocab", {}))
    inside = [p for p in kept_pieces if p in own]
    if inside == kept_pieces[:len(inside)]:
        kept_pieces = inside
    new_id = {p: i for i, p in enumerate(kept_pieces)}
    if model["type"] == "WordPiece":
        model["vocab"] = new_id
    elif model["type"] == "BPE":
        model["vocab"] = new_id
        prefix = model.get("continuing_subword_prefix")
        model["merges"] = [m for m in model["merges"] if all(
            p in new_id for p in (*_merge_parts(m), _merged(*_merge_parts(m), prefix)))]
    elif model["type"] == "Unigram":
        score = {p: s for p, s in model["vocab"]}
        unk = model["vocab"][model["unk_id"]][0] if model.get("unk_id") is not None else None
        # An added token amid the model's own pieces gets the lowest score: the model never sees its text,
        # which is taken out before the model splits the rest.
        lowest = min(score.values())
        model["vocab"] = [[p, score.get(p, lowest)] for p in kept_pieces]
        model["unk_id"] = new_id[unk] if unk is not None else None
    else:
        raise StepFailed(f"{where}: the tokenizer's model is {model['type']!r} — trimming supports {', '.join(KINDS)}")
    return model


def trimmed_tokenizer(tokenizer, kept: list[int], where: str = STUDENT_TRIMMED):
    """A tokenizer of the same kind whose vocabulary is the pieces `kept` (old ids, in increasing order),
    numbered 0.. in that order; normaliser, pre-tokenizer and special tokens unchanged but renumbered."""
    from tokenizers import Tokenizer

    spec = json.loads(tokenizer.backend_tokenizer.to_str())
    piece_of = {i: p for p, i in tokenizer.backend_tokenizer.get_vocab(with_added_tokens=True).items()}
    kept_pieces = [piece_of[old] for old in kept]
    new_id = {p: new for new, p in enumerate(kept_pieces)}
    spec["model"] = _trimmed_model(spec["model"], kept_pieces, where)
    for token in spec.get("added_tokens", []):
        token["id"] = new_id[token["content"]]
    spec["post_processor"] = _remap_post_processor(spec.get("post_processor"), new_id, where)
    if spec.get("padding"):
        spec["padding"]["pad_id"] = new_id[spec["padding"]["pad_token"]]
    backend = Tokenizer.from_str(json.dumps(spec))
    # The same transformers class with the same options (lower-casing, special tokens) over the new backend;
    # file paths and the old id table are left out so that nothing is read back from the old files.
    options = {k: v for k, v in tokenizer.init_kwargs.items()
               if k not in ("vocab_file", "merges_file", "tokenizer_file", "added_tokens_decoder", "name_or_path",
                            "tokenizer_object")}
    small = type(tokenizer)(tokenizer_object=backend, **options)
    small.model_input_names = list(tokenizer.model_input_names)  # what the model beside it is fed
    return small


def changed_share(before: list[dict], after: list[dict], kept: list[int]) -> float:
    """Share of the examples (a text or a pair) whose token ids under the trimmed tokenizer (`after`) are not the
    full tokenizer's (`before`) renumbered: both encoded alike (batches.encode), as the model reads them."""
    new_id = {old: new for new, old in enumerate(kept)}
    changed = sum(a["input_ids"] != [new_id.get(t, -1) for t in b["input_ids"]] for b, a in zip(before, after))
    return changed / len(before) if before else 0.0


def trim_embeddings(model: nn.Module, kept: list[int], pad_id: int | None) -> None:
    """Keeps only the rows `kept` of the word-embedding matrix, in that order (row k = old row kept[k]), and
    renumbers the token ids the config names."""
    old = model.get_input_embeddings()
    new = nn.Embedding(len(kept), old.embedding_dim, padding_idx=pad_id)
    with torch.no_grad():
        new.weight.copy_(old.weight[torch.as_tensor(kept)])
    model.set_input_embeddings(new)
    model.config.vocab_size = len(kept)
    new_id = {old: new for new, old in enumerate(kept)}
    for name in ("bos_token_id", "eos_token_id", "cls_token_id", "sep_token_id"):
        if isinstance(getattr(model.config, name, None), int):
            setattr(model.config, name, new_id.get(getattr(model.config, name)))
    if pad_id is not None:
        model.config.pad_token_id = pad_id


def oov_rate(encoded: list[dict], kept: set[int], special: set[int]) -> tuple[float, int]:
    """Share of the non-special tokens in `encoded` (ids of the full vocabulary) whose piece was dropped."""
    tokens = [i for e in encoded for i in e["input_ids"] if i not in special]
    dropped = sum(i not in kept for i in tokens)
    return (dropped / len(tokens) if tokens else 0.0), len(tokens)
