"""`tightfit report`: its command line."""
from __future__ import annotations

import argparse

from tightfit.report.page import write_report


def _cmd_report(args: argparse.Namespace) -> int:
    page = write_report(args.run, args.out)
    print(f"report: {page}")
    return 0


def add_report_parser(sub: argparse._SubParsersAction) -> None:
    r = sub.add_parser("report", help="plots and a one-page HTML report of a run",
                       description="Write PNG plots and report.html into RUN_DIR/report/: accuracy vs latency "
                                   "(candidates, Pareto front, budgets, picks, baselines), training curves, and "
                                   "the picks' latency distributions. Renders whatever exists and lists what "
                                   "is missing.")
    r.add_argument("run", help="run directory")
    r.add_argument("--out", default=None, help="folder for the report (default RUN_DIR/report)")
    r.set_defaults(func=_cmd_report)
