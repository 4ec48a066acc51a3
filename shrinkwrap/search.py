"""`shrinkwrap search`: say the budget, get the most accurate candidate that meets it.

Latency and size depend on a candidate's shapes, not on its weights, so most candidates that cannot
meet the budget are found before any training. In order:

1. the teacher, fine-tuned once (an ordinary run stopped after the teacher step); its outputs on the
   training texts are cached once, in a cache folder every candidate's run folder shares;
2. every candidate's *untrained* student (the teacher's layers kept, pruned to its shapes, its
   vocabulary cut) taken through the chain's export and int8 conversions, timed with the teacher in
   interleaved rounds and sized: a candidate that cannot meet the latency or size limits is never trained;
3. the others trained cheapest first (lowest untrained p95 first), each an ordinary run of the recipe
   with its settings applied, in a run folder of its own that a rerun reuses step by step; a student
   another candidate already trained with the same student settings is copied in, not trained again
   (a pruned candidate starts from the unpruned student of its depth);
4. every trained candidate and the teacher timed again together, in interleaved rounds;
5. the winner — the most accurate candidate meeting every limit, ties to the faster — gets its artifact.

Under `accelerate launch` / `torchrun` every process takes part in each training run exactly as in
`shrinkwrap run` (the main process writes); the screen, the timing, the choices and the files are the
main process's, and the candidates it picks are sent to the others.
"""
from __future__ import annotations

import os
import shutil
import sys
from pathlib import Path
from typing import Callable, Optional

from shrinkwrap import distributed
from shrinkwrap.errors import EXIT_BUDGET, EXIT_OK, StepFailed
from shrinkwrap.gate import FAIL, SKIP, Check, evaluate, speed_size_checks
from shrinkwrap.rundir import (ARTIFACT_DIR, MODEL_FILE, RESULTS_FILE, STEP_FILE, read_json_or_none, run_lock,
                               scratch, write_json_atomic)
from shrinkwrap.search_space import Candidate, Space

SEARCH_FILE = "search.json"
TEACHER_RUN, CANDIDATES, UNTRAINED, HALVING, CACHE = "teacher-run", "candidates", "untrained", "halving", "cache"


def _row(c: Candidate) -> dict:
    return {"settings": c.settings, "trained": False, "meets_budget": False, "accuracy": None,
            "accuracy_drop": None, "latency_ms": None, "speedup": None, "size_bytes": None, "reason": None,
            "cautions": None}


def _lat(row: dict) -> dict:
    return {"p50": row["p50"], "p95": row["p95"]}


def _miss(c: Check) -> str:
    short = (c.measured - c.allowed) if c.comparison == "<=" else (c.allowed - c.measured)
    return (f"{c.name}: {c.measured:.4g}{c.unit} is {'above' if c.comparison == '<=' else 'below'} the limit "
            f"{c.allowed:.4g}{c.unit} by {short:.4g}{c.unit}")


def _relative_miss(c: Check) -> float:
    short = (c.measured - c.allowed) if c.comparison == "<=" else (c.allowed - c.measured)
    return max(0.0, short) / c.allowed if c.allowed else max(0.0, short)


def pareto_frontier(rows: list[dict]) -> list[int]:
    """Indices of the trained candidates no other trained candidate dominates: at least as accurate,
    as fast (p95) and as small, and strictly better in one of the three (Pareto dominance)."""
    points = [(i, r["accuracy"], r["latency_ms"]["p95"], r["size_bytes"]) for i, r in enumerate(rows)
              if r["accuracy"] is not None and r["latency_ms"] is not None]

    def beats(a, b) -> bool:
        return a[1] >= b[1] and a[2] <= b[2] and a[3] <= b[3] and (a[1] > b[1] or a[2] < b[2] or a[3] < b[3])

    return [p[0] for p in points if not any(beats(q, p) for q in points if q is not p)]


def pick_winner(rows: list[dict]) -> Optional[int]:
    """The most accurate candidate meeting every limit; ties go to the lower p95."""
    ok = [i for i, r in enumerate(rows) if r["meets_budget"]]
    return min(ok, key=lambda i: (-rows[i]["accuracy"], rows[i]["latency_ms"]["p95"])) if ok else None


class Search:
    def __init__(self, space: Space, out: Path, quiet: bool = False):
        self.space, self.out, self.quiet = space, Path(out), quiet or not distributed.is_main()
        self.recipe, self.budget = space.recipe, space.recipe.budget
        self.rows = [_row(c) for c in space.candidates]
        self.checks: dict[int, list[Check]] = {}      # candidate -> its limits, as last measured
        self.final_dir: dict[int, Path] = {}           # trained candidate -> its shipped step's folder
        self.results: dict[int, dict] = {}             # trained candidate -> its run's results

    def log(self, message: str) -> None:
        if not self.quiet:
            print(f"[search] {message}", file=sys.stderr, flush=True)

    # ---- (1) the teacher ---------------------------------------------------------------------------
    def teacher(self) -> None:
        from shrinkwrap.preflight import prepare
        from shrinkwrap.runner import run_chain

        run = self.out / TEACHER_RUN
        if distributed.is_main():
            _share_cache(run, self.out / CACHE)
        distributed.barrier()
        self.log("teacher: fine-tuned once for every candidate (reused when finished)")
        self.teacher_results = run_chain(self.recipe, run, quiet=True, until="teacher")
        self.teacher_dir = run / "teacher"
        self.ctx = prepare(self.recipe, run, quiet=True)
        self.ctx.fingerprints["teacher"] = read_json_or_none(self.teacher_dir / STEP_FILE)["fingerprint"]
        self.ctx.outputs["teacher"] = self.teacher_dir

    # ---- (2) untrained candidates: exported, int8, timed, sized ---------------------------------------
    def screen(self) -> list[int]:
        from shrinkwrap.search_shapes import Shapes

        b = self.recipe.bench
        models = [(self.teacher_dir, self._batch(self.teacher_dir, self.recipe.teacher.max_length))]
        folders, shapes = [], Shapes(self.ctx)
        self.log(f"{len(self.rows)} candidates: exporting each untrained student to int8 ONNX (reused when made before)")
        for c in self.space.candidates:
            folder = shapes.untrained_int8(c.recipe, self.out / UNTRAINED)
            folders.append(folder)
            models.append((folder, self._batch(folder, c.recipe.student.max_length or c.recipe.teacher.max_length)))
        self.log(f"timing the {len(folders)} untrained candidates with the teacher, {self.recipe.search.rounds} "
                 f"interleaved rounds (batch {b.batch_size} × {b.sequence_length} tokens, {b.threads} threads)")
        timed = self._time(models)
        self.teacher_latency = timed[0]
        teacher_size = self.teacher_results["steps"][0]["size_bytes"]
        survivors = []
        for c, folder, lat in zip(self.space.candidates, folders, timed[1:]):
            row = self.rows[c.index]
            size = _size(folder)
            row.update(latency_ms=_lat(lat), speedup=self.teacher_latency["p95"] / lat["p95"], size_bytes=size)
            checks = speed_size_checks(self.budget, lat["p95"], size, self.teacher_latency["p95"], teacher_size,
                                       lat["p95_over_reference"], self._shape())
            failed = [k for k in checks if k.verdict == FAIL]
            self.checks[c.index] = checks
            line = (f"candidate {c.index} {c.label()}: untrained p95 {lat['p95']:.2f} ms, "
                    f"{row['speedup']:.2f}× the teacher, {size / 1e6:.2f} MB")
            if failed:
                row["reason"] = "not trained — " + "; ".join(_miss(k) for k in failed)
                self.log(f"{line} — {row['reason']}")
            else:
                survivors.append(c.index)
                self.log(f"{line} — to train")
        del shapes
        return sorted(survivors, key=lambda i: self.rows[i]["latency_ms"]["p95"])

    def _batch(self, folder: Path, length: int) -> dict:
        from shrinkwrap.batches import encode
        from shrinkwrap.bench.grid import fixed_batch

        b = self.recipe.bench
        tokens = self.ctx.tokens_of(folder)
        examples = encode(tokens.tokenizer, self.ctx.data.test, b.sequence_length)
        return fixed_batch(examples, tokens.pad_id, b.batch_size, min(b.sequence_length, length))

    def _time(self, models: list[tuple[Path, dict]]) -> list[dict]:
        from shrinkwrap.bench.rounds import time_in_rounds

        return time_in_rounds(models, self.recipe.bench, self.recipe.search.rounds)

    def _shape(self) -> str:
        b = self.recipe.bench
        return f"batch {b.batch_size} × {b.sequence_length} tokens"

    # ---- (3) training ----------------------------------------------------------------------------------
    def train(self, order: list[int], recipe_of: Callable = lambda c: c.recipe, where: str = CANDIDATES,
              suffix: str = "") -> dict[int, dict]:
        """Runs each candidate in `order` (an ordinary run in its own folder); returns its results."""
        from shrinkwrap.pipeline import run_recipe

        done: dict[int, dict] = {}
        for k, i in enumerate(order):
            c = self.space.candidates[i]
            recipe = recipe_of(c)
            folder = self.out / where / (c.folder_name + suffix)
            reused = self._prepare_folder(folder, recipe, where, suffix) if distributed.is_main() else False
            distributed.barrier()  # the folder is ready before any process runs in it
            finished = (read_json_or_none(folder / RESULTS_FILE) or {}).get("recipe_fingerprint") == recipe.fingerprint()
            self.log(f"training {k + 1}/{len(order)}: candidate {i} {c.label()}"
                     + (f", {recipe.student.epochs} epoch(s)" if suffix else "")
                     + (" (finished before: reusing it)" if finished else
                        " (its student copied from a candidate with the same student settings)" if reused else ""))
            try:
                done[i] = run_recipe(recipe, folder, quiet=True)
            except StepFailed as e:  # one candidate that cannot be trained does not end the search
                if distributed.launched():  # ...except under a launcher: the other processes are inside its run
                    raise
                self.rows[i]["reason"] = f"its run failed — {e}"
                self.log(f"candidate {i} {c.label()}: {self.rows[i]['reason']}")
        return done

    def _prepare_folder(self, folder: Path, recipe, where: str, suffix: str) -> bool:
        """The teacher (hard links) and the shared cache; a finished student of the same settings, if any."""
        folder.mkdir(parents=True, exist_ok=True)
        _share_cache(folder, self.out / CACHE)
        teacher_fp = read_json_or_none(self.teacher_dir / STEP_FILE)["fingerprint"]
        if (read_json_or_none(folder / "teacher" / STEP_FILE) or {}).get("fingerprint") != teacher_fp:
            _link_copy(self.teacher_dir, folder / "teacher")
        if (folder / "student" / STEP_FILE).exists():
            return False
        student = recipe.model_dump(mode="json")["student"]
        for other in (self.out / where).glob(f"c-*{suffix}"):
            results = read_json_or_none(other / RESULTS_FILE)
            if (other != folder and results and results["recipe"]["student"] == student
                    and (other / "student" / STEP_FILE).exists()):
                _link_copy(other / "student", folder / "student")  # the runner checks its fingerprint
                return True
        return False

    def record_trained(self, i: int, results: dict) -> None:
        from shrinkwrap.report import cautions

        final = results["steps"][-1]
        # what the candidate's average accuracy hides (a class much worse, a drop the test split cannot settle)
        self.rows[i].update(trained=True, accuracy=final["metrics"]["accuracy"],
                            accuracy_drop=final["accuracy_drop"], cautions=cautions(results, self.budget))
        self.final_dir[i] = Path(final["path"])
        self.results[i] = results

    # ---- (4) timing again, together --------------------------------------------------------------------
    def retime(self) -> None:
        trained = sorted(self.final_dir)
        if not trained:
            return
        models = [(self.teacher_dir, self._batch(self.teacher_dir, self.recipe.teacher.max_length))]
        for i in trained:
            c = self.space.candidates[i]
            models.append((self.final_dir[i], self._batch(self.final_dir[i], c.recipe.student.max_length
                                                          or c.recipe.teacher.max_length)))
        self.log(f"timing the {len(trained)} trained candidates with the teacher again, "
                 f"{self.recipe.search.rounds} interleaved rounds")
        timed = self._time(models)
        self.teacher_latency = timed[0]
        teacher_size = self.teacher_results["steps"][0]["size_bytes"]
        rest = self.budget.model_copy(update={k: None for k in self.budget.speed_size_limits()})
        for i, lat in zip(trained, timed[1:]):
            row, results = self.rows[i], self.results[i]
            size = results["steps"][-1]["size_bytes"]
            row.update(latency_ms=_lat(lat), speedup=self.teacher_latency["p95"] / lat["p95"], size_bytes=size)
            checks = speed_size_checks(self.budget, lat["p95"], size, self.teacher_latency["p95"], teacher_size,
                                       lat["p95_over_reference"], self._shape())
            if rest.limits_set():
                checks += [k for k in evaluate(results, rest).checks if k.verdict != SKIP]
            self.checks[i] = checks
            failed = [k for k in checks if k.verdict == FAIL]
            row["meets_budget"] = not failed
            if row["reason"] is None:
                row["reason"] = "; ".join(_miss(k) for k in failed) if failed else "meets every limit"
            self.log(f"candidate {i} {self.space.candidates[i].label()}: accuracy {row['accuracy']:.4f} "
                     f"(drop {row['accuracy_drop']:.2f} points), p95 {lat['p95']:.2f} ms, {row['speedup']:.2f}× the "
                     f"teacher, {size / 1e6:.2f} MB — {row['reason']}")

    # ---- (5) the winner ----------------------------------------------------------------------------------
    def finish(self) -> dict:
        summary = {"candidates": self.rows, "frontier": pareto_frontier(self.rows), "winner": pick_winner(self.rows)}
        w = summary["winner"]
        if w is not None:
            src = self.out / CANDIDATES / self.space.candidates[w].folder_name / ARTIFACT_DIR
            with scratch(self.out / ARTIFACT_DIR) as tmp:
                shutil.copytree(src, tmp, dirs_exist_ok=True)
        elif (self.out / ARTIFACT_DIR).exists():  # an earlier search's winner is not this one's
            shutil.rmtree(self.out / ARTIFACT_DIR)
        write_json_atomic(self.out / SEARCH_FILE, summary)
        from shrinkwrap.search_report import write_search_report

        write_search_report(summary, self.budget, self.teacher_latency, self.out, self.space.candidates,
                            self.teacher_results["steps"][0]["metrics"]["accuracy"])
        return summary

    def closest(self) -> str:
        """The candidate nearest to meeting the budget (smallest sum of relative misses) and its misses."""
        scored = [(sum(_relative_miss(k) for k in checks if k.verdict == FAIL), i)
                  for i, checks in self.checks.items()]
        if not scored:
            return "no candidate could be measured"
        _, i = min(scored)
        misses = "; ".join(_miss(k) for k in self.checks[i] if k.verdict == FAIL)
        return f"closest: candidate {i} {self.space.candidates[i].label()} — {misses}"


def _size(folder: Path) -> int:
    return (folder / MODEL_FILE).stat().st_size


def _share_cache(run_dir: Path, shared: Path) -> None:
    """run_dir/cache is the search's one cache folder (teacher outputs, transfer texts): computed once."""
    run_dir.mkdir(parents=True, exist_ok=True)
    shared.mkdir(parents=True, exist_ok=True)
    link = run_dir / CACHE
    if link.is_symlink() or not link.exists():
        if link.is_symlink():
            link.unlink()
        link.symlink_to(os.path.relpath(shared, run_dir), target_is_directory=True)


def _link_copy(src: Path, dst: Path) -> None:
    """A finished step's folder copied by hard links (no bytes copied; files are replaced, never edited)."""
    def link(a, b):
        try:
            os.link(a, b)
        except OSError:
            shutil.copy2(a, b)

    with scratch(dst) as tmp:
        shutil.copytree(src, tmp, dirs_exist_ok=True, copy_function=link)


def run_search(space: Space, out: Path, quiet: bool = False) -> tuple[dict, int, str]:
    """Runs the search; returns (search.json's content, exit code, the closing line)."""
    from shrinkwrap.search_halving import halving

    s = Search(space, out, quiet)
    if not distributed.is_main():  # a helper process: it trains what the main one picks, nothing else
        s.teacher()
        order = distributed.share(None)
        if order and space.recipe.search.strategy == "halving":
            order = halving(s, order)
        if order:
            s.train(order)
        return {}, EXIT_OK, ""
    with run_lock(s.out):
        s.teacher()
        order = distributed.share(s.screen())
        if not order:
            summary = s.finish()
            return summary, EXIT_BUDGET, (f"no candidate can meet the latency and size limits, so none was trained "
                                          f"— {s.closest()}")
        if space.recipe.search.strategy == "halving":
            order = halving(s, order)
        for i, results in s.train(order).items():
            s.record_trained(i, results)
        s.retime()
        summary = s.finish()
    w = summary["winner"]
    if w is None:
        return summary, EXIT_BUDGET, f"no candidate meets the budget — {s.closest()}"
    row = s.rows[w]
    return summary, EXIT_OK, (f"winner: candidate {w} {space.candidates[w].label()} — accuracy {row['accuracy']:.4f} "
                              f"(drop {row['accuracy_drop']:.2f} points), p95 {row['latency_ms']['p95']:.2f} ms, "
                              f"{row['speedup']:.2f}× the teacher, {row['size_bytes'] / 1e6:.2f} MB; artifact: "
                              f"{s.out / ARTIFACT_DIR}")
