"""Data: the stratified split's proportions, and the same rows read from CSV, JSONL, Parquet and a
`datasets` folder; the shipped recipes load and validate."""

import numpy as np
import pandas as pd
import pytest
from conftest import ROOT, keyword_rows, tiny_recipe, write_csv, write_recipe
from sklearn.model_selection import train_test_split

from shrinkwrap.ml.data import load_dataset
from shrinkwrap.recipe.schema import load_recipe


def _cfg(tmp_path, base, data):
    return load_recipe(write_recipe(tmp_path / "r.yaml", tiny_recipe(base, data))).data


def _imbalanced(n=(100, 50, 25)):
    return [(f"text {c} {i}", c) for c, k in zip("abc", n) for i in range(k)]


def test_stratified_split_matches_scikit_learn_and_keeps_class_shares(tmp_path, tiny_base):
    rows = _imbalanced()
    data = write_csv(tmp_path / "d.csv", rows)
    cfg = _cfg(tmp_path, tiny_base, data)
    ds = load_dataset(cfg, data, "d.csv")
    n = len(rows)
    # Sizes by hand: test = ceil(0.2 * 175) = 35, validation = ceil(0.15 * 175) = 27, train = 113.
    assert (len(ds.train), len(ds.validation), len(ds.test)) == (113, 27, 35)
    # Stratification: each split holds each class in the share it has overall (4/7, 2/7, 1/7), within one row.
    for split in (ds.train, ds.validation, ds.test):
        counts = np.bincount(split.labels, minlength=3)
        shares = np.array([100, 50, 25]) / n
        assert np.all(np.abs(counts - shares * len(split)) <= 1), counts
    # Source: scikit-learn's train_test_split run here with the same sizes and seed gives the same rows.
    df = pd.DataFrame(rows, columns=["text", "label"])
    rest, test = train_test_split(df, test_size=35, stratify=df["label"], random_state=cfg.seed)
    train, val = train_test_split(rest, test_size=27, stratify=rest["label"], random_state=cfg.seed)
    assert ds.test.texts == test["text"].tolist()
    assert ds.validation.texts == val["text"].tolist()
    assert ds.train.texts == train["text"].tolist()


def test_jsonl_parquet_and_a_datasets_folder_read_the_same_rows_as_csv(tmp_path, tiny_base):
    import datasets

    rows = keyword_rows(60)
    df = pd.DataFrame(rows, columns=["text", "label"])
    csv = write_csv(tmp_path / "d.csv", rows)
    df.to_json(tmp_path / "d.jsonl", orient="records", lines=True)
    df.to_parquet(tmp_path / "d.parquet")
    datasets.Dataset.from_pandas(df, preserve_index=False).save_to_disk(str(tmp_path / "folder"))
    cfg = _cfg(tmp_path, tiny_base, csv)
    expected = load_dataset(cfg, csv, "csv").fingerprint()
    for path in (tmp_path / "d.jsonl", tmp_path / "d.parquet", tmp_path / "folder"):
        assert load_dataset(cfg, path, str(path)).fingerprint() == expected, path


def test_a_run_from_a_datasets_folder_with_its_own_splits(tmp_path, tiny_base):
    import datasets

    from shrinkwrap.chain.runner import run_chain

    parts = {"train": keyword_rows(150, seed=1), "validation": keyword_rows(30, seed=2), "test": keyword_rows(30, seed=3)}
    datasets.DatasetDict({k: datasets.Dataset.from_pandas(pd.DataFrame(v, columns=["text", "label"]))
                          for k, v in parts.items()}).save_to_disk(str(tmp_path / "dd"))
    recipe = load_recipe(write_recipe(tmp_path / "r.yaml", tiny_recipe(tiny_base, tmp_path / "dd")))
    ds = load_dataset(recipe.data, tmp_path / "dd", "dd")
    assert [len(ds.train), len(ds.validation), len(ds.test)] == [150, 30, 30]   # kept as given, not re-split
    assert ds.test.texts == [t for t, _ in parts["test"]]
    results = run_chain(recipe, tmp_path / "run", quiet=True, until="teacher")
    assert results["steps"][0]["name"] == "teacher" and (tmp_path / "run" / "teacher" / "step.json").exists()


@pytest.mark.parametrize("name", ["demo.yaml", "bbc-news.yaml"])
def test_shipped_recipes_load_and_validate(name):
    from shrinkwrap.chain.preflight import prepare  # noqa: F401  (the recipe must also be what preflight reads)

    recipe = load_recipe(ROOT / "recipes" / name)
    assert recipe.name and recipe.teacher.epochs >= 1 and recipe.student.num_layers >= 1
    assert 0 < recipe.data.test_size < 1
