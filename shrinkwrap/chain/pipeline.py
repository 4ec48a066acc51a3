"""The one way into the chain: `run_recipe` runs a recipe in a run folder — every step and results.json, then
the artifact (when the chain ends with an ONNX step), the cautions and the reports. `shrinkwrap run` and
`shrinkwrap search` both come in here; nothing above the chain builds or edits what a step is given."""
from __future__ import annotations

import sys
from pathlib import Path
from typing import Optional

from shrinkwrap.chain.runner import run_chain
from shrinkwrap.ml import distributed
from shrinkwrap.outputs import results as results_file
from shrinkwrap.serve.errors import UserError
from shrinkwrap.serve.rundir import RESULTS_FILE, run_lock, write_json_atomic


def run_recipe(recipe, out: Path, quiet: bool = False, until: Optional[str] = None,
               signing_key: Optional[Path] = None, measure: bool = True, retime: bool = False) -> dict:
    """What `shrinkwrap run` writes, in order: every step (up to `until`) and results.json, the artifact, the
    reports. measure=False runs the steps and times nothing (no benchmark, artifact or report: a search's
    untrained candidates, whose shapes alone are wanted). retime=True trains nothing: a finished run's steps
    are timed together again (`run --retime`). Returns the results ({} in a helper process of a distributed
    run)."""
    if not distributed.is_main():  # the main process holds the run folder's lock for all of them
        return run_chain(recipe, out, quiet=quiet, until=until, measure=measure, retime=retime)
    with run_lock(out):
        results = run_chain(recipe, out, quiet=quiet, until=until, measure=measure, retime=retime)
        if results and measure:
            _finish(results, out, quiet, signing_key, gate=recipe.budget.limits_set() and until is None)
    return results


def _finish(results: dict, out: Path, quiet: bool, signing_key: Optional[Path] = None, gate: bool = False) -> None:
    """The artifact (when the chain ends with an ONNX step), the recipe budget's verdict (`gate`) and the reports,
    once the steps are done. A budget the results cannot answer is bad input, raised once the reports are out."""
    from shrinkwrap.outputs.gate import evaluate
    from shrinkwrap.outputs.findings import cautions
    from shrinkwrap.outputs.package import from_run
    from shrinkwrap.outputs.report import write_reports

    if results_file.final_row(results)["format"] == "onnx":
        results_file.set_artifact(results, from_run(results, out))
        if signing_key:
            from shrinkwrap.serve.signing import sign_artifact

            sign_artifact(Path(results_file.artifact_path(results)), signing_key)
        write_json_atomic(out / RESULTS_FILE, results)
        if not quiet:
            print(f"[artifact] written to {results_file.artifact_path(results)}", file=sys.stderr, flush=True)
    results_file.set_cautions(results, cautions(results))
    error = None
    if gate:
        try:
            budget = results_file.recipe_of(results).budget
            results_file.set_verdict(results, evaluate(results, budget, where=str(out / RESULTS_FILE),
                                                       budget_source="recipe budget").as_dict())
        except UserError as e:
            error = e
    write_json_atomic(out / RESULTS_FILE, results)
    write_reports(results, out)
    if error is not None:
        raise error
