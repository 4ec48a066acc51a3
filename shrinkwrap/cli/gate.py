"""`shrinkwrap gate RESULTS`: one step of a run against a budget; exit 0 pass, 1 a limit failed, 2 bad input."""
from __future__ import annotations

import json
from pathlib import Path

from shrinkwrap.cli.options import print_cautions


def add(sub) -> None:
    p = sub.add_parser("gate", help="check a run's results against a budget: exit 0 pass, 1 a limit failed, 2 bad input",
                       description="Check one step of RESULTS (the final one by default) against the limits of a "
                                   "budget; print a verdict per limit. Exit 0: every limit met; 1: a limit "
                                   "failed; 2: bad input (budget, results, options).")
    p.add_argument("results", nargs="?", help="results.json of a run (optional with --load)")
    p.add_argument("--budget", metavar="FILE",
                   help="budget YAML (keys of a recipe's budget: section; default: the budget of the recipe in RESULTS)")
    p.add_argument("--step", metavar="NAME", help="step to check (default: the final step in RESULTS)")
    p.add_argument("--baseline", metavar="OLD_RESULTS",
                   help="an earlier results.json: also check that the same step has not regressed beyond the tolerances")
    p.add_argument("--tolerance", action="append", default=[], metavar="NAME=VALUE",
                   help="regression tolerance with --baseline: p95_percent=10, accuracy_points=0.5, size_percent=5 "
                        "(repeatable; overrides the budget's regression: section)")
    p.add_argument("--load", metavar="FILE.json", help="the JSON of `shrinkwrap bench ARTIFACT --load`: check the "
                   "budget's min_capacity_rps against its capacity_rps")
    p.add_argument("--junit", metavar="OUT.xml", help="also write the verdicts as JUnit XML (one testcase per limit)")
    p.add_argument("--json", action="store_true", help="print the verdicts as JSON instead of the table")
    p.set_defaults(func=main)


def main(args) -> int:
    from shrinkwrap.outputs.gate import format_table, gate_results, junit_xml
    from shrinkwrap.serve.rundir import check_out_file, write_text_atomic

    if args.junit:
        check_out_file(Path(args.junit), "--junit")
    verdict = gate_results(args.results and Path(args.results), args.budget and Path(args.budget), args.step,
                           args.baseline and Path(args.baseline), args.tolerance, args.load and Path(args.load))
    if args.junit:
        write_text_atomic(Path(args.junit), junit_xml(verdict))
    print(json.dumps(verdict.as_dict(), indent=2) if args.json else format_table(verdict))
    print_cautions(verdict.cautions)
    return verdict.exit_code
