"""Subcommands `probe`, `profile` and `check-latency`; cli.build_parser adds them.

Each handler imports the heavy modules lazily, like the rest of the CLI.
"""
from __future__ import annotations

import argparse


def _cmd_probe(args: argparse.Namespace) -> int:
    from tightfit.latency.probe import write_bundle
    out = write_bundle(args.run, args.out, n_subnets=args.subnets, zip=args.zip)
    print(f"probe bundle: {out}")
    print(f"copy {out.name} to the device (Python 3 with numpy and onnxruntime; the bundle carries its own code) "
          f"and run there:\n  python {out.name} --out DEVICE.json\nthen copy DEVICE.json to {args.run}/latency/ "
          f"(QA on the device: python {out.name} verify EXPORT_DIR)")
    return 0


def _cmd_profile(args: argparse.Namespace) -> int:
    from tightfit.latency.table import profile_host
    out = profile_host(args.run, args.name, threads=args.threads, quick=args.quick, n_subnets=args.subnets,
                       out=args.out)
    print(f"latency table: {out}")
    from tightfit.latency.predict import predicted_range
    from tightfit.latency.probe import load_source
    print(predicted_range(load_source(args.run)[0], out))
    return 0


def format_check(result: dict) -> str:
    """A short per-subnet table and the headline figures."""
    pct = int(result["budget_percentile"])
    head = f"{'subnet key':<44} {'pred p50':>9} {'meas p50':>9} {'err %':>6} {f'pred p{pct}':>9} {f'meas p{pct}':>9}"
    lines = [head, "-" * len(head)]
    for r in result["rows"]:
        err = 100 * (r["predicted_p50_ms"] - r["measured_p50_ms"]) / r["measured_p50_ms"]
        lines.append(f"{r['key'][:44]:<44} {r['predicted_p50_ms']:>9.4f} {r['measured_p50_ms']:>9.4f} {err:>+6.1f} "
                     f"{r['predicted_budget_stat_ms']:>9.4f} {r['measured_budget_stat_ms']:>9.4f}"
                     + ("" if r["stable"] else "  (not stable)"))
    cal = result["calibration"]["p50_ms"]
    drift = result["session_drift"]
    lines += ["", f"device {result['device']}: {result['subnets']} held-out subnets, calibration "
                  f"{cal['kind']} (a={cal['a']:.3f}, b={cal['b']:.4f} ms, leave-one-out MAPE "
                  f"{cal['loo_mape'] if cal['loo_mape'] is not None else float('nan'):.2f} %)"]
    for label, key in (("p50", "p50"), (f"p{pct}", "budget_stat"), ("raw layer sum vs p50", "uncalibrated_layer_sum"),
                       ("p50, drift taken out", "p50_drift_corrected")):
        e = result[key]
        lines.append(f"  {label:<22} MAPE {e['mape']:6.2f} %   max {e['max_ape']:6.2f} %   Kendall tau {e['kendall_tau']:.3f}")
    if drift is not None:
        lines.append(f"  session drift: calibration subnets measure {100 * drift:+.1f} % vs the table now")
    load = result["load_average"]
    lines.append(f"  load average before {load['before'][0]:.2f}, after {load['after'][0]:.2f}")
    return "\n".join(lines)


def _cmd_check(args: argparse.Namespace) -> int:
    from tightfit.latency.check import check_predictor
    print(format_check(check_predictor(args.run, args.table, n=args.subnets, seed=args.seed)))
    return 0


def add_probe_parser(sub) -> None:
    p = sub.add_parser("probe", help="write a probe bundle: ONNX files of every layer configuration + a few subnets",
                       description="Export one small ONNX model per distinct layer configuration of the run's search "
                                   "space, passthrough models for the per-call overhead, and a few whole subnets for "
                                   "calibration. Measure the bundle on the device with "
                                   "'python -m tightfit.ondevice.runner BUNDLE --out TABLE.json'.")
    p.add_argument("run", help="run directory (or a recipe file, with --out)")
    p.add_argument("--out", default=None, help="bundle folder (default RUN_DIR/probe)")
    p.add_argument("--zip", action="store_true", help="also write OUT.zip to copy to the device")
    p.add_argument("--subnets", type=int, default=8, help="whole subnets for calibration (default 8)")
    p.set_defaults(func=_cmd_probe)


def add_profile_parser(sub) -> None:
    p = sub.add_parser("profile", help="measure this machine's latency table (probe + on-device runner here)",
                       description="Write the probe bundle and measure it on this machine with the on-device "
                                   "runner, into RUN_DIR/latency/NAME.json (or --out). Latency depends on the "
                                   "architecture only: profile the recipe before training to train for the budgets "
                                   "you need (tightfit train RECIPE --table TABLE --budget B).")
    p.add_argument("run", help="run directory, or a recipe file (a table made before training, for "
                               "'tightfit train RECIPE --table TABLE --budget B'; needs --out)")
    p.add_argument("--name", default=None, help="device name, the table's file stem (default: host name)")
    p.add_argument("--out", default=None, help="table file to write (default RUN_DIR/latency/NAME.json)")
    p.add_argument("--threads", type=int, default=1, help="ONNX Runtime intra-op threads (default 1)")
    p.add_argument("--quick", action="store_true", help="smoke-test protocol: one repeat, few runs (not stable)")
    p.add_argument("--subnets", type=int, default=8, help="whole subnets for calibration (default 8)")
    p.set_defaults(func=_cmd_profile)


def add_latency_check_parser(sub) -> None:
    p = sub.add_parser("check-latency", help="compare predicted with directly measured latency of held-out subnets",
                       description="Sample random subnets outside the calibration set, export and measure them "
                                   "whole (interleaved, the table's protocol), and report MAPE and Kendall's tau "
                                   "of the predictor. Writes RUN_DIR/latency/checks/DEVICE.json.")
    p.add_argument("run", help="run directory")
    p.add_argument("--table", required=True, help="latency table measured on this machine")
    p.add_argument("--subnets", type=int, default=30, help="held-out subnets to measure (default 30)")
    p.add_argument("--seed", type=int, default=1, help="seed of the subnet sample (default 1)")
    p.set_defaults(func=_cmd_check)
