"""`shrinkwrap search`, student.max_length and the teacher-relative budget keys, on the tiny model."""
import itertools
import json
import random

import pytest
from conftest import tiny_recipe, write_recipe

from shrinkwrap.cli import main
from shrinkwrap.search.ranking import pareto_frontier, pick_winner

ROW_KEYS = {"cautions", "settings", "trained", "meets_budget", "accuracy", "accuracy_drop", "latency_ms", "speedup", "size_bytes",
            "reason", "validation_accuracy", "tied_with_winner"}


def brute_force_frontier(rows):
    """Pareto front by the textbook definition, written independently: a point is on it when no other
    point is >= in accuracy and <= in p95 and size with at least one of the three strictly better."""
    pts = {i: (r["accuracy"], r["latency_ms"]["p95"], r["size_bytes"]) for i, r in enumerate(rows)
           if r["accuracy"] is not None}
    front = []
    for i, (a, p, s) in pts.items():
        dominated = False
        for j, (a2, p2, s2) in pts.items():
            if j != i and (a2, -p2, -s2) != (a, -p, -s) and a2 >= a and p2 <= p and s2 <= s:
                dominated = True
        if not dominated:
            front.append(i)
    return sorted(front)


def _row(acc, p95, size, meets=True):
    return {"accuracy": acc, "latency_ms": None if p95 is None else {"p50": p95, "p95": p95}, "size_bytes": size,
            "meets_budget": meets}


def test_frontier_matches_a_brute_force_pareto_computation():
    rng = random.Random(0)
    for trial in range(200):
        n = rng.randint(1, 9)
        # few distinct values, so that ties on one or two criteria are common
        rows = [_row(rng.choice([0.8, 0.85, 0.9, None]), rng.choice([1.0, 2.0, 3.0]), rng.choice([10, 20]))
                for _ in range(n)]
        assert pareto_frontier(rows) == brute_force_frontier(rows), rows


def test_frontier_and_winner_on_a_worked_example():
    rows = [_row(0.90, 5.0, 100), _row(0.90, 4.0, 100),   # 1 beats 0: as accurate and small, faster
            _row(0.95, 9.0, 200), _row(0.80, 1.0, 300),   # 2 most accurate, 3 fastest: both on the front
            _row(None, 0.5, 50, meets=False)]             # untrained: never on the front
    assert pareto_frontier(rows) == [1, 2, 3]
    assert pick_winner(rows) == 2
    rows[2]["meets_budget"] = False
    assert pick_winner(rows) == 1               # 0.90 twice: the tie goes to the faster
    assert pick_winner([_row(0.9, 1, 1, meets=False)]) is None


def test_the_winner_is_the_fastest_of_those_tied_with_the_best_on_validation():
    # 200 validation texts. A is right on 180, B on 178 and C on 150; A and B disagree on only 6 texts.
    # Exact McNemar (McNemar 1947) by hand with scipy.stats.binomtest, two-sided at p = 1/2 on the discordant
    # texts: A-B 4 against 2 -> p = 0.69 (tied); A-C 32 against 2 -> p < 1e-6 (not tied).
    from scipy.stats import binomtest

    from shrinkwrap.search.ranking import TIE_P, tied

    labels = [0] * 200
    a = [0] * 180 + [1] * 20
    b = [0] * 176 + [1, 1, 1, 1] + [0, 0] + [1] * 18
    c = [0] * 150 + [1] * 50
    c[185], c[186] = 0, 0                      # C right on two texts A gets wrong
    assert binomtest(4, 6, 0.5).pvalue >= TIE_P > binomtest(32, 34, 0.5).pvalue
    rows = [_row(0.90, 5.0, 100), _row(0.89, 3.0, 100), _row(0.75, 1.0, 100)]
    for r, preds in zip(rows, (a, b, c)):
        r["validation_accuracy"] = sum(p == y for p, y in zip(preds, labels)) / len(labels)
    val = {0: a, 1: b, 2: c}
    assert tied(rows, val, labels, None) == [0, 1]
    assert pick_winner(rows, val, labels, None) == 1           # the faster of the tied pair
    assert pick_winner(rows, val, labels, 0.5) == 0            # 1 point apart on validation: more than 0.5 allowed
    rows[0]["meets_budget"] = False                            # the best that meets the budget is B now
    assert tied(rows, val, labels, None) == [1] and pick_winner(rows, val, labels, None) == 1


def _recipe(tmp_path, tiny_base, keyword_csv, search, **sections):
    r = tiny_recipe(tiny_base, keyword_csv, **sections)
    r["search"] = search
    return write_recipe(tmp_path / "search.yaml", r)


@pytest.mark.parametrize("search, words", [
    ({"student.num_layer": [1, 2]}, "search.student.num_layer — not a recipe key"),
    ({"teacher.epochs": [1, 2]}, "search.teacher.epochs — a search cannot change the teacher"),
    ({"data.seed": [0, 1]}, "search.data.seed — a search cannot change the data"),
    ({"train.precision": ["fp32"]}, "search cannot change the teacher's training"),
    ({"student.num_layers": []}, "search.student.num_layers = [] — an empty list"),
    ({"student.num_layers": 2}, "search.student.num_layers = 2 — expected a list"),
    ({"student.num_layers": [1, 0]}, "search.student.num_layers[1] = 0"),
    ({"student.num_layers": [2, 9]}, "student.num_layers = 9 — the teacher has 4 layers"),
    ({"student.max_length": [16, 64]}, "student.max_length = 64 — at most teacher.max_length (32)"),
    ({"prune.heads_removed": [0, 2]}, "prune.heads_removed = 2 — the student has 2 heads"),
    ({"strategy": "halving"}, "no search: section with key paths"),
])
def test_bad_search_sections_exit_2_before_anything_runs(tmp_path, tiny_base, keyword_csv, capsys, search, words):
    recipe = _recipe(tmp_path, tiny_base, keyword_csv, search)
    out = tmp_path / "out"
    assert main(["search", str(recipe), "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip()
    assert words in err and len(err.splitlines()) == 1, err
    assert not out.exists()


def test_search_set_options_and_prune_amounts(tmp_path, tiny_base, keyword_csv):
    """--set reaches the search section (nested, as key paths split on dots); a pruning amount above 0
    switches the pruning step on for its candidate only; every candidate's recipe is a validated Recipe."""
    from shrinkwrap.search.space import load_search

    recipe = _recipe(tmp_path, tiny_base, keyword_csv, {"prune.neurons_removed_share": [0.0, 0.5]})
    space = load_search(recipe, ["search.student.num_layers=[1, 2]", "search.strategy=halving"])
    assert space.recipe.search.strategy == "halving"
    assert [c.settings for c in space.candidates] == [
        {"prune.neurons_removed_share": a, "student.num_layers": n} for a in (0.0, 0.5) for n in (1, 2)]
    assert [c.recipe.prune.enabled for c in space.candidates] == [False, False, True, True]
    assert [c.recipe.student.num_layers for c in space.candidates] == [1, 2, 1, 2]
    assert len({c.folder_name for c in space.candidates}) == 4


def test_search_impossible_then_feasible_then_reused(tmp_path, tiny_base, keyword_csv, capsys):
    # Size separates the candidates exactly (it depends on shapes alone, unlike time on a shared machine):
    # the cut vocabulary makes the 1-layer student a few hundred kB, the full one about 1 MB.
    recipe = _recipe(tmp_path, tiny_base, keyword_csv,
                     {"trim_vocab.enabled": [False, True], "student.max_length": [16, 32], "rounds": 2},
                     teacher={"epochs": 3}, student={"num_layers": 1, "epochs": 2}, quantize={"enabled": False},
                     bench={"warm_seconds": 0},
                     budget={"size_mb": 0.6, "accuracy_drop_points": 100})
    out = tmp_path / "out"

    # 1. No candidate can be that fast: exit 1, nothing trained, the closest named with its miss.
    code = main(["search", str(recipe), "--out", str(out), "--set", "budget.latency_p95_ms=0.000001"])
    captured = capsys.readouterr()
    assert code == 1
    last = captured.out.strip().splitlines()[-1]
    assert last.startswith("no candidate can meet the latency and size limits") and "latency_p95_ms" in last
    assert "closest: candidate" in last
    summary = json.loads((out / "search.json").read_text())
    assert not (out / "candidates").exists() and not (out / "artifact").exists()
    assert [r["trained"] for r in summary["candidates"]] == [False] * 4
    assert all(r["reason"].startswith("not trained — latency_p95_ms") for r in summary["candidates"])
    assert summary["winner"] is None and summary["frontier"] == []

    # 2. The same folder, a budget the trimmed candidates meet: the teacher is reused, the untrimmed
    #    candidates are refused on size before training, the winner is the most accurate of the rest.
    assert main(["search", str(recipe), "--out", str(out)]) == 0
    log = capsys.readouterr().err
    assert "training 1/2" in log and "training 3/" not in log
    summary = json.loads((out / "search.json").read_text())
    assert set(summary) == {"candidates", "frontier", "winner"}
    rows = summary["candidates"]
    for r in rows:
        assert set(r) == ROW_KEYS
        assert set(r["latency_ms"]) == {"p50", "p95"}
    assert [r["settings"] for r in rows] == [{"trim_vocab.enabled": t, "student.max_length": n}
                                             for t, n in itertools.product([False, True], [16, 32])]
    for r in rows[:2]:  # the full vocabulary: refused on size, by how much said
        assert not r["trained"] and r["accuracy"] is None and r["size_bytes"] > 0.6e6
        assert r["reason"].startswith("not trained — size_mb") and "by " in r["reason"]
    for r in rows[2:]:
        assert r["trained"] and r["meets_budget"] and r["size_bytes"] < 0.6e6
        assert 0 <= r["accuracy"] <= 1 and r["speedup"] > 0
        assert isinstance(r["cautions"], list)  # each line also goes to stderr for the winner
    assert all(r["cautions"] is None for r in rows[:2])  # untrained: nothing measured to caution about
    meets = [i for i, r in enumerate(rows) if r["meets_budget"]]
    best = max(rows[i]["accuracy"] for i in meets)
    expected = min((i for i in meets if rows[i]["accuracy"] == best), key=lambda i: rows[i]["latency_ms"]["p95"])
    assert summary["winner"] == expected
    assert summary["frontier"] == brute_force_frontier(rows)
    # The winner's artifact, byte for byte, reading as many tokens as its candidate's max_length.
    from shrinkwrap.search.space import load_search

    space = load_search(recipe)
    folder = out / "candidates" / space.candidates[expected].folder_name
    shipped = json.loads((out / "artifact" / "manifest.json").read_text())
    assert shipped == json.loads((folder / "artifact" / "manifest.json").read_text())
    assert shipped["tokenizer"]["max_length"] == rows[expected]["settings"]["student.max_length"]
    for i in (2, 3):  # student.max_length reaches the benchmark of every student step and the artifact
        results = json.loads((out / "candidates" / space.candidates[i].folder_name / "results.json").read_text())
        n = rows[i]["settings"]["student.max_length"]
        assert results["steps"][0]["latency_ms"]["tokens_read"] == 32   # the teacher reads its own 32
        assert all(s["latency_ms"]["tokens_read"] == n for s in results["steps"][1:])
    assert "data:image/png;base64," in (out / "report.html").read_text()

    # 3. A rerun trains nothing again.
    before = {p: p.stat().st_mtime_ns for p in (out / "candidates").glob("*/student*/step.json")}
    assert main(["search", str(recipe), "--out", str(out)]) == 0
    assert "finished before: reusing it" in capsys.readouterr().err
    assert {p: p.stat().st_mtime_ns for p in (out / "candidates").glob("*/student*/step.json")} == before

    # 4. Successive halving over the same two survivors: one short epoch each, the better half goes on to
    #    full training (already finished above, so reused), the other is dropped with its reason.
    assert main(["search", str(recipe), "--out", str(out), "--set", "search.strategy=halving"]) == 0
    rows = json.loads((out / "search.json").read_text())["candidates"]
    assert sorted(p.name[-3:] for p in (out / "halving").iterdir()) == ["-e1", "-e1"]
    dropped = [i for i, r in enumerate(rows) if (r["reason"] or "").startswith("dropped by successive halving after "
                                                                                 "1 epoch(s)")]
    assert len(dropped) == 1 and rows[dropped[0]]["trained"] and not rows[dropped[0]]["meets_budget"]
    kept = ({2, 3} - set(dropped)).pop()
    assert rows[kept]["meets_budget"]
    assert json.loads((out / "search.json").read_text())["winner"] == kept


def test_teacher_relative_budget_keys_in_gate(tiny_run, tmp_path):
    """min_speedup and min_shrink against the teacher row of the same results: met just below the
    measured ratio, failed just above it."""
    from shrinkwrap.outputs.gate import evaluate
    from shrinkwrap.outputs.results import load
    from shrinkwrap.recipe.budget import BudgetConfig

    results = load(tiny_run / "results.json")
    teacher, final = results["steps"][0], results["steps"][-1]
    for row in (teacher, final):  # steady figures: the gate's re-timing of unstable ones is tested on its own
        row["latency_ms"]["unstable"] = False
    speedup = teacher["latency_ms"]["p95"] / final["latency_ms"]["p95"]
    shrink = teacher["size_bytes"] / final["size_bytes"]
    ok = evaluate(results, BudgetConfig(min_speedup=speedup * 0.99, min_shrink=shrink * 0.99))
    assert ok.exit_code == 0 and [c.name for c in ok.checks] == ["min_speedup", "min_shrink"]
    assert ok.checks[1].measured == pytest.approx(shrink)
    bad = evaluate(results, BudgetConfig(min_speedup=speedup * 1.01, min_shrink=shrink * 1.01))
    assert bad.exit_code == 1 and [c.name for c in bad.failed] == ["min_speedup", "min_shrink"]
