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
    results = run_chain(recipe, out, quiet=args.json)
    if args.json:
        print(json.dumps(results, indent=2))
    else:
        print(step_table(results))
        print(f"\nresults: {out / 'results.json'}\nreport:  {out / 'report.md'}")
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
    run.set_defaults(func=cmd_run)
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
