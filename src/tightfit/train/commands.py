"""`tightfit train`: its command line (torch is imported only once the recipe has loaded)."""
from __future__ import annotations

import argparse
import os


def _cmd_train(args: argparse.Namespace) -> int:
    from tightfit.recipe import load_recipe
    recipe = load_recipe(args.recipe)  # before torch is imported: a bad recipe is refused in a second
    from tightfit.train.loop import train
    from tightfit.rundir import discard_unstarted_run, set_threads
    set_threads(args.threads)
    with discard_unstarted_run(args.run):
        ckpt = train(recipe, args.run, resume=args.resume, recipe_path=args.recipe, progress=not args.quiet,
                     device=args.device)
    if os.environ.get("RANK", "0") == "0":  # under torchrun, rank 0 speaks for all
        print(f"supernet checkpoint: {ckpt}")
    return 0


def add_train_parser(sub: argparse._SubParsersAction) -> None:
    t = sub.add_parser("train", help="train the supernet of a recipe (sandwich rule + in-place distillation)",
                       description="Train the supernet described by RECIPE into the run folder RUN. A checkpoint "
                                   "is written atomically at the end of every epoch (and every "
                                   "train.checkpoint_every steps); Ctrl-C or SIGTERM writes one and exits 130/143. "
                                   "Continue with --resume.")
    t.add_argument("recipe", help="TOML recipe (see recipes/)")
    t.add_argument("--run", "--run-dir", dest="run", required=True, metavar="RUN",
                   help="run folder to create (or resume); spell it --run-dir under torchrun")
    t.add_argument("--device", default=None,
                   help="cpu, cuda or cuda:N (default: CUDA when present; under torchrun each rank takes cuda:LOCAL_RANK)")
    t.add_argument("--resume", action="store_true", help="continue the run in RUN from its last checkpoint")
    t.add_argument("--threads", type=int, default=None, help="torch CPU threads (default: all cores)")
    t.add_argument("--quiet", action="store_true", help="no progress bar")
    t.set_defaults(func=_cmd_train)
