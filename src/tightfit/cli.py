"""Command line: a thin dispatcher over functions that tests call directly.

Heavy imports (torch) happen inside the commands, so `tightfit verify` and the
on-device runner work where only numpy and onnxruntime are installed.
"""
from __future__ import annotations

import argparse
import sys
import warnings

from tightfit import __version__
from tightfit.errors import Interrupted, UserError
from tightfit.export.commands import add_cut_parser
from tightfit.latency.commands import add_latency_check_parser, add_probe_parser, add_profile_parser
from tightfit.ondevice.reproduce import add_reproduce_parser
from tightfit.ondevice.verify import add_verify_parser
from tightfit.report.commands import add_inspect_parser, add_report_parser
from tightfit.search.commands import add_search_parser
from tightfit.train.commands import add_train_parser

DESCRIPTION = """\
tightfit trains one weight-sharing supernet (elastic depth, expansion and kernel size),
then cuts from it, for each target device, the most accurate subnet that fits a
measured latency budget, exports it to ONNX with a manifest, and lets QA re-measure it.

the day, in pipeline order:
  tightfit inspect recipes/demo.toml                           (space, sizes: before any training)
  tightfit profile recipes/demo.toml --out this-host.json   1. latency table of this machine
  tightfit probe recipes/demo.toml --out probe --zip           (or: a probe bundle for another device)
  tightfit train recipes/demo.toml --run runs/demo --table this-host.json --budget 0.3ms
                                                            2. train the supernet once, for the budgets
  tightfit search runs/demo --table this-host.json --budget 0.3ms
                                                            3. best subnet per budget, exported
  tightfit verify runs/demo/exports/this-host-0.3ms         4. QA: re-measure, PASS/MISS
  tightfit reproduce runs/demo/exports/* --runs 10             (does the figure reproduce? N fresh runs)
  tightfit report runs/demo                                 5. plots and one HTML page
  tightfit demo                                             all of it on built-in data
"""


def _cmd_demo(args: argparse.Namespace) -> int:
    if args.recipe:  # before torch is imported: a bad recipe is refused in a second
        from tightfit.recipe import load_recipe
        load_recipe(args.recipe)
    from tightfit.demo import run_demo
    from tightfit.rundir import set_threads
    set_threads(args.threads)
    run_demo(args.run, recipe_path=args.recipe)
    return 0


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="tightfit", description=DESCRIPTION,
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--version", action="version", version=f"tightfit {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    add_train_parser(sub)
    add_inspect_parser(sub)
    add_probe_parser(sub)
    add_profile_parser(sub)
    add_latency_check_parser(sub)
    add_search_parser(sub)
    add_cut_parser(sub)
    add_verify_parser(sub)
    add_reproduce_parser(sub)
    add_report_parser(sub)

    d = sub.add_parser("demo", help="the whole day on built-in data: train, cut, profile, search, verify, report",
                       description="End-to-end demo on the built-in synthetic dataset (parts on a conveyor). "
                                   "Writes everything under runs/ and prints where.")
    d.add_argument("--run", default=None, help="run folder (default runs/demo-TIMESTAMP)")
    d.add_argument("--recipe", default=None, help="recipe to use instead of recipes/demo.toml")
    d.add_argument("--threads", type=int, default=None, help="torch CPU threads (default: all cores)")
    d.set_defaults(func=_cmd_demo)

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


if __name__ == "__main__":  # `python -m tightfit.cli` behaves like `tightfit` and `python -m tightfit`
    raise SystemExit(main())
