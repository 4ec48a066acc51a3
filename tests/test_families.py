"""Every common encoder family through the whole chain, from a user's own classifier (teacher.trained):
kept layers, pruning, vocabulary trimming, PyTorch int8, ONNX export with parity, fusion, ONNX int8, the
artifact, predict and bench. Tiny random models built offline from transformers' own config classes, with
the bundled WordPiece tokenizer (conftest.tiny_base does the same for BERT): no downloads.

The teacher is a random classifier used as is, so accuracies mean nothing here; what is checked is that
each step runs, and what it must prove (parity, a valid graph, the artifact's predictions)."""
from __future__ import annotations

import json

import pytest

from conftest import bundled_path, keyword_rows, tiny_recipe, write_csv, write_recipe

LABELS = ["outage", "login", "refund"]  # not sorted: the run must follow the model's order
FAMILIES = ["bert", "roberta", "xlm-roberta", "electra", "mpnet", "distilbert", "deberta-v2"]
HEADS_PRUNABLE = {"bert", "roberta", "xlm-roberta", "electra", "distilbert"}
ATTENTION_FUSED = {"bert", "roberta", "xlm-roberta", "electra", "distilbert"}  # ONNX Runtime's bert fusions


def tiny_config(family: str, vocab_size: int):
    import transformers as T

    labels = dict(num_labels=len(LABELS), id2label=dict(enumerate(LABELS)), label2id={n: i for i, n in enumerate(LABELS)})
    common = dict(vocab_size=vocab_size, hidden_size=32, num_hidden_layers=4, num_attention_heads=2,
                  intermediate_size=64, **labels)
    # RoBERTa-type position ids start after the pad id: two more positions than tokens. The WordPiece
    # tokenizer's [PAD] is id 0, so pad_token_id is set to it.
    roberta = dict(max_position_embeddings=34, pad_token_id=0, type_vocab_size=1)
    return {
        "bert": lambda: T.BertConfig(max_position_embeddings=32, **common),
        "roberta": lambda: T.RobertaConfig(**roberta, **common),
        "xlm-roberta": lambda: T.XLMRobertaConfig(**roberta, **common),
        "electra": lambda: T.ElectraConfig(embedding_size=16, max_position_embeddings=32, **common),
        # MPNet's forward looks its relative position bias up in 32 buckets whatever the config says.
        "mpnet": lambda: T.MPNetConfig(max_position_embeddings=34, pad_token_id=0, **common),
        "distilbert": lambda: T.DistilBertConfig(vocab_size=vocab_size, dim=32, n_layers=4, n_heads=2, hidden_dim=64,
                                                 max_position_embeddings=32, **labels),
        "deberta-v2": lambda: T.DebertaV2Config(max_position_embeddings=32, relative_attention=True,
                                                pos_att_type=["p2c", "c2p"], position_buckets=8, type_vocab_size=0,
                                                pad_token_id=0, **common),
    }[family]()


def own_classifier(family: str, folder):
    """A user's 'fine-tuned' classifier folder of this family: a random tiny one with a head and label names."""
    import torch
    from transformers import AutoModelForSequenceClassification, AutoTokenizer

    tok = AutoTokenizer.from_pretrained(bundled_path())
    torch.manual_seed(0)
    AutoModelForSequenceClassification.from_config(tiny_config(family, tok.vocab_size)).save_pretrained(
        folder, safe_serialization=True)
    tok.save_pretrained(folder)
    return folder


@pytest.fixture(scope="module")
def family_data(tmp_path_factory):
    return write_csv(tmp_path_factory.mktemp("family-data") / "tickets.csv", keyword_rows(60))


@pytest.mark.parametrize("family", FAMILIES)
def test_family_goes_through_the_whole_chain(family, tmp_path, family_data):
    import onnx

    from shrinkwrap.artifact import load
    from shrinkwrap.cli import main, run_recipe
    from shrinkwrap.data import load_dataset
    from shrinkwrap.recipe import load_recipe

    base = own_classifier(family, tmp_path / "own")
    raw = tiny_recipe(base, family_data,
                      student={"epochs": 1},
                      prune={"enabled": True, "heads_removed": 1 if family in HEADS_PRUNABLE else 0,
                             "neurons_removed_share": 0.25, "epochs": 0, "importance_texts": 16},
                      trim_vocab={"enabled": True},
                      bench={"repeats": 3, "warmup": 0, "warmup_s": 0, "min_time_s": 0})
    raw["teacher"] = {"base": str(base), "trained": True, "max_length": 30}
    recipe = load_recipe(write_recipe(tmp_path / "r.yaml", raw))
    results = run_recipe(recipe, tmp_path / "run", quiet=True)
    steps = {s["name"]: s for s in results["steps"]}
    assert list(steps) == ["teacher", "student", "student-pruned", "student-trimmed", "student-int8",
                           "student-onnx", "student-onnx-int8"]
    assert results["data"]["label_names"] == LABELS

    pruned = steps["student-pruned"]["info"]
    assert pruned["after"]["heads_per_layer"] == (1 if family in HEADS_PRUNABLE else 2)
    assert pruned["after"]["intermediate_size"] == 48
    assert steps["student-trimmed"]["info"]["vocab_size"] < steps["student-trimmed"]["info"]["vocab_size_before"]

    export = steps["student-onnx"]["info"]
    assert export["parity"]["max_abs_logit_diff"] <= 1e-4 and export["parity"]["label_mismatches"] == 0
    assert export["fusion"]["attention_fused"] == (family in ATTENTION_FUSED)
    if family not in ATTENTION_FUSED:
        assert family in export["fusion"]["note"]

    artifact = tmp_path / "run" / "artifact"
    onnx.checker.check_model(str(artifact / "model.onnx"), full_check=True)  # the shipped int8 graph is valid ONNX
    test = load_dataset(recipe.data, recipe.resolve(recipe.data.path), "test").test
    rows = load(artifact).predict(test.texts)
    assert [r["label"] for r in rows] == [LABELS[i] for i in steps["student-onnx-int8"]["predictions"]]
    out = tmp_path / "bench.json"
    assert main(["bench", str(artifact), "--repeats", "3", "--warmup", "0", "--warmup-time", "0", "--min-time", "0",
                 "--sequence-length", "16", "--out", str(out)]) == 0
    assert json.loads(out.read_text())
