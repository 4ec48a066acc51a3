"""`shrinkwrap search`: say the budget, get the most accurate candidate that meets it.

Latency and size depend on a candidate's shapes, not on its weights, so most candidates that cannot
meet the budget are found before any training. In order:

1. the teacher, fine-tuned once (an ordinary run stopped after the teacher step); its outputs on the
   training texts are cached once, in a cache folder every candidate's run folder shares;
2. every candidate's *untrained* student: an ordinary run of the candidate's recipe with nothing trained
   (the teacher's layers kept, pruned to its shapes, its vocabulary cut, exported and made int8 by the
   chain's own steps), timed with the teacher in interleaved rounds and sized: a candidate that cannot
   meet the latency or size limits is never trained;
3. the others trained cheapest first (lowest untrained p95 first), each an ordinary run of the recipe
   with its settings applied, in a run folder of its own that a rerun reuses step by step; a student
   another candidate already trained with the same student settings is copied in, not trained again
   (a pruned candidate starts from the unpruned student of its depth);
4. every trained candidate and the teacher timed again together, in interleaved rounds;
5. the winner — the most accurate candidate meeting every limit, ties to the faster — gets its artifact (an
   embedding search ranks by neighbour recall at 10 where a classification one ranks by accuracy).

Every run goes through the chain's one door, shrinkwrap.chain.pipeline.run_recipe. Under `accelerate
launch` / `torchrun` every process takes part in each run exactly as in `shrinkwrap run` (the main process
writes); the timing, the choices and the files are the main process's, and the candidates it picks are
sent to the others.
"""
from __future__ import annotations

import shutil
import sys
from pathlib import Path
from typing import Callable, Optional

from shrinkwrap.chain.pipeline import run_recipe
from shrinkwrap.ml import distributed
from shrinkwrap.outputs.checks import FAIL, SKIP, Check
from shrinkwrap.outputs.gate import MAX_RETIMES, TIMED_LIMITS, evaluate, speed_size_checks
from shrinkwrap.outputs.results import final_row, recipe_dump, teacher_row, validation_labels, validation_of
from shrinkwrap.search.folders import CACHE, link_copy, share_cache
from shrinkwrap.search.halving import FOLDER as HALVING
from shrinkwrap.search.halving import halving
from shrinkwrap.search.ranking import MEASURES, Measure, miss, pareto_frontier, pick_winner, relative_miss, tied
from shrinkwrap.search.space import Candidate, Space
from shrinkwrap.serve.errors import EXIT_BUDGET, EXIT_OK, StepFailed
from shrinkwrap.serve.rundir import (ARTIFACT_DIR, RESULTS_FILE, STEP_FILE, STUDENT, TEACHER, read_json_or_none,
                                     run_lock, scratch, write_json_atomic)

SEARCH_FILE = "search.json"
TEACHER_RUN, CANDIDATES, UNTRAINED = "teacher-run", "candidates", "untrained"
# Which heads and neurons an untrained candidate loses does not change its shapes: a few texts decide them.
SCREEN_IMPORTANCE_TEXTS = 8


def _row(c: Candidate, m: Measure) -> dict:
    return {"settings": c.settings, "trained": False, "meets_budget": False, m.score: None,
            m.drop: None, m.validation: None, "tied_with_winner": False, "latency_ms": None,
            "speedup": None, "size_bytes": None, "reason": None, "cautions": None}


def _validation_score(row: dict, m: Measure) -> Optional[float]:
    validation = validation_of(row)
    return validation["metrics"].get(m.score) if validation else None


def _figures(results: dict, m: Measure) -> dict:
    """A trained candidate's row figures: its shipped step's test figure, its drop against the teacher in points,
    and its validation figure."""
    final = final_row(results)
    drop = (teacher_row(results)["metrics"][m.score] - final["metrics"][m.score]) * 100
    return {m.score: final["metrics"][m.score], m.drop: final.get(m.drop, round(drop, 4)),
            m.validation: _validation_score(final, m)}


def _lat(row: dict) -> dict:
    return {"p50": row["p50"], "p95": row["p95"]}


def untrained(recipe):
    """A candidate's recipe as its screen runs it: the same shapes, nothing trained (no distillation, no
    recovery after pruning) and none of the steps that are only measured."""
    r = recipe.model_copy(deep=True)
    r.student.epochs = 0
    r.prune.epochs = 0
    r.prune.importance_texts = SCREEN_IMPORTANCE_TEXTS
    r.quantize.enabled = False
    r.onnx_quantize.static = False
    r.onnx_quantize.dynamic = False
    return r


def _short(recipe, epochs: int):
    short = recipe.model_copy(deep=True)
    short.student.epochs = epochs
    return short


class Search:
    def __init__(self, space: Space, out: Path, quiet: bool = False):
        self.space, self.out, self.quiet = space, Path(out), quiet or not distributed.is_main()
        self.recipe, self.budget = space.recipe, space.recipe.budget
        self.measure = MEASURES[space.recipe.task]   # what candidates are ranked by: accuracy, or neighbour recall
        self.rows = [_row(c, self.measure) for c in space.candidates]
        self.checks: dict[int, list[Check]] = {}      # candidate -> its limits, as last measured
        self.results: dict[int, dict] = {}             # trained candidate -> its run's results

    def log(self, message: str) -> None:
        if not self.quiet:
            print(f"[search] {message}", file=sys.stderr, flush=True)

    # ---- (1) the teacher ---------------------------------------------------------------------------
    def teacher(self) -> None:
        run = self.out / TEACHER_RUN
        if distributed.is_main():
            share_cache(run, self.out / CACHE)
        distributed.barrier()
        self.log("teacher: fine-tuned once for every candidate (reused when finished)")
        self.teacher_results = run_recipe(self.recipe, run, quiet=True, until=TEACHER)
        self.teacher_dir = run / TEACHER

    # ---- (2) untrained candidates: exported, int8, timed, sized ---------------------------------------
    def screen_runs(self) -> dict[int, dict]:
        """Every candidate's untrained run (in every process: the chain's steps run in all of them)."""
        self.log(f"{len(self.rows)} candidates: each untrained student through the chain's own steps to its "
                 f"shipped form (reused when made before)")
        return self.train(list(range(len(self.rows))), untrained, UNTRAINED, measure=False)

    def screen(self, runs: dict[int, dict]) -> list[int]:
        """The candidates that can meet the latency and size limits untrained, cheapest first. A candidate is
        refused only when it misses a limit by more than its timing's own spread across rounds; one within it is
        timed again with the teacher first, and trained if it is still within it."""
        folder = {i: Path(final_row(runs[i])["path"]) for i in runs}
        size = {i: final_row(runs[i])["size_bytes"] for i in runs}
        b = self.recipe.bench
        self.log(f"timing the {len(runs)} untrained candidates with the teacher, {self.recipe.search.rounds} "
                 f"interleaved rounds (batch {b.batch_size} × {b.sequence_length} tokens, {b.threads} threads)")
        latency = self._with_teacher(sorted(runs), [folder[i] for i in sorted(runs)])
        close = [i for i in sorted(runs) if self._misses(i, *latency[i], size[i]) == "close"]
        if close:
            self.log(f"timing again, with the teacher, the {len(close)} candidate(s) that miss a latency limit by "
                     f"less than their timing's spread")
            latency.update(self._with_teacher(close, [folder[i] for i in close]))
        survivors = []
        for i in sorted(runs):
            verdict = self._misses(i, *latency[i], size[i])
            row, lat = self.rows[i], latency[i][0]
            line = (f"candidate {i} {self.space.candidates[i].label()}: untrained p95 {lat['p95']:.2f} ms, "
                    f"{row['speedup']:.2f}× the teacher, {size[i] / 1e6:.2f} MB")
            if verdict == "fails":
                row["reason"] = "not trained — " + "; ".join(miss(k) for k in self.checks[i] if k.verdict == FAIL)
                self.log(f"{line} — {row['reason']}")
            else:
                survivors.append(i)
                self.log(f"{line} — to train" + (" (within its timing's spread of a latency limit)"
                                                 if verdict == "close" else ""))
        return sorted(survivors, key=lambda i: self.rows[i]["latency_ms"]["p95"])

    def _misses(self, i: int, lat: dict, teacher: dict, size: int) -> str:
        """"meets", "close" (every limit it misses is a latency limit missed by less than the spread of its own
        timing and the teacher's across rounds: no evidence) or "fails"; the row and self.checks get the figures."""
        checks = self._limits(self.rows[i], lat, size, teacher)
        self.checks[i] = checks
        failed = [k for k in checks if k.verdict == FAIL]
        if not failed:
            return "meets"
        slack = lat.get("spread", 0.0) + teacher.get("spread", 0.0)
        return "close" if all(k.name in TIMED_LIMITS and relative_miss(k) <= slack for k in failed) else "fails"

    def _with_teacher(self, candidates: list[int], folders: list[Path]) -> dict[int, tuple[dict, dict]]:
        """candidate -> (its latency, the teacher's): each folder's model timed with the teacher in interleaved
        rounds, on the batch each was benchmarked on; the teacher's last figures are kept (teacher_latency)."""
        from shrinkwrap.bench.rounds import time_folders

        timed = time_folders([self.teacher_dir, *folders], self.recipe.bench, self.recipe.search.rounds)
        self.teacher_latency = timed[0]
        return {i: (lat, timed[0]) for i, lat in zip(candidates, timed[1:])}

    def _limits(self, row: dict, lat: dict, size: int, teacher: dict) -> list[Check]:
        """The latency and size limits of a candidate timed with the teacher (its row gets the figures)."""
        b = self.recipe.bench
        row.update(latency_ms=_lat(lat), speedup=teacher["p95"] / lat["p95"], size_bytes=size)
        return speed_size_checks(self.budget, lat["p95"], size, teacher["p95"],
                                 teacher_row(self.teacher_results)["size_bytes"], lat["p95_over_reference"],
                                 f"batch {b.batch_size} × {b.sequence_length} tokens")

    # ---- (3) training ----------------------------------------------------------------------------------
    def train(self, order: list[int], recipe_of: Callable = lambda r: r, where: str = CANDIDATES,
              suffix: str = "", measure: bool = True) -> dict[int, dict]:
        """Runs each candidate in `order` (an ordinary run of `recipe_of(its recipe)` in its own folder);
        returns its results, leaving out a candidate whose run failed (its row says why)."""
        done: dict[int, dict] = {}
        for k, i in enumerate(order):
            c = self.space.candidates[i]
            recipe = recipe_of(c.recipe)
            folder = self.out / where / (c.folder_name + suffix)
            reused = self._prepare_folder(folder, recipe, where, suffix) if distributed.is_main() else False
            distributed.barrier()  # the folder is ready before any process runs in it
            finished = (read_json_or_none(folder / RESULTS_FILE) or {}).get("recipe_fingerprint") == recipe.fingerprint()
            if measure:
                self.log(f"training {k + 1}/{len(order)}: candidate {i} {c.label()}"
                         + (f", {recipe.student.epochs} epoch(s)" if suffix else "")
                         + (" (finished before: reusing it)" if finished else
                            " (its student copied from a candidate with the same student settings)" if reused else ""))
            try:
                done[i] = run_recipe(recipe, folder, quiet=True, measure=measure)
            except StepFailed as e:  # one candidate that cannot be trained does not end the search
                if distributed.launched():  # ...except under a launcher: the other processes are inside its run
                    raise
                self.rows[i]["reason"] = f"its run failed — {e}"
                self.log(f"candidate {i} {c.label()}: {self.rows[i]['reason']}")
        return done

    def _prepare_folder(self, folder: Path, recipe, where: str, suffix: str) -> bool:
        """The teacher (hard links) and the shared cache; a finished student of the same settings, if any."""
        folder.mkdir(parents=True, exist_ok=True)
        share_cache(folder, self.out / CACHE)
        teacher_fp = read_json_or_none(self.teacher_dir / STEP_FILE)["fingerprint"]
        if (read_json_or_none(folder / TEACHER / STEP_FILE) or {}).get("fingerprint") != teacher_fp:
            link_copy(self.teacher_dir, folder / TEACHER)
        if (folder / STUDENT / STEP_FILE).exists():
            return False
        student = recipe.model_dump(mode="json")["student"]
        for other in (self.out / where).glob(f"c-*{suffix}"):
            results = read_json_or_none(other / RESULTS_FILE)
            if (other != folder and results and recipe_dump(results).get("student") == student
                    and (other / STUDENT / STEP_FILE).exists()):
                link_copy(other / STUDENT, folder / STUDENT)  # the runner checks its fingerprint
                return True
        return False

    def halving(self, order: list[int]) -> list[int]:
        """Successive halving of `order`; the rows of those dropped are filled in from their short run."""
        def train(alive: list[int], epochs: int) -> dict[int, dict]:
            return self.train(alive, lambda r: _short(r, epochs), HALVING, f"-e{epochs}")

        full = min(self.space.candidates[i].recipe.student.epochs for i in order)
        alive, dropped = halving(order, self.recipe.search.short_epochs, full, train, self.log)
        for i, (results, reason) in dropped.items():
            self.rows[i].update(trained=True, reason=reason, **_figures(results, self.measure))
            self.log(f"candidate {i} {self.space.candidates[i].label()}: {reason}")
        return alive

    def record_trained(self, i: int, results: dict) -> None:
        from shrinkwrap.outputs.findings import cautions

        # what the candidate's average hides (a class much worse, a drop the test split cannot settle, a tail)
        self.rows[i].update(trained=True, cautions=cautions(results, self.budget), **_figures(results, self.measure))
        self.results[i] = results

    # ---- (4) timing again, together --------------------------------------------------------------------
    def retime(self) -> None:
        trained = sorted(self.results)
        if not trained:
            return
        self.log(f"timing the {len(trained)} trained candidates with the teacher again, "
                 f"{self.recipe.search.rounds} interleaved rounds")
        folders = [Path(final_row(self.results[i])["path"]) for i in trained]
        latency = self._with_teacher(trained, folders)
        for _ in range(MAX_RETIMES):  # as the gate: never judged on a timing the machine made unstable
            if not any(lat["unstable"] or teacher["unstable"] for lat, teacher in latency.values()):
                break
            self.log("the machine was busy (unstable timings): timing them all together again")
            latency = self._with_teacher(trained, folders)
        rest = self.budget.model_copy(update={k: None for k in self.budget.speed_size_limits()})
        for i, (lat, teacher) in latency.items():
            row, results = self.rows[i], self.results[i]
            size = final_row(results)["size_bytes"]
            checks = self._limits(row, lat, size, teacher)
            if lat["unstable"] or teacher["unstable"]:
                why = lat.get("unstable_why") or f"the teacher: {teacher.get('unstable_why')}"
                checks = [Check(k.name, f"the measurement could not be trusted — {why}", k.allowed, k.measured,
                                k.comparison, k.unit, FAIL) if k.name in TIMED_LIMITS else k for k in checks]
            if rest.limits_set():
                checks += [k for k in evaluate(results, rest).checks if k.verdict != SKIP]
            self.checks[i] = checks
            failed = [k for k in checks if k.verdict == FAIL]
            row["meets_budget"] = not failed
            if row["reason"] is None:
                row["reason"] = "; ".join(miss(k) for k in failed) if failed else "meets every limit"
            m = self.measure
            self.log(f"candidate {i} {self.space.candidates[i].label()}: {m.label} {row[m.score]:.4f} "
                     f"(drop {row[m.drop]:.2f} points), p95 {lat['p95']:.2f} ms, {row['speedup']:.2f}× the "
                     f"teacher, {size / 1e6:.2f} MB — {row['reason']}")

    def _validation(self) -> tuple[dict[int, list], Optional[list]]:
        """Each trained candidate's answer per validation text (a classifier's predicted class, with the true
        classes; an encoder's neighbour recall, with no labels)."""
        val = {i: validation_of(final_row(r))["predictions"] for i, r in self.results.items()
               if validation_of(final_row(r))}
        if self.measure is not MEASURES["classification"]:
            return val, None
        labels = next((validation_labels(r) for r in self.results.values()), None)
        return val, labels

    # ---- (5) the winner ----------------------------------------------------------------------------------
    def finish(self) -> dict:
        from shrinkwrap.search.report import write_search_report

        val, labels = self._validation()
        m = self.measure
        drop = self.budget.accuracy_drop_points if m is MEASURES["classification"] else None
        group = set(tied(self.rows, val, labels, drop, m))
        for i, row in enumerate(self.rows):
            row["tied_with_winner"] = i in group
        summary = {"candidates": self.rows, "frontier": pareto_frontier(self.rows, m),
                   "winner": pick_winner(self.rows, val, labels, drop, m)}
        if m is not MEASURES["classification"]:
            summary["ranked_by"] = m.score
        w = summary["winner"]
        if w is not None:
            src = self.out / CANDIDATES / self.space.candidates[w].folder_name / ARTIFACT_DIR
            with scratch(self.out / ARTIFACT_DIR) as tmp:
                shutil.copytree(src, tmp, dirs_exist_ok=True)
        elif (self.out / ARTIFACT_DIR).exists():  # an earlier search's winner is not this one's
            shutil.rmtree(self.out / ARTIFACT_DIR)
        write_json_atomic(self.out / SEARCH_FILE, summary)
        write_search_report(summary, self.budget, self.teacher_latency, self.out, self.space.candidates,
                            teacher_row(self.teacher_results)["metrics"][m.score], m)
        return summary

    def closest(self) -> str:
        """The candidate nearest to meeting the budget (smallest sum of relative misses) and its misses."""
        scored = [(sum(relative_miss(k) for k in checks if k.verdict == FAIL), i)
                  for i, checks in self.checks.items()]
        if not scored:
            return "no candidate could be measured"
        _, i = min(scored)
        misses = "; ".join(miss(k) for k in self.checks[i] if k.verdict == FAIL)
        return f"closest: candidate {i} {self.space.candidates[i].label()} — {misses}"


def run_search(space: Space, out: Path, quiet: bool = False) -> tuple[dict, int, str]:
    """Runs the search; returns (search.json's content, exit code, the closing line)."""
    s = Search(space, out, quiet)
    if not distributed.is_main():  # a helper process: it runs what the main one picks, nothing else
        s.teacher()
        s.screen_runs()
        order = distributed.share(None)
        if order and space.recipe.search.strategy == "halving":
            order = s.halving(order)
        if order:
            s.train(order)
        return {}, EXIT_OK, ""
    with run_lock(s.out):
        s.teacher()
        order = distributed.share(s.screen(s.screen_runs()))
        if not order:
            summary = s.finish()
            return summary, EXIT_BUDGET, (f"no candidate can meet the latency and size limits, so none was trained "
                                          f"— {s.closest()}")
        if space.recipe.search.strategy == "halving":
            order = s.halving(order)
        for i, results in s.train(order).items():
            s.record_trained(i, results)
        s.retime()
        summary = s.finish()
    w = summary["winner"]
    if w is None:
        return summary, EXIT_BUDGET, f"no candidate meets the budget — {s.closest()}"
    row, m = s.rows[w], s.measure
    val = row[m.validation]
    others = sum(r["tied_with_winner"] for r in s.rows) - 1
    return summary, EXIT_OK, (f"winner: candidate {w} {space.candidates[w].label()} — {m.label} {row[m.score]:.4f} "
                              f"(drop {row[m.drop]:.2f} points)"
                              + (f", validation {val:.4f}" if val is not None else "")
                              + (f", the fastest of {others + 1} tied on validation" if others else "")
                              + f", p95 {row['latency_ms']['p95']:.2f} ms, {row['speedup']:.2f}× the teacher, "
                              f"{row['size_bytes'] / 1e6:.2f} MB; artifact: {s.out / ARTIFACT_DIR}")
