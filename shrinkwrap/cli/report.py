"""`shrinkwrap report RESULTS`: report.md and report.html again from a results.json."""
from __future__ import annotations

from pathlib import Path

from shrinkwrap.serve.errors import EXIT_OK


def add(sub) -> None:
    p = sub.add_parser("report", help="write report.md and report.html again from a results.json",
                       description="Render report.md and a self-contained report.html (tables, plots) from RESULTS.")
    p.add_argument("results", help="results.json of a run")
    p.add_argument("--out", metavar="DIR", help="folder for the reports (default: beside RESULTS)")
    p.set_defaults(func=main)


def main(args) -> int:
    from shrinkwrap.outputs.report import report_from_file

    for path in report_from_file(Path(args.results), args.out and Path(args.out)):
        print(f"report: {path}")
    return EXIT_OK
