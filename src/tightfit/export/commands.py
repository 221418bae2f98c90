"""`tightfit cut`: its command line."""
from __future__ import annotations

import argparse

from tightfit.budgets import parse_budget


def _cmd_cut(args: argparse.Namespace) -> int:
    budget_ms = None if args.budget is None else parse_budget(args.budget)
    from tightfit.export.by_hand import cut_subnets
    from tightfit.export.cut import format_table
    from tightfit.rundir import set_threads
    set_threads(args.threads)
    print(format_table(cut_subnets(args.run, args.subnet, args.out, budget_ms)))
    print("each folder holds model.onnx, state_dict.pt and manifest.json: check one with tightfit verify FOLDER")
    return 0


def add_cut_parser(sub: argparse._SubParsersAction) -> None:
    c = sub.add_parser("cut", help="extract subnets by hand: recalibrate BN, export ONNX with a manifest",
                       description="Cut subnets out of a trained run: BatchNorm recalibration, a static network of "
                                   "plain torch.nn layers, ONNX export checked against torch, and a table of params, "
                                   "MACs, validation accuracy and ONNX Runtime batch-1 latency; each export folder gets a manifest "
                                   "(classes, input spec, measured latency) like a search pick.")
    c.add_argument("run", help="run folder written by 'tightfit train'")
    c.add_argument("--subnet", action="append", required=True,
                   help="'largest', 'smallest', 'middle' or a subnet key such as 1:3,6:5/6:5; repeatable")
    c.add_argument("--out", default=None, help="where the exports go (default RUN/exports)")
    c.add_argument("--budget", default=None,
                   help="latency budget the manifests claim, e.g. 0.3ms, for verify to judge (default: none; "
                        "verify then reports the figures only)")
    c.add_argument("--threads", type=int, default=None, help="torch CPU threads (default: all cores)")
    c.set_defaults(func=_cmd_cut)
