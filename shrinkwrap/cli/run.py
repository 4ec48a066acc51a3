"""`shrinkwrap run RECIPE`: every step benchmarked, results.json, the artifact and the reports; then the
recipe's budget, when it has one."""
from __future__ import annotations

import json
import sys
from pathlib import Path

from shrinkwrap.cli.options import add_set, add_signing_key, print_cautions, signing_key
from shrinkwrap.serve.errors import EXIT_OK


def add(sub) -> None:
    p = sub.add_parser("run", help="run a recipe end to end: teacher -> student -> int8 -> ONNX -> ONNX int8",
                       description="Run every step of RECIPE, benchmark each, write results.json and report.md.")
    p.add_argument("recipe", help="recipe YAML file")
    p.add_argument("--out", help="run folder (default: runs/<recipe name>)")
    add_set(p, "--set teacher.epochs=1")
    p.add_argument("--json", action="store_true", help="print results.json to stdout instead of the table")
    p.add_argument("--until", metavar="STEP",
                   help="stop after this step, e.g. --until student (finished later steps are kept on disk)")
    p.add_argument("--retime", action="store_true",
                   help="time a finished run again without training anything: every step must be finished (exit 2 "
                        "otherwise); the teacher and every step are timed together again, then the reports and the "
                        "budget as usual")
    add_signing_key(p)
    p.set_defaults(func=main)


def main(args) -> int:
    from shrinkwrap.serve.extras import require_train

    require_train("shrinkwrap run")
    from shrinkwrap.chain.pipeline import run_recipe
    from shrinkwrap.outputs.report import step_table
    from shrinkwrap.outputs.results import artifact_path, cautions_of
    from shrinkwrap.recipe.schema import load_recipe
    from shrinkwrap.serve.rundir import REPORT_FILE, REPORT_HTML_FILE, RESULTS_FILE

    recipe = load_recipe(args.recipe, args.set)
    out = Path(args.out) if args.out else Path("runs") / recipe.name
    key = signing_key(args)
    results = run_recipe(recipe, out, quiet=args.json, until=args.until, signing_key=key, retime=args.retime)
    if not results:  # a helper process of a distributed run: the main process reports
        return EXIT_OK
    if args.json:
        print(json.dumps(results, indent=2))
    else:
        print(step_table(results))
        print(f"\nresults: {out / RESULTS_FILE}\nreport:  {out / REPORT_FILE}, {out / REPORT_HTML_FILE}")
        if artifact_path(results):
            print(f"artifact: {artifact_path(results)} (run it with: shrinkwrap predict {artifact_path(results)} TEXT)")
    if not recipe.budget.limits_set() or args.until:
        print_cautions(cautions_of(results))
    if not recipe.budget.limits_set():
        return EXIT_OK
    if args.until:
        print("note: the recipe's budget is not checked — --until stopped the chain early", file=sys.stderr)
        return EXIT_OK
    from shrinkwrap.outputs.gate import Verdict, format_table
    from shrinkwrap.outputs.results import verdict_of

    verdict = Verdict.from_dict(verdict_of(results))  # checked by the run, after everything was written
    print("\n" + format_table(verdict), file=sys.stderr if args.json else sys.stdout)
    print_cautions(cautions_of(results))
    return verdict.exit_code
