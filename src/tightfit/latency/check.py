"""`tightfit check-latency`: the predictor against direct measurement of held-out subnets.

Held-out subnets are measured whole, interleaved in one session with the table's
calibration subnets, whose ratio to the table shows how far the machine has moved since
it was profiled (not the predictor's error, but it lands in the MAPE).
"""
from __future__ import annotations

import os
import random
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

from tightfit.errors import UserError
from tightfit.latency.drift import drift_ratio, write_subnet_onnx
from tightfit.latency.predict import kendall_tau, load_predictor
from tightfit.latency.probe import load_source
from tightfit.model.space import SpaceSpec, Subnet
from tightfit.ondevice.files import write_json
from tightfit.ondevice.hardware import describe_hardware, same_host
from tightfit.ondevice.measurement import Measurement
from tightfit.ondevice.repeats import measure_repeated
from tightfit.ondevice.timing import Protocol, stderr_progress


def held_out_subnets(space: SpaceSpec, n: int, exclude: set[str], seed: int) -> list[Subnet]:
    """n distinct random subnets whose keys are not in `exclude` (fewer only if the space is tiny)."""
    rng, out = random.Random(seed), {}
    for _ in range(200 * n):
        if len(out) >= n:
            break
        s = space.sample(rng)
        if s.to_key() not in exclude:
            out.setdefault(s.to_key(), s)
    return list(out.values())


def _errors(predicted: list[float], measured: list[float]) -> dict[str, float]:
    ape = [abs(p - m) / m * 100.0 for p, m in zip(predicted, measured)]
    return {"mape": float(np.mean(ape)), "max_ape": float(np.max(ape)),
            "kendall_tau": kendall_tau(predicted, measured)}


# long: measurement, then one flat record of every figure the check reports
def check_predictor(run_dir, table_path, n: int = 30, seed: int = 1, protocol=None,
                    progress: bool = True, twice: bool = False) -> dict:
    """Measure n held-out random subnets whole, interleaved in one session, against the predictor.

    The table's calibration subnets are measured in the same session as references: their
    ratio to the table shows how far this session's machine state sits from the table's,
    which is not the predictor's error but does land in its MAPE. With ``twice``, the same
    files are measured again and the second measurement scored against the first: the
    error a perfect predictor would still show (the measurement's own reproducibility).
    """
    if n < 5:
        raise UserError(f"--subnets {n} is too few to judge a predictor; use at least 5 (30 is the default)")
    recipe, supernet = load_source(run_dir)
    chs, size = recipe.data.channels, recipe.data.image_size
    predictors = {t: load_predictor(recipe, table_path, target=t) for t in ("p50_ms", "budget_stat_ms")}
    table = predictors["p50_ms"].table
    if not same_host(table.hardware):
        there, here = table.hardware, describe_hardware()
        raise UserError(f"{table_path} was measured on {there.get('hostname')!r} ({there.get('cpu_model')}), this is "
                        f"{here.get('hostname')!r} ({here.get('cpu_model')}): check-latency measures here, so it can only "
                        "check a table of this machine; run it on that device")
    protocol = protocol or Protocol.from_dict(table.protocol)
    refs = predictors["p50_ms"].calibration_keys
    subnets = held_out_subnets(recipe.space, n, set(refs), seed)
    if len(subnets) < 5:
        raise UserError(f"the search space has only {len(subnets)} subnets outside the calibration set; "
                        "too few to check a predictor")
    load_before = os.getloadavg()
    with tempfile.TemporaryDirectory(prefix="tightfit-check-") as tmp:
        todo = subnets + [Subnet.from_key(k) for k in refs]
        paths = write_subnet_onnx(supernet, todo, Path(tmp), chs, size, progress)
        measured = _as_dicts(measure_repeated(paths, protocol, int(table.protocol.get("chunk", 10)),
                                              progress=stderr_progress("check") if progress else None))
        again = _as_dicts(measure_repeated(paths[:len(subnets)], protocol, int(table.protocol.get("chunk", 10)),
                                           progress=stderr_progress("check again") if progress else None)) if twice else None
    rows = []
    for s, path in zip(subnets, paths):
        m = measured[path]
        rows.append({"key": s.to_key(), "layer_sum_ms": predictors["p50_ms"].layer_sum_ms(s),
                     **{f"predicted_{t}": p.predict_ms(s) for t, p in predictors.items()},
                     **{f"measured_{t}": m[t] for t in predictors}, "stable": m["stable"]})
    ref_paths = paths[len(subnets):]
    drift_or_none = drift_ratio([measured[p]["p50_ms"] for p in ref_paths],
                                [float(table.subnet_entries()[k]["p50_ms"]) for k in refs])
    drift = 1.0 if drift_or_none is None else drift_or_none
    result = {
        "table": str(table.path), "device": table.name, "subnets": len(rows), "seed": seed,
        "protocol": protocol.to_dict(), "budget_percentile": protocol.percentile,
        "calibration": {t: vars(p.calibration) for t, p in predictors.items()},
        "p50": _errors([r["predicted_p50_ms"] for r in rows], [r["measured_p50_ms"] for r in rows]),
        "budget_stat": _errors([r["predicted_budget_stat_ms"] for r in rows],
                               [r["measured_budget_stat_ms"] for r in rows]),
        "uncalibrated_layer_sum": _errors([r["layer_sum_ms"] for r in rows], [r["measured_p50_ms"] for r in rows]),
        # the machine's drift since profiling, as the calibration subnets show it, taken out
        "p50_drift_corrected": _errors([drift * r["predicted_p50_ms"] for r in rows], [r["measured_p50_ms"] for r in rows]),
        "session_drift": None if drift_or_none is None else drift - 1.0,
        "load_average": {"before": list(load_before), "after": list(os.getloadavg())},
        **({"measurement_vs_measurement": {
            name: _errors([again[p][stat] for p in paths[:len(subnets)]], [measured[p][stat] for p in paths[:len(subnets)]])
            for name, stat in (("p50", "p50_ms"), ("budget_stat", "budget_stat_ms"))}} if again is not None else {}),
        "rows": rows,
    }
    write_json(Path(run_dir) / "latency" / "checks" / f"{table.name}.json", result)
    return result


def _as_dicts(measured: dict[str, Measurement]) -> dict[str, dict[str, Any]]:
    """The measurements as the table's entries hold them (Measurement.to_dict), keyed like the table."""
    return {path: m.to_dict() for path, m in measured.items()}
