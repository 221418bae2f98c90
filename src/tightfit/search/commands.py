"""Command line of `tightfit search` and its table of picks (the search itself is tightfit.search.driver)."""
from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Any, Optional

from tightfit.errors import UserError
from tightfit.budgets import parse_budget
from tightfit.ondevice.accuracy import Accuracy, format_accuracy
from tightfit.ondevice.measurement import figure_of
from tightfit.search.settings import SearchSettings


def format_picks(rows: list[dict[str, Any]]) -> str:
    """The table of picks: accuracies with their interval and image count (format_accuracy), latency
    measured (or predicted where unverified) against the budget."""
    head = (f"{'device':<16} {'budget':>8} {'validation':>26} {'test':>26} {'pred ms':>8} {'meas ms':>8} "
            f"{'margin':>7} {'use':>6}  key")
    lines = [head, "-" * len(head)]
    for r in rows:
        m = figure_of(r["measured"])
        used = m if m is not None else r["predicted_ms"]
        acc = r.get("accuracy") or {}
        val, test = (format_accuracy(Accuracy.from_dict(acc.get(split))) for split in ("validation", "test"))
        lines.append(f"{r['device'][:16]:<16} {r['budget_ms']:>6.4g}ms {val:>26} {test:>26} "
                     f"{r['predicted_ms']:>8.4f} {m if m is not None else float('nan'):>8.4f} "
                     f"{100 * (r['budget_ms'] - used) / r['budget_ms']:>6.1f}% {100 * used / r['budget_ms']:>5.1f}%  "
                     f"{r['key']}{'' if r['fits'] else '  (DOES NOT FIT)'}{'' if r['verified'] else '  (unverified)'}")
    pct = rows[0]["percentile"] if rows else 90.0
    lines.append(f"validation and test: top-1 (95 % interval, images) of the exported file; meas ms = measured "
                 f"p{pct:g} (pooled over fresh-process repeats); margin and use are against the budget "
                 "(predicted where unverified)")
    return "\n".join(lines)


def _positive(name: str, value: int, minimum: int = 1) -> int:
    if value < minimum:
        raise UserError(f"--{name} {value} is too small: use at least {minimum}")
    return value


def _slack(percent: Optional[float]) -> Optional[float]:
    if percent is not None and not 0 <= percent <= 100:
        raise UserError(f"--slack {percent:g} must be a percentage between 0 and 100")
    return None if percent is None else percent / 100


def _guard(percent: Optional[float]) -> Optional[float]:
    if percent is None:
        return None
    if not 0 <= percent < 50:
        raise UserError(f"--guard {percent:g} must be a percentage from 0 to below 50")
    return percent / 100


def _learning_rate(lr: float) -> float:
    if not 0 < lr <= 1:
        raise UserError(f"--finetune-lr {lr:g} must be above 0 and at most 1")
    return lr


def _cmd_search(args: Any) -> int:
    if args.threads:
        import torch
        torch.set_num_threads(args.threads)
    budgets = [parse_budget(b) for b in args.budget]
    settings = SearchSettings(population=_positive("population", args.population, 2),
                              evaluations=_positive("evaluations", args.evaluations), seed=args.seed,
                              top=_positive("top", args.top), val_images=_positive("val-images", args.val_images, 0),
                              rescore=_positive("rescore", args.rescore, 0),
                              backend=args.eval_backend, slack=_slack(args.slack),
                              drift_check=args.drift_check, guard=_guard(args.guard), confirm=not args.no_confirm,
                              finetune_steps=_positive("finetune-steps", args.finetune_steps, 0),
                              finetune_lr=_learning_rate(args.finetune_lr))
    from tightfit.search.driver import run_search  # torch: only once the arguments are known good
    quiet = args.quiet or args.json
    rows = run_search(args.run, args.table, budgets, settings, progress=not quiet,
                      say=(lambda line: print(line, file=sys.stderr)) if args.json else print)
    if args.json:
        print(json.dumps(rows, indent=1))
    else:
        print(format_picks(rows))
        print(f"picks: {Path(args.run) / 'search' / 'picks.json'}")
    return exit_code(rows)


def exit_code(rows: list[dict]) -> int:
    """0 every pick measured here fits; 1 a pick does not fit its budget; 3 every pick fits, but some were
    chosen for another device by prediction alone (verify them there)."""
    if not all(r["fits"] for r in rows):
        return 1
    return 0 if all(r["verified"] for r in rows) else 3


def add_search_parser(sub: Any) -> None:
    s = sub.add_parser("search", help="find the most accurate subnet within each latency budget, verify, export",
                       description="For each latency table (device) and budget: regularized evolution over the "
                                   "space under the table's predicted latency, fitness = validation accuracy after "
                                   "BN recalibration (cached in RUN/search). The top candidates are exported and "
                                   "measured directly when the table is for this machine; the most accurate whose "
                                   "measured percentile fits the budget less its guard is exported to "
                                   "RUN/exports/DEVICE-BUDGETms. A pick that uses under 85 % of its budget "
                                   "triggers one shorter search with the limit rescaled by measured/predicted. "
                                   "Exit codes: 0 every pick was measured here and fits; 1 a pick does not fit; "
                                   "3 every pick fits, some only by prediction (another device: verify there); "
                                   "2 bad input.")
    s.add_argument("run", help="run directory written by 'tightfit train'")
    s.add_argument("--table", action="append", required=True, help="latency table JSON; repeatable (one per device)")
    s.add_argument("--budget", action="append", required=True, help="latency budget such as 0.3ms, 300us; repeatable")
    s.add_argument("--population", type=int, default=16, help="aging-evolution population (default 16)")
    s.add_argument("--evaluations", type=int, default=96,
                   help="distinct candidates evaluated per budget, first population included (default 96)")
    s.add_argument("--seed", type=int, default=0, help="seed of the evolution's random draws (default 0)")
    s.add_argument("--top", type=int, default=4, help="candidates measured directly per budget (default 4)")
    s.add_argument("--val-images", type=int, default=0,
                   help="validation images per accuracy evaluation (default 0 = the whole validation split); "
                        "a few hundred make the search several times cheaper, see --rescore")
    s.add_argument("--rescore", type=int, default=8,
                   help="with --val-images: score the best N candidates of each budget again on the whole "
                        "validation split before measuring them, so the pick is not chosen on a small sample "
                        "(default 8; 0 = off)")
    s.add_argument("--slack", type=float, default=None,
                   help="search up to this many percent over each budget (predicted) when picks are measured here "
                        "(default: the predictor's leave-one-out error, 5-25)")
    _add_measurement_arguments(s)
    _add_finetune_arguments(s)
    s.add_argument("--eval-backend", choices=("onnxruntime", "torch"), default="onnxruntime",
                   help="run the validation pass in ONNX Runtime (default, faster) or torch")
    s.add_argument("--threads", type=int, default=None, help="torch/ORT CPU threads for evaluation (default: all cores)")
    s.add_argument("--quiet", action="store_true", help="no progress bar")
    s.add_argument("--json", action="store_true",
                   help="print the picks as JSON on stdout (the rows of RUN/search/picks.json); progress and "
                        "notes go to stderr")
    s.set_defaults(func=_cmd_search)


def _add_measurement_arguments(s: Any) -> None:
    s.add_argument("--guard", type=float, default=None,
                   help="a pick measured here must fit this many percent under its budget, so that QA's later "
                        "measurement still fits (default: each candidate's own, from how much its fresh-process "
                        "repeats disagreed; 5 with one repeat)")
    s.add_argument("--drift-check", action="store_true",
                   help="before each budget, re-measure the table's calibration subnets on this machine (about 20 s) "
                        "and rescale the search limit by their time now/then (off by default: on a shared VM the "
                        "reading was noise; a pick far under its budget triggers a corrected second search anyway)")
    s.add_argument("--no-confirm", action="store_true",
                   help="do not measure a device's picks again after its last budget (by default they are, the "
                        "repeats of both windows pooled, and a pick that no longer keeps its guard is chosen again "
                        "with guards at least that wide; about 5 s per pick)")


def _add_finetune_arguments(s: Any) -> None:
    s.add_argument("--finetune-steps", type=int, default=0,
                   help="fine-tune each pick this many steps from its inherited weights, taught by the largest "
                        "subnet, before it is exported (the graph and its measured latency stay; the manifest "
                        "keeps both accuracies and the cost; default 0 = ship the inherited weights)")
    s.add_argument("--finetune-lr", type=float, default=0.1,
                   help="peak learning rate of the fine-tune, cosine to zero (default 0.1)")
