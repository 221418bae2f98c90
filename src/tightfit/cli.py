"""Command line: a thin dispatcher over functions that tests call directly.

Heavy imports (torch) happen inside the commands, so `tightfit verify` and the
on-device runner work where only numpy and onnxruntime are installed.
"""
from __future__ import annotations

import argparse
import os
import sys
import warnings

from tightfit import __version__
from tightfit.errors import Interrupted, UserError

DESCRIPTION = """\
tightfit trains one weight-sharing supernet (elastic depth, expansion and kernel size),
then cuts from it, for each target device, the most accurate subnet that fits a
measured latency budget, exports it to ONNX with a manifest, and lets QA re-measure it.

typical day:
  tightfit train recipes/demo.toml --run runs/demo     train the supernet once
  tightfit cut runs/demo --subnet largest              extract + export one subnet
  tightfit demo                                        all of the above on built-in data
"""


def _cmd_train(args: argparse.Namespace) -> int:
    from tightfit.recipe import load_recipe
    recipe = load_recipe(args.recipe)  # before torch is imported: a bad recipe is refused in a second
    from tightfit.rundir import discard_unstarted_run
    from tightfit.train import train
    _apply_threads(args.threads)
    with discard_unstarted_run(args.run):
        ckpt = train(recipe, args.run, resume=args.resume, recipe_path=args.recipe, progress=not args.quiet,
                 device=args.device)
    if os.environ.get("RANK", "0") == "0":  # under torchrun, rank 0 speaks for all
        print(f"supernet checkpoint: {ckpt}")
    return 0


def _cmd_cut(args: argparse.Namespace) -> int:
    from tightfit.cut import cut_subnets
    _apply_threads(args.threads)
    rows = cut_subnets(args.run, args.subnet, args.out)
    from tightfit.cut import format_table
    print(format_table(rows))
    return 0


def _cmd_demo(args: argparse.Namespace) -> int:
    if args.recipe:  # before torch is imported: a bad recipe is refused in a second
        from tightfit.recipe import load_recipe
        load_recipe(args.recipe)
    from tightfit.demo import run_demo
    _apply_threads(args.threads)
    run_demo(args.run, recipe_path=args.recipe)
    return 0


def _apply_threads(n: int | None) -> None:
    if n:
        import torch
        torch.set_num_threads(n)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="tightfit", description=DESCRIPTION,
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--version", action="version", version=f"tightfit {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    t = sub.add_parser("train", help="train the supernet of a recipe (sandwich rule + in-place distillation)",
                       description="Train the supernet described by RECIPE into RUN_DIR. A checkpoint is written "
                                   "atomically at the end of every epoch (and every train.checkpoint_every steps); "
                                   "Ctrl-C or SIGTERM writes one and exits 130/143. Continue with --resume.")
    t.add_argument("recipe", help="TOML recipe (see recipes/)")
    t.add_argument("--run", "--run-dir", dest="run", required=True,
                   help="run directory to create (or resume); spell it --run-dir under torchrun")
    t.add_argument("--device", default=None,
                   help="cpu, cuda or cuda:N (default: CUDA when present; under torchrun each rank takes cuda:LOCAL_RANK)")
    t.add_argument("--resume", action="store_true", help="continue the run in RUN_DIR from its last checkpoint")
    t.add_argument("--threads", type=int, default=None, help="torch CPU threads (default: all cores)")
    t.add_argument("--quiet", action="store_true", help="no progress bar")
    t.set_defaults(func=_cmd_train)

    c = sub.add_parser("cut", help="extract subnets as static networks, recalibrate BN, export ONNX",
                       description="Cut subnets out of a trained run: BatchNorm recalibration, a static network of "
                                   "plain torch.nn layers, ONNX export checked against torch, and a table of params, "
                                   "MACs, validation accuracy and ONNX Runtime batch-1 latency.")
    c.add_argument("run", help="run directory written by 'tightfit train'")
    c.add_argument("--subnet", action="append", required=True,
                   help="'largest', 'smallest', 'middle' or a subnet key such as e1k3_e6k5-e3k3_...; repeatable")
    c.add_argument("--out", default=None, help="where the exports go (default RUN_DIR/exports)")
    c.add_argument("--threads", type=int, default=None, help="torch CPU threads (default: all cores)")
    c.set_defaults(func=_cmd_cut)

    d = sub.add_parser("demo", help="generate the built-in dataset, train, cut three subnets, print a table",
                       description="End-to-end demo on the built-in synthetic dataset (parts on a conveyor). "
                                   "Writes everything under runs/ and prints where.")
    d.add_argument("--run", default=None, help="run directory (default runs/demo-TIMESTAMP)")
    d.add_argument("--recipe", default=None, help="recipe to use instead of recipes/demo.toml")
    d.add_argument("--threads", type=int, default=None, help="torch CPU threads (default: all cores)")
    d.set_defaults(func=_cmd_demo)

    from tightfit.latency.cli_commands import add_latency_check_parser, add_probe_parser, add_profile_parser
    from tightfit.report import add_report_parser
    from tightfit.search_cli import add_search_parser
    from tightfit.verify import add_verify_parser
    add_probe_parser(sub)
    add_profile_parser(sub)
    add_latency_check_parser(sub)
    add_search_parser(sub)
    add_verify_parser(sub)
    add_report_parser(sub)
    return p


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    warnings.filterwarnings("ignore", category=UserWarning, module="torch")
    try:
        return args.func(args)
    except UserError as e:
        print(f"error: {e}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130
    except Interrupted as e:
        print(str(e), file=sys.stderr)
        return e.code
