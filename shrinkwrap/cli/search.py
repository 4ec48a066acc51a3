"""`shrinkwrap search RECIPE`: the most accurate student that meets the recipe's budget."""
from __future__ import annotations

import json
import sys
from pathlib import Path

from shrinkwrap.cli.options import add_set, print_cautions


def add(sub) -> None:
    p = sub.add_parser("search", help="find the most accurate student that meets the recipe's budget",
                       description="Try every combination of the values in RECIPE's search: section (recipe "
                                   "key paths -> lists of values). Candidates that cannot meet the latency or "
                                   "size limits untrained are never trained; the rest are trained cheapest "
                                   "first and timed again with the teacher; the most accurate one meeting "
                                   "every limit gets DIR/artifact. Writes DIR/search.json and DIR/report.html. "
                                   "Exit 0: a winner; 1: no candidate meets the budget; 2: bad input.")
    p.add_argument("recipe", help="recipe YAML file with a search: section")
    p.add_argument("--out", metavar="DIR", help="search folder (default: runs/<recipe name>-search)")
    add_set(p, "--set budget.min_speedup=4 or --set search.student.num_layers=[2,3]")
    p.add_argument("--json", action="store_true", help="print search.json to stdout instead of a summary")
    p.set_defaults(func=main)


def main(args) -> int:
    from shrinkwrap.serve.extras import require_train

    require_train("shrinkwrap search")
    from shrinkwrap.search.run import SEARCH_FILE, run_search
    from shrinkwrap.search.space import load_search

    space = load_search(args.recipe, args.set)  # every candidate checked before anything runs
    out = Path(args.out) if args.out else Path("runs") / f"{space.recipe.name}-search"
    summary, code, line = run_search(space, out, quiet=args.json)
    if not summary:  # a helper process of a distributed search: the main process reports
        return code
    if args.json:
        print(json.dumps(summary, indent=2))
    else:
        print(f"search: {out / SEARCH_FILE}\nreport: {out / 'report.html'}")
    print(line, file=sys.stderr if args.json else sys.stdout)
    if summary["winner"] is not None:
        print_cautions(summary["candidates"][summary["winner"]]["cautions"])
    return code
