"""Command line: one function per command; parsing and exit codes only.

Exit codes: 0 ok, 1 a budget failed, 2 bad input, 3 a step failed or an internal error.
"""
from __future__ import annotations

import argparse
import json
import os
import sys
import traceback
from pathlib import Path

from shrinkwrap.errors import EXIT_BUDGET, EXIT_INTERNAL, EXIT_OK, StepFailed, UserError


def cmd_run(args) -> int:
    from shrinkwrap.recipe import load_recipe
    from shrinkwrap.report import step_table
    from shrinkwrap.runner import run_chain

    recipe = load_recipe(args.recipe, args.set)
    out = Path(args.out) if args.out else Path("runs") / recipe.name
    results = run_chain(recipe, out, quiet=args.json, until=args.until)
    if args.json:
        print(json.dumps(results, indent=2))
    else:
        print(step_table(results))
        print(f"\nresults: {out / 'results.json'}\nreport:  {out / 'report.md'}, {out / 'report.html'}")
    if not recipe.budget.limits_set():
        return EXIT_OK
    if args.until:
        print("note: the recipe's budget is not checked — --until stopped the chain early", file=sys.stderr)
        return EXIT_OK
    from shrinkwrap.gate import evaluate, format_table

    verdict = evaluate(results, recipe.budget, where=str(out / "results.json"), budget_source="recipe budget")
    print("\n" + format_table(verdict), file=sys.stderr if args.json else sys.stdout)
    return verdict.exit_code


def cmd_gate(args) -> int:
    from shrinkwrap.gate import format_table, gate_results, junit_xml
    from shrinkwrap.runner import write_text_atomic

    verdict = gate_results(Path(args.results), args.budget and Path(args.budget), args.step,
                           args.baseline and Path(args.baseline), args.tolerance)
    if args.junit:
        write_text_atomic(Path(args.junit), junit_xml(verdict))
    print(json.dumps(verdict.as_dict(), indent=2) if args.json else format_table(verdict))
    return verdict.exit_code


def cmd_report(args) -> int:
    from shrinkwrap.report import report_from_file

    for path in report_from_file(Path(args.results), args.out and Path(args.out)):
        print(f"report: {path}")
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="shrinkwrap", description=__doc__.splitlines()[0] if __doc__ else None)
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    run = sub.add_parser("run", help="run a recipe end to end: teacher -> student -> int8 -> ONNX -> ONNX int8",
                         description="Run every step of RECIPE, benchmark each, write results.json and report.md.")
    run.add_argument("recipe", help="recipe YAML file")
    run.add_argument("--out", help="run folder (default: runs/<recipe name>)")
    run.add_argument("--set", action="append", default=[], metavar="KEY.PATH=VALUE",
                     help="override a recipe key, e.g. --set teacher.epochs=1 (repeatable)")
    run.add_argument("--json", action="store_true", help="print results.json to stdout instead of the table")
    run.add_argument("--until", metavar="STEP",
                     help="stop after this step, e.g. --until student (finished later steps are kept on disk)")
    run.set_defaults(func=cmd_run)

    gate = sub.add_parser("gate", help="check a run's results against a budget: exit 0 pass, 1 a limit failed, 2 bad input",
                          description="Check one step of RESULTS (the final one by default) against the limits of a "
                                      "budget; print a verdict per limit.")
    gate.add_argument("results", help="results.json of a run")
    gate.add_argument("--budget", metavar="FILE",
                      help="budget YAML (keys of a recipe's budget: section; default: the budget of the recipe in RESULTS)")
    gate.add_argument("--step", metavar="NAME", help="step to check (default: the final step in RESULTS)")
    gate.add_argument("--baseline", metavar="OLD_RESULTS",
                      help="an earlier results.json: also check that the same step has not regressed beyond the tolerances")
    gate.add_argument("--tolerance", action="append", default=[], metavar="NAME=VALUE",
                      help="regression tolerance with --baseline: p95_percent=10, accuracy_points=0.5, size_percent=5 "
                           "(repeatable; overrides the budget's regression: section)")
    gate.add_argument("--junit", metavar="OUT.xml", help="also write the verdicts as JUnit XML (one testcase per limit)")
    gate.add_argument("--json", action="store_true", help="print the verdicts as JSON instead of the table")
    gate.set_defaults(func=cmd_gate)

    report = sub.add_parser("report", help="write report.md and report.html again from a results.json",
                            description="Render report.md and a self-contained report.html (tables, plots) from RESULTS.")
    report.add_argument("results", help="results.json of a run")
    report.add_argument("--out", metavar="DIR", help="folder for the reports (default: beside RESULTS)")
    report.set_defaults(func=cmd_report)
    return p


def main(argv: list[str] | None = None) -> int:
    os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
    args = build_parser().parse_args(argv)
    try:
        return args.func(args)
    except UserError as e:
        print(f"error: {e}", file=sys.stderr)
        return e.exit_code
    except StepFailed as e:
        print(f"step failed: {e}", file=sys.stderr)
        return e.exit_code
    except KeyboardInterrupt:
        print("interrupted: finished steps are kept; run the same command again to resume", file=sys.stderr)
        return 130
    except Exception:  # a bug: say so, with the traceback a maintainer needs
        traceback.print_exc()
        print("internal error: please report it with the traceback above", file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":
    raise SystemExit(main())
