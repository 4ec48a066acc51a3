"""Every common encoder family through the whole chain, from a user's own classifier (teacher.trained):
kept layers, pruning, vocabulary trimming, PyTorch int8, ONNX export with parity, fusion, ONNX int8, the
artifact, predict and bench. Tiny random models built offline from transformers' own config classes, each with
a tokenizer of its family's kind (made_tokenizers): the bundled WordPiece for the BERT-like ones, byte-level BPE
trained in the test for RoBERTa and ModernBERT, Unigram trained in the test for DeBERTa-v3 and CamemBERT, and
the real multilingual Unigram of an XLM-R-type model for XLM-RoBERTa. No downloads.

The teacher is a random classifier used as is, so accuracies mean nothing here; what is checked is that
each step runs, and what it must prove (parity, a valid graph, the artifact's predictions)."""
from __future__ import annotations

import json

import made_tokenizers
import pytest
from conftest import bundled_path, keyword_rows, tiny_recipe, write_csv, write_recipe

LABELS = ["outage", "login", "refund"]  # not sorted: the run must follow the model's order
FAMILIES = ["bert", "roberta", "xlm-roberta", "camembert", "electra", "mpnet", "distilbert", "deberta-v2",
            "modernbert"]
HEADS_PRUNABLE = {"bert", "roberta", "xlm-roberta", "camembert", "electra", "distilbert"}
ATTENTION_FUSED = {"bert", "roberta", "xlm-roberta", "camembert", "electra", "distilbert"}  # ONNX Runtime's bert fusions


def bundled_tokenizer():
    from transformers import AutoTokenizer

    return AutoTokenizer.from_pretrained(bundled_path())


# Each family's own kind of tokenizer, and the kind its tokenizer.json names (the `tokenizers` library's model type).
TOKENIZERS = {"bert": bundled_tokenizer, "electra": bundled_tokenizer, "mpnet": bundled_tokenizer,
              "distilbert": bundled_tokenizer, "albert": bundled_tokenizer, "funnel": bundled_tokenizer,
              "roberta": made_tokenizers.roberta_bpe,
              "modernbert": made_tokenizers.modernbert_bpe, "xlm-roberta": made_tokenizers.multilingual,
              "deberta-v2": made_tokenizers.deberta_unigram, "camembert": made_tokenizers.camembert_unigram}
KIND = {"roberta": "BPE", "modernbert": "BPE", "xlm-roberta": "Unigram", "deberta-v2": "Unigram",
        "camembert": "Unigram"}


def tiny_config(family: str, vocab_size: int, pad_id: int = 0, cls_id: int = 1, sep_id: int = 2):
    import transformers as T

    labels = dict(num_labels=len(LABELS), id2label=dict(enumerate(LABELS)), label2id={n: i for i, n in enumerate(LABELS)})
    common = dict(vocab_size=vocab_size, hidden_size=32, num_hidden_layers=4, num_attention_heads=2,
                  intermediate_size=64, **labels)
    # RoBERTa-type position ids start after the pad id: two more positions than tokens, plus the pad id.
    roberta = dict(max_position_embeddings=34 + pad_id, pad_token_id=pad_id, type_vocab_size=1)
    return {
        "bert": lambda: T.BertConfig(max_position_embeddings=32, pad_token_id=pad_id, **common),
        "roberta": lambda: T.RobertaConfig(**roberta, **common),
        "xlm-roberta": lambda: T.XLMRobertaConfig(**roberta, **common),
        "camembert": lambda: T.CamembertConfig(**roberta, **common),
        "electra": lambda: T.ElectraConfig(embedding_size=16, max_position_embeddings=32, pad_token_id=pad_id, **common),
        # MPNet's forward looks its relative position bias up in 32 buckets whatever the config says.
        "mpnet": lambda: T.MPNetConfig(max_position_embeddings=34, pad_token_id=pad_id, **common),
        "distilbert": lambda: T.DistilBertConfig(vocab_size=vocab_size, dim=32, n_layers=4, n_heads=2, hidden_dim=64,
                                                 max_position_embeddings=32, pad_token_id=pad_id, **labels),
        "deberta-v2": lambda: T.DebertaV2Config(max_position_embeddings=32, relative_attention=True,
                                                pos_att_type=["p2c", "c2p"], position_buckets=8, type_vocab_size=0,
                                                pad_token_id=pad_id, **common),
        # Families a step refuses: ALBERT shares one layer's weights across depth; Funnel's layers are blocks.
        "albert": lambda: T.AlbertConfig(embedding_size=16, max_position_embeddings=32, pad_token_id=pad_id, **common),
        "funnel": lambda: T.FunnelConfig(vocab_size=vocab_size, block_sizes=[1, 1], num_decoder_layers=1, d_model=32,
                                         n_head=2, d_head=16, d_inner=64, pad_token_id=pad_id, **labels),
        # Layers 0 and 3 attend globally, 1 and 2 to a window of 8 tokens: shorter than the texts read.
        "modernbert": lambda: T.ModernBertConfig(max_position_embeddings=64, global_attn_every_n_layers=3,
                                                 local_attention=8, pad_token_id=pad_id, cls_token_id=cls_id,
                                                 sep_token_id=sep_id, bos_token_id=cls_id, eos_token_id=sep_id,
                                                 **common),
    }[family]()


def own_classifier(family: str, folder, tokenizer=None):
    """A user's 'fine-tuned' classifier folder of this family: a random tiny one with a head and label names,
    beside its family's kind of tokenizer (or `tokenizer`)."""
    import torch
    from transformers import AutoModelForSequenceClassification

    tok = tokenizer or TOKENIZERS[family]()
    torch.manual_seed(0)
    config = tiny_config(family, len(tok), tok.pad_token_id, tok.cls_token_id, tok.sep_token_id)
    AutoModelForSequenceClassification.from_config(config).save_pretrained(folder, safe_serialization=True)
    tok.save_pretrained(folder)
    return folder


@pytest.fixture(scope="module")
def family_data(tmp_path_factory):
    return write_csv(tmp_path_factory.mktemp("family-data") / "tickets.csv", keyword_rows(60))


@pytest.mark.parametrize("family", FAMILIES)
def test_family_goes_through_the_whole_chain(family, tmp_path, family_data):
    import onnx

    from shrinkwrap.chain.pipeline import run_recipe
    from shrinkwrap.cli import main
    from shrinkwrap.ml.data import load_dataset
    from shrinkwrap.recipe.schema import load_recipe
    from tokenizers import Tokenizer

    from shrinkwrap.serve.artifact import load
    from shrinkwrap.serve.fingerprint import tokenizer_fingerprint_of_file

    base = own_classifier(family, tmp_path / "own")
    raw = tiny_recipe(base, family_data,
                      student={"epochs": 1},
                      prune={"enabled": True, "heads_removed": 1 if family in HEADS_PRUNABLE else 0,
                             "neurons_removed_share": 0.25, "epochs": 0, "importance_texts": 16},
                      trim_vocab={"enabled": True},
                      bench={"repeats": 3, "warmup": 0, "warm_seconds": 0, "timed_seconds": 0})
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
    trimmed = steps["student-trimmed"]["info"]
    assert trimmed["tokenizer_kind"] == KIND.get(family, "WordPiece")
    assert trimmed["vocab_size"] < trimmed["vocab_size_before"] and trimmed["max_abs_logit_diff"] <= 1e-5

    export = steps["student-onnx"]["info"]
    assert export["parity"]["max_abs_logit_diff"] <= 1e-4 and export["parity"]["label_mismatches"] == 0
    assert export["fusion"]["attention_fused"] == (family in ATTENTION_FUSED)
    if family not in ATTENTION_FUSED:
        assert family in export["fusion"]["note"]

    artifact = tmp_path / "run" / "artifact"
    onnx.checker.check_model(str(artifact / "model.onnx"), full_check=True)  # the shipped int8 graph is valid ONNX
    # the artifact carries the trimmed tokenizer, a plain tokenizer.json the `tokenizers` library reads
    trimmed_file = tmp_path / "run" / "student-trimmed" / "tokenizer.json"
    assert load(artifact).manifest["tokenizer"]["fingerprint"] == tokenizer_fingerprint_of_file(trimmed_file)
    assert Tokenizer.from_file(str(artifact / "tokenizer.json")).get_vocab_size() == trimmed["vocab_size"]
    test = load_dataset(recipe.data, recipe.resolve(recipe.data.path), "test").test
    rows = load(artifact).predict(test.texts)
    assert [r["label"] for r in rows] == [LABELS[i] for i in steps["student-onnx-int8"]["predictions"]]
    out = tmp_path / "bench.json"
    assert main(["bench", str(artifact), "--repeats", "3", "--warmup", "0", "--warm-seconds", "0", "--timed-seconds", "0",
                 "--sequence-length", "16", "--out", str(out)]) == 0
    assert json.loads(out.read_text())


def _refusal(tmp_path, base, data, capsys, **sections):
    """The refusal of a recipe as a user meets it: `shrinkwrap run` exits 2 with one line on stderr, and nothing
    is written."""
    from shrinkwrap.cli import main

    raw = tiny_recipe(base, data, **sections)
    raw["teacher"] = {"base": str(base), "trained": True, "max_length": 30}
    recipe = write_recipe(tmp_path / "r.yaml", raw)
    capsys.readouterr()
    assert main(["run", str(recipe), "--out", str(tmp_path / "run")]) == 2
    lines = capsys.readouterr().err.strip().splitlines()
    assert not (tmp_path / "run").exists()
    assert lines[-1].startswith(f"error: {recipe}: ") and not any(line.startswith("error") for line in lines[:-1])
    return lines[-1]


def word_level_tokenizer():
    """A tokenizer of whole words (the `tokenizers` library's WordLevel model): no kind trimming renumbers."""
    from tokenizers import Tokenizer, models, pre_tokenizers
    from transformers import PreTrainedTokenizerFast

    words = Tokenizer(models.WordLevel(vocab={"[UNK]": 0, "[PAD]": 1, "refund": 2}, unk_token="[UNK]"))
    words.pre_tokenizer = pre_tokenizers.Whitespace()
    return PreTrainedTokenizerFast(tokenizer_object=words, unk_token="[UNK]", pad_token="[PAD]")


HEADS = {"prune": {"enabled": True, "heads_removed": 1}}
REFUSALS = {  # family, tokenizer (None: its own), recipe sections, what the line says
    "mpnet heads": ("mpnet", None, HEADS, "step student-pruned cannot remove attention heads of a 'mpnet' model "
                    "(its relative position bias is one per head of the whole model)"),
    "deberta-v2 heads": ("deberta-v2", None, HEADS, "cannot remove attention heads of a 'deberta-v2' model"),
    "modernbert heads": ("modernbert", None, HEADS, "cannot remove attention heads of a 'modernbert' model "
                         "(transformers builds each of its layers with hidden_size / num_attention_heads-wide heads"),
    "modernbert first layer": ("modernbert", None, {"student": {"layers": [1, 3]}},
                               "student.layers = [1, 3] — a 'modernbert' student of teacher layers [1, 3] cannot keep "
                               "each layer's own attention (global every 3 layers, else a 8-token window): the first "
                               "kept layer must be layer 0, the one without an attention norm (not 1); "
                               "e.g. student.layers: [0, 3]"),
    "modernbert one layer": ("modernbert", None, {"student": {"num_layers": 1}},
                             "student.num_layers = 1 — a 'modernbert' student of teacher layers [3]"),
    "albert kept layers": ("albert", None, {}, "student.init = teacher_layers — a 'albert' model shares one "
                           "layer's weights across its depth, so step student cannot keep some of its layers"),
    "albert pruning": ("albert", None,
                       {"student": {"init": "config"}, "prune": {"enabled": True, "neurons_removed_share": 0.25}},
                       "prune.enabled — step student-pruned supports bert, roberta, xlm-roberta, camembert, electra, "
                       "distilbert, mpnet, deberta-v2, modernbert; the teacher is 'albert'"),
    "funnel kept layers": ("funnel", None, {}, "student.init = teacher_layers — step student finds no list of layers "
                           "in a 'funnel' model to keep some of; use init: pretrained or config"),
    "word-level trimming": ("bert", word_level_tokenizer, {"trim_vocab": {"enabled": True}},
                            "trim_vocab.enabled — the tokenizer of the 'bert' teacher is WordLevel; step "
                            "student-trimmed rebuilds WordPiece, BPE, Unigram tokenizers only"),
}


@pytest.mark.parametrize("case", list(REFUSALS))
def test_what_a_family_cannot_do_is_refused_in_one_line_with_exit_2_before_anything_runs(case, tmp_path, family_data,
                                                                                          capsys):
    family, tokenizer, sections, says = REFUSALS[case]
    base = own_classifier(family, tmp_path / "own", tokenizer() if tokenizer else None)
    assert says in _refusal(tmp_path, base, family_data, capsys, **sections)


def test_models_are_fed_only_the_inputs_they_take(tmp_path, family_data):
    """DistilBERT's forward takes no token_type_ids and RoBERTa has one segment embedding, while the bundled
    WordPiece tokenizer gives second-segment ids of 1 for pairs: both read pairs without them."""
    from shrinkwrap.chain.runner import run_chain
    from shrinkwrap.ml.models import load_tokenizer, model_inputs
    from shrinkwrap.recipe.schema import load_recipe

    assert "token_type_ids" in model_inputs(tiny_config("bert", 100))
    for family in ("distilbert", "roberta", "deberta-v2"):
        assert model_inputs(tiny_config(family, 100)) == ["input_ids", "attention_mask"]
    rows = [(t.split()[0], " ".join(t.split()[1:]), y) for t, y in keyword_rows(60)]
    data = write_csv(tmp_path / "pairs.csv", rows, header=("subject", "body", "label"))
    for family in ("distilbert", "roberta"):
        base = own_classifier(family, tmp_path / family, bundled_tokenizer())
        assert "token_type_ids" not in load_tokenizer(str(base))("a", "b")
        raw = tiny_recipe(base, data, bench={"repeats": 3, "warmup": 0, "warm_seconds": 0, "timed_seconds": 0})
        raw["teacher"] = {"base": str(base), "trained": True, "max_length": 30}
        raw["data"].update(text="subject", text_pair="body")
        results = run_chain(load_recipe(write_recipe(tmp_path / f"{family}.yaml", raw)), tmp_path / f"run-{family}",
                            quiet=True, until="teacher")
        assert len(results["steps"][0]["predictions"]) == results["data"]["sizes"]["test"]


def test_a_graph_whose_if_branch_reads_a_later_value_is_sorted(tmp_path):
    """What ONNX Runtime's quantiser leaves in DeBERTa-v2's graph, in miniature: an If whose branch reads an
    outer value that a later node defines. onnx.checker (the reference) refuses it; sorted, it passes and
    ONNX Runtime computes the same."""
    import numpy as np
    import onnx
    from onnx import TensorProto, helper

    from shrinkwrap.ml.convert import sort_topologically
    from shrinkwrap.serve.sessions import session

    def branch(name):
        return helper.make_graph([helper.make_node("Identity", ["doubled"], [f"{name}_out"])], name, [],
                                 [helper.make_tensor_value_info(f"{name}_out", TensorProto.FLOAT, [1])])

    nodes = [helper.make_node("If", ["cond"], ["y"], then_branch=branch("then"), else_branch=branch("else")),
             helper.make_node("Add", ["x", "x"], ["doubled"]),
             helper.make_node("Constant", [], ["cond"], value=helper.make_tensor("c", TensorProto.BOOL, [], [True]))]
    graph = helper.make_graph(nodes, "g", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1])])
    path = tmp_path / "m.onnx"
    onnx.save(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 18)]), str(path))
    with pytest.raises(onnx.checker.ValidationError, match="topologically sorted"):
        onnx.checker.check_model(str(path), full_check=True)
    sort_topologically(path)
    onnx.checker.check_model(str(path), full_check=True)
    assert [n.op_type for n in onnx.load(str(path)).graph.node] == ["Add", "Constant", "If"]
    out = session(path, 1).run(None, {"x": np.array([1.5], dtype=np.float32)})[0]
    assert out.tolist() == [3.0]


EPOCHS = {"distilbert": 8, "modernbert": 3}


@pytest.mark.parametrize("family", list(EPOCHS))
def test_a_family_s_encoder_is_fine_tuned_too(family, tmp_path, keyword_csv):
    """teacher.trained: false on an encoder without a head (DistilBERT with the WordPiece tokenizer, which gives
    segment ids DistilBERT does not take; ModernBERT with its byte-level BPE): the fresh head is fine-tuned."""
    import torch
    from transformers import AutoModel

    from shrinkwrap.chain.runner import run_chain
    from shrinkwrap.recipe.schema import load_recipe

    tok = TOKENIZERS[family]()
    torch.manual_seed(0)
    config = tiny_config(family, len(tok), tok.pad_token_id, tok.cls_token_id, tok.sep_token_id)
    AutoModel.from_config(config).save_pretrained(tmp_path / "encoder", safe_serialization=True)
    tok.save_pretrained(tmp_path / "encoder")
    # The tiny DistilBERT needs its 8 epochs to beat the majority class; ModernBERT gets there in 3.
    raw = tiny_recipe(tmp_path / "encoder", keyword_csv, teacher={"max_length": 30, "epochs": EPOCHS[family]},
                      bench={"repeats": 3, "warmup": 0, "warm_seconds": 0, "timed_seconds": 0})
    results = run_chain(load_recipe(write_recipe(tmp_path / "r.yaml", raw)), tmp_path / "run", quiet=True,
                        until="teacher")
    info = results["steps"][0]["info"]
    assert info["kept_seed"] == 0 and info["seeds"][0]["steps"] > 0
    assert results["steps"][0]["metrics"]["accuracy"] is not None
