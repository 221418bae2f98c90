"""`tightfit train`: its command line (torch is imported only once the recipe has loaded)."""
from __future__ import annotations

import argparse
import json
import os
from dataclasses import replace
from pathlib import Path

from tightfit.budgets import parse_budget
from tightfit.errors import UserError
from tightfit.recipe import Recipe, Target


def _cmd_train(args: argparse.Namespace) -> int:
    from tightfit.recipe import load_recipe
    recipe = load_recipe(args.recipe)  # before torch is imported: a bad recipe is refused in a second
    recipe, extra = with_command_line_targets(recipe, args.table, args.budget)
    from tightfit.train.loop import train
    from tightfit.rundir import discard_unstarted_run, set_threads
    set_threads(args.threads)
    with discard_unstarted_run(args.run):
        ckpt = train(recipe, args.run, resume=args.resume, recipe_path=args.recipe, progress=not args.quiet,
                     device=args.device, extra_toml=extra)
    if os.environ.get("RANK", "0") == "0":  # under torchrun, rank 0 speaks for all
        print(f"supernet checkpoint: {ckpt}")
    return 0


def with_command_line_targets(recipe: Recipe, tables: list[str], budgets: list[str]) -> tuple[Recipe, str]:
    """--table T --budget B (each repeatable: every budget on every table) added to the recipe's
    [[train.targets]]; returns the recipe and the TOML text that records them in the run's recipe copy."""
    if bool(tables) != bool(budgets):
        raise UserError("targets need both --table and --budget (every budget applies to every table)")
    targets = []
    for t in tables:
        path = Path(t).resolve()
        if not path.is_file():
            raise UserError(f"--table {t}: file not found (measure one with 'tightfit profile RECIPE --name DEVICE')")
        targets += [(str(path), b, Target(str(path), parse_budget(b))) for b in budgets]
    text = "".join(f'\n[[train.targets]]\ntable = {json.dumps(p)}\nbudget = {json.dumps(b)}\n' for p, b, _ in targets)
    train = replace(recipe.train, targets=recipe.train.targets + tuple(t for _, _, t in targets))
    return replace(recipe, train=train), text


def add_train_parser(sub: argparse._SubParsersAction) -> None:
    t = sub.add_parser("train", help="train the supernet of a recipe, for the budgets you declare (sandwich rule)",
                       description="Train the supernet described by RECIPE into the run folder RUN. A checkpoint "
                                   "is written atomically at the end of every epoch (and every "
                                   "train.checkpoint_every steps); Ctrl-C or SIGTERM writes one and exits 130/143. "
                                   "Continue with --resume. With targets (--table/--budget, or [[train.targets]] in the "
                                   "recipe), each step also trains subnets the table predicts just under each budget: "
                                   "profile first "
                                   "(tightfit profile RECIPE --out TABLE.json), then train, then search.")
    t.add_argument("recipe", help="TOML recipe (see recipes/)")
    t.add_argument("--run", "--run-dir", dest="run", required=True, metavar="RUN",
                   help="run folder to create (or resume); spell it --run-dir under torchrun")
    t.add_argument("--device", default=None,
                   help="cpu, cuda or cuda:N (default: CUDA when present; under torchrun each rank takes cuda:LOCAL_RANK)")
    t.add_argument("--resume", action="store_true", help="continue the run in RUN from its last checkpoint")
    t.add_argument("--threads", type=int, default=None, help="torch CPU threads (default: all cores)")
    t.add_argument("--quiet", action="store_true", help="no progress bar")
    t.add_argument("--table", action="append", default=[], metavar="TABLE",
                   help="latency table of a target device (tightfit profile RECIPE makes one before training); "
                        "repeatable. With --budget, each step also trains subnets predicted just under each budget")
    t.add_argument("--budget", action="append", default=[], metavar="BUDGET",
                   help="latency budget to train for, e.g. 0.3ms (repeatable; every budget applies to every --table); "
                        "added to the recipe's [[train.targets]]")
    t.set_defaults(func=_cmd_train)
