"""`search.strategy: halving`: successive halving (Jamieson & Talwalkar 2016, with halving rate 2).
Every candidate left after the latency and size screen gets a short distillation (search.short_epochs);
the better half by validation accuracy goes on with twice as many epochs, and so on until the epochs
reach student.epochs — the candidates still in then train in full, as with `grid`."""
from __future__ import annotations

import math
from typing import Callable

from shrinkwrap.ml import distributed
from shrinkwrap.outputs.results import final_row, recipe_dump, validation_accuracy, validation_of

FOLDER = "halving"  # the short runs' run folders, under the search folder


def halving(order: list[int], short_epochs: int, full_epochs: int,
            train: Callable[[list[int], int], dict[int, dict]],
            log: Callable[[str], None]) -> tuple[list[int], dict[int, tuple[dict, str]]]:
    """The candidates (in `order`, cheapest first) that reach full training, and for each one dropped on the
    way, (its last short run's results, why it was dropped). `train(candidates, epochs)` runs each candidate
    with that many epochs and returns {candidate: results}, leaving out those whose run failed."""
    alive, epochs, dropped = list(order), short_epochs, {}
    while len(alive) > 1 and epochs < full_epochs:
        log(f"successive halving: {len(alive)} candidates, {epochs} epoch(s) each")
        done = train(alive, epochs)
        if distributed.is_main():
            alive, out = better_half(alive, done, epochs)
            dropped.update(out)
        alive = distributed.share(alive)  # under a launcher every process trains the same ones next
        epochs *= 2
    return alive, dropped


def short_run_score(results: dict) -> tuple[float, str]:
    """(the figure a short run is ranked by, its name): a classifier's best validation accuracy of its student; an
    encoder's validation neighbour recall at 10 of its shipped step (-inf when not measured)."""
    if recipe_dump(results).get("task") == "embedding":
        validation = validation_of(final_row(results))
        value = validation["metrics"]["neighbour_recall_at_10"] if validation else float("-inf")
        return value, "neighbour recall at 10"
    return validation_accuracy(results), "accuracy"


def better_half(alive: list[int], done: dict[int, dict], epochs: int) -> tuple[list[int], dict[int, tuple[dict, str]]]:
    """The better half of `alive` by validation accuracy after the short runs `done` (ties keep the cheaper,
    earlier one), and the rest with why they were dropped."""
    alive = [i for i in alive if i in done]  # a candidate whose run failed has its reason already
    score = {i: short_run_score(done[i]) for i in alive}
    ranked = sorted(alive, key=lambda i: -score[i][0])  # stable: ties keep the cheaper first
    keep = set(ranked[: math.ceil(len(alive) / 2)])
    dropped = {i: (done[i], f"dropped by successive halving after {epochs} epoch(s): validation {score[i][1]} "
                            f"{score[i][0]:.4f}, not in the better {len(keep)} of {len(alive)}")
               for i in ranked[len(keep):]}
    return [i for i in alive if i in keep], dropped
