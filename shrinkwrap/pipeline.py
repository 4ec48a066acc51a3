"""What `shrinkwrap run` does, in order: the chain of steps and results.json, the artifact (when the chain
ends with an ONNX step), the cautions and the reports. The command line and the search both run recipes
through here."""
from __future__ import annotations

import sys
from pathlib import Path


def run_recipe(recipe, out: Path, quiet: bool = False, until: str | None = None,
               signing_key: Path | None = None) -> dict:
    """What `shrinkwrap run` writes, in order: every step and results.json, the artifact (when the chain
    ends with an ONNX step), the reports. Returns the results ({} in a helper process of a distributed run)."""
    from shrinkwrap import distributed
    from shrinkwrap.rundir import run_lock
    from shrinkwrap.runner import run_chain

    if not distributed.is_main():  # the main process holds the run folder's lock for all of them
        return run_chain(recipe, out, quiet=quiet, until=until)
    with run_lock(out):
        results = run_chain(recipe, out, quiet=quiet, until=until)
        if results:
            _finish(results, out, quiet, signing_key)
    return results


def _finish(results: dict, out: Path, quiet: bool, signing_key: Path | None = None) -> None:
    """The artifact (when the chain ends with an ONNX step) and the reports, once the steps are done."""
    from shrinkwrap.package import from_run
    from shrinkwrap.report import cautions, write_reports
    from shrinkwrap.results import final_step
    from shrinkwrap.rundir import RESULTS_FILE, write_json_atomic

    if final_step(results)["format"] == "onnx":
        cal = final_step(results).get("calibration") or {}
        results["artifact"] = {"path": str(from_run(results, out)),
                               **{k: cal[k] for k in ("temperature", "ece", "ece_raw") if k in cal}}
        if signing_key:
            from shrinkwrap.signing import sign_artifact

            sign_artifact(Path(results["artifact"]["path"]), signing_key)
        write_json_atomic(out / RESULTS_FILE, results)
        if not quiet:
            print(f"[artifact] written to {results['artifact']['path']}", file=sys.stderr, flush=True)
    results["cautions"] = cautions(results)
    write_json_atomic(out / RESULTS_FILE, results)
    write_reports(results, out)
