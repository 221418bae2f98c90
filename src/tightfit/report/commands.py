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


def _cmd_inspect(args: argparse.Namespace) -> int:
    from tightfit.report.inspect import inspect
    print(inspect(args.target, args.table or [], args.subnet or [], args.front, args.classes))
    return 0


def add_inspect_parser(sub: argparse._SubParsersAction) -> None:
    r = sub.add_parser("inspect", help="what a recipe, a run and its latency tables offer (before choosing budgets)",
                       description="For a recipe file: the space's size and the params / MACs of its smallest, "
                                   "middle and largest subnets, with no data needed when the class count is "
                                   "given (--classes, or data.classes in the recipe). For a run directory also: "
                                   "whether training "
                                   "finished and its last validation accuracies, the latency each table in "
                                   "RUN/latency predicts for the smallest, middle and largest subnet (the range "
                                   "budgets can be searched in), and the picks of earlier searches.")
    r.add_argument("target", help="recipe .toml or run directory")
    r.add_argument("--table", action="append", help="latency table to predict with (default: RUN/latency/*.json)")
    r.add_argument("--subnet", action="append", help="a subnet key: its params, MACs and predicted latency")
    r.add_argument("--front", action="store_true", help="also list the Pareto front each search found")
    r.add_argument("--classes", type=int, default=0, metavar="N",
                   help="class count of a recipe whose data does not exist yet (default: the recipe's data.classes, "
                        "else counted in the data)")
    r.set_defaults(func=_cmd_inspect)
