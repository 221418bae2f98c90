"""Training-screen figures against their baseline seeds (torch-free: the benchmark page uses it too).

The JSON is what scripts/bench_train_settings.py --json writes: {"protocol": ..., "runs": {label: record}}.
"""
from __future__ import annotations

import math

COLUMNS = ("largest", "middle", "smallest", "mean_random")
BASELINES = ("as written", "seed=1")  # two seeds of the recipe as written: the noise level


def _figures(rec: dict) -> dict[str, float]:
    return {**rec["acc"], **({"mean_random": rec["mean_random"]} if "mean_random" in rec else {})}


def summarise(doc: dict, baselines: tuple[str, ...] = BASELINES) -> list[dict]:
    """Each run against the mean of the baseline seeds, in points, with a verdict against their noise.

    Noise: sigma, one run's standard deviation, from the two seeds' differences d over the four
    columns (sigma^2 = mean(d^2) / 2). A run minus the two-seed mean has sd sigma * sqrt(1.5);
    an effect is clear beyond 2 * sigma * sqrt(1.5) ("threshold"). Verdict on the mean of the four
    columns: "adopt" if it is above the threshold and no column is below -threshold, "no" if it is
    below -threshold, "unclear" otherwise. Alone runs show the gap their subnet leaves."""
    runs = doc["runs"]
    base = [_figures(runs[b]) for b in baselines]
    mean = {c: sum(b[c] for b in base) / len(base) for c in COLUMNS}
    sigma = math.sqrt(sum((base[0][c] - base[1][c]) ** 2 for c in COLUMNS) / len(COLUMNS) / 2)
    threshold = 2 * sigma * math.sqrt(1.5)
    base_s = sum(runs[b]["train_s"] for b in baselines) / len(baselines)
    rows = []
    for label, rec in runs.items():
        fig = _figures(rec)
        delta = {c: fig[c] - mean[c] for c in COLUMNS if c in fig}
        row = {"label": label, "delta": delta, "train_s": rec["train_s"], "delta_s": rec["train_s"] - base_s,
               "sigma": sigma, "threshold": threshold}
        if len(delta) == len(COLUMNS) and label not in baselines:
            avg = sum(delta.values()) / len(delta)
            row["mean_delta"] = avg
            row["verdict"] = ("adopt" if avg > threshold and min(delta.values()) > -threshold
                              else "no" if avg < -threshold else "unclear")
        rows.append(row)
    return rows
