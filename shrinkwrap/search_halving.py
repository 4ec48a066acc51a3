"""`search.strategy: halving`: successive halving (Jamieson & Talwalkar 2016, with halving rate 2).
Every candidate left after the latency and size screen gets a short distillation (search.short_epochs);
the better half by validation accuracy goes on with twice as many epochs, and so on until the epochs
reach student.epochs — the candidates still in then train in full, as with `grid`."""
from __future__ import annotations

import math

from shrinkwrap import distributed
from shrinkwrap.results import step_named


def validation_accuracy(results: dict) -> float:
    """The best validation accuracy of the last trained student step (recovery of a pruned one first)."""
    for name in ("student-pruned", "student"):
        row = step_named(results, name)
        if row is None:
            continue
        info = row["info"].get("recovery", {}) if name == "student-pruned" else row["info"]
        curve, best = info.get("curve"), info.get("best_epoch")
        if curve and best:
            return float(curve[best - 1]["accuracy"])
    return float("-inf")


def _short(recipe, epochs: int):
    short = recipe.model_copy(deep=True)
    short.student.epochs = epochs
    return short


def halving(search, order: list[int]) -> list[int]:
    """The candidates (in `order`, cheapest first) that reach full training; the others' rows are filled
    in from their short run and say at which round they were dropped."""
    from shrinkwrap.search import HALVING

    alive, epochs = list(order), search.recipe.search.short_epochs
    full = min(search.space.candidates[i].recipe.student.epochs for i in alive)
    while len(alive) > 1 and epochs < full:
        search.log(f"successive halving: {len(alive)} candidates, {epochs} epoch(s) each")
        done = search.train(alive, lambda c: _short(c.recipe, epochs), HALVING, f"-e{epochs}")
        if distributed.is_main():
            alive = _better_half(search, alive, done, epochs)
        alive = distributed.share(alive)  # under a launcher every process trains the same ones next
        epochs *= 2
    return alive


def _better_half(search, alive: list[int], done: dict[int, dict], epochs: int) -> list[int]:
    """The better half of `alive` by validation accuracy after the short runs `done`; the others' rows
    are filled in from their short run and say at which round they were dropped."""
    alive = [i for i in alive if i in done]  # a candidate whose run failed has its reason already
    score = {i: validation_accuracy(done[i]) for i in alive}
    ranked = sorted(alive, key=lambda i: -score[i])  # stable: ties keep the cheaper first
    keep = set(ranked[: math.ceil(len(alive) / 2)])
    for i in ranked[len(keep):]:
        final = done[i]["steps"][-1]
        search.rows[i].update(trained=True, accuracy=final["metrics"]["accuracy"],
                              accuracy_drop=final["accuracy_drop"],
                              reason=f"dropped by successive halving after {epochs} epoch(s): validation "
                                     f"accuracy {score[i]:.4f}, not in the better {len(keep)} of {len(alive)}")
        search.log(f"candidate {i} {search.space.candidates[i].label()}: {search.rows[i]['reason']}")
    return [i for i in alive if i in keep]
