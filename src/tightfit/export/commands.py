"""`tightfit cut`: its command line."""
from __future__ import annotations

import argparse


def _cmd_cut(args: argparse.Namespace) -> int:
    from tightfit.export.cut import cut_subnets, format_table
    from tightfit.train.rundir import set_threads
    set_threads(args.threads)
    print(format_table(cut_subnets(args.run, args.subnet, args.out)))
    return 0


def add_cut_parser(sub: argparse._SubParsersAction) -> None:
    c = sub.add_parser("cut", help="extract subnets as static networks, recalibrate BN, export ONNX",
                       description="Cut subnets out of a trained run: BatchNorm recalibration, a static network of "
                                   "plain torch.nn layers, ONNX export checked against torch, and a table of params, "
                                   "MACs, validation accuracy and ONNX Runtime batch-1 latency.")
    c.add_argument("run", help="run folder written by 'tightfit train'")
    c.add_argument("--subnet", action="append", required=True,
                   help="'largest', 'smallest', 'middle' or a subnet key such as 1:3,6:5/6:5; repeatable")
    c.add_argument("--out", default=None, help="where the exports go (default RUN/exports)")
    c.add_argument("--threads", type=int, default=None, help="torch CPU threads (default: all cores)")
    c.set_defaults(func=_cmd_cut)
