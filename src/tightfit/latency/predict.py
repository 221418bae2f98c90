"""Predict a subnet's latency from a table of isolated layers, calibrated on whole subnets.

Summing isolated layers overshoots: every probe pays what a whole network pays once, a
session call (feeding the input, fetching the output) and, where the runtime keeps convs
in a blocked memory layout, a layout change in and out (ONNX Runtime's NCHWc on x86),
plus an unfused skip add. The table holds passthrough probes (the cheapest conv, once and
twice, per input shape and skip) that isolate exactly that: 2 * T(once) - T(twice). Each
layer costs its latency minus that overhead; a network pays it once. What is left (caches,
the first and last layers' layouts) is small and smooth, fitted on the bundle's
whole-subnet entries: identity, ratio or affine, whichever predicts held-out calibration
subnets best (leave-one-out).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from tightfit.errors import UserError
from tightfit.latency.layers import layer_configs, overhead_configs, overhead_id, subnet_layer_ids
from tightfit.latency.table import STATS, LatencyTable, load_table
from tightfit.recipe import Recipe
from tightfit.model.space import SpaceSpec, Subnet, space_hash


def _tied_pairs(sorted_values: list) -> int:
    """Pairs of equal values in a sorted list."""
    total, run = 0, 1
    for a, b in zip(sorted_values, sorted_values[1:]):
        if a == b:
            run += 1
        else:
            total, run = total + run * (run - 1) // 2, 1
    return total + run * (run - 1) // 2


def _inversions(values: list) -> tuple[list, int]:
    """(sorted copy, pairs i < j with values[i] > values[j]) by merge sort."""
    if len(values) < 2:
        return list(values), 0
    mid = len(values) // 2
    left, a = _inversions(values[:mid])
    right, b = _inversions(values[mid:])
    merged, count, i, j = [], a + b, 0, 0
    while i < len(left) and j < len(right):
        if right[j] < left[i]:
            merged.append(right[j])
            count += len(left) - i
            j += 1
        else:
            merged.append(left[i])
            i += 1
    return merged + left[i:] + right[j:], count


def kendall_tau(x, y) -> float:
    """Kendall's rank correlation (Kendall 1938), tau-b for ties, in O(n log n) (Knight 1966).

    Sort by (x, y); the inversions left in y are the discordant pairs; tied pairs are
    counted from runs. NaN when either side is constant.
    """
    if len(x) != len(y) or len(x) < 2:
        raise ValueError("kendall_tau needs two sequences of the same length >= 2")
    order = sorted(range(len(x)), key=lambda i: (x[i], y[i]))
    xs, ys = [x[i] for i in order], [y[i] for i in order]
    n0 = len(xs) * (len(xs) - 1) // 2
    tied_x, tied_xy = _tied_pairs(xs), _tied_pairs(list(zip(xs, ys)))
    ys_sorted, discordant = _inversions(ys)
    tied_y = _tied_pairs(ys_sorted)
    denom = math.sqrt((n0 - tied_x) * (n0 - tied_y))
    if denom == 0:
        return float("nan")
    return (n0 - tied_x - tied_y + tied_xy - 2 * discordant) / denom


@dataclass(frozen=True)
class Calibration:
    """predicted = a * adjusted layer sum + b, chosen by leave-one-out error."""
    kind: str                  # "sum" | "ratio" | "affine"
    a: float = 1.0
    b: float = 0.0
    loo_mape: float | None = None   # percent, on the calibration subnets
    points: int = 0

    def __call__(self, x: float) -> float:
        return self.a * x + self.b


def _fit(kind: str, x: np.ndarray, y: np.ndarray) -> tuple[float, float]:
    """Least squares on relative error (weights 1/y), so small and large subnets count alike."""
    if kind == "sum":
        return 1.0, 0.0
    if kind == "ratio":
        return float(np.sum(x / y) / np.sum((x / y) ** 2)), 0.0
    design = np.stack([x / y, 1.0 / y], axis=1)
    a, b = np.linalg.lstsq(design, np.ones_like(y), rcond=None)[0]
    return float(a), float(b)


def _loo_mape(kind: str, x: np.ndarray, y: np.ndarray) -> float:
    errs = []
    for i in range(len(x)):
        keep = np.arange(len(x)) != i
        a, b = _fit(kind, x[keep], y[keep])
        errs.append(abs(a * x[i] + b - y[i]) / y[i])
    return 100.0 * float(np.mean(errs))


def calibrate(x: list[float], y: list[float]) -> Calibration:
    """Pick identity, ratio or affine by leave-one-out MAPE (affine needs 4+ points, ratio 2+)."""
    xa, ya = np.asarray(x, float), np.asarray(y, float)
    kinds = ["sum"] + (["ratio"] if len(xa) >= 2 else []) + (["affine"] if len(xa) >= 4 else [])
    if len(xa) < 2:
        return Calibration("sum", points=len(xa))
    # a fit where more layer time means less latency is noise, whatever its error
    scored = [(_loo_mape(k, xa, ya), k) for k in kinds if _fit(k, xa, ya)[0] > 0]
    err, kind = min(scored)
    a, b = _fit(kind, xa, ya)
    return Calibration(kind, a, b, err, len(xa))


class LatencyPredictor:
    """Latency of any subnet of `space` on the table's device, in milliseconds.

    `target` is the statistic predicted (p50_ms, p90_ms, p99_ms, mean_ms or
    budget_stat_ms, the table protocol's budget percentile); layers always add their
    `layer_stat`, the mean by default: a network's time is the sum of its layers' times, and
    the mean of a sum is the sum of the means (a sum of medians of skewed per-layer timings
    falls short). Measured on the demo space (30 held-out subnets, 2-core VM): Kendall tau
    0.96 with layer means against 0.83 with layer medians; Fashion-MNIST space alike.
    """

    def __init__(self, table: LatencyTable, space: SpaceSpec, in_channels: int, image_size: int,
                 target: str = "budget_stat_ms", layer_stat: str = "mean_ms"):
        for stat in (target, layer_stat):
            if stat not in STATS:
                raise UserError(f"unknown latency statistic {stat!r}; choose one of {', '.join(STATS)}")
        expected = space_hash(space, in_channels, image_size)
        if table.space_hash != expected:
            raise UserError(f"latency table {table.path} was measured for another search space (hash "
                            f"{table.space_hash} ≠ {expected}); probe this run's space with 'tightfit probe RUN_DIR'")
        self.table, self.space, self.target, self.layer_stat = table, space, target, layer_stat
        layers = layer_configs(space, in_channels, image_size)
        needed = [c.id for c in layers + overhead_configs(layers)]
        missing = [i for i in needed if table.entries.get(i, {}).get("kind") != "layer"]
        if missing:
            raise UserError(f"latency table {table.path} lacks {len(missing)} layer entries (e.g. {missing[0]!r}); "
                            "re-probe with 'tightfit probe RUN_DIR' and re-measure")
        value = {i: float(table.entries[i][layer_stat]) for i in needed}

        def overhead(chs: int, res: int, skip: bool) -> float:
            return 2 * value[overhead_id(chs, res, skip, 1)] - value[overhead_id(chs, res, skip, 2)]
        self._latency = {c.id: value[c.id] for c in layers}
        self._cost = {c.id: value[c.id] - overhead(c.in_channels, c.resolution, c.skip) for c in layers}
        self._base = overhead(in_channels, image_size, False)
        self.calibration_keys = [k for k in table.subnet_entries() if self._in_space(k)]
        xs = [self.adjusted_sum_ms(Subnet.from_key(k)) for k in self.calibration_keys]
        ys = [float(table.subnet_entries()[k][target]) for k in self.calibration_keys]
        self.calibration = calibrate(xs, ys)

    def _in_space(self, key: str) -> bool:
        try:
            return self.space.contains(Subnet.from_key(key))
        except UserError:
            return False

    def _ids(self, subnet: Subnet) -> list[str]:
        if not self.space.contains(subnet):
            raise UserError(f"subnet {subnet.to_key()} is not in this search space")
        return subnet_layer_ids(self.space, subnet)

    def layer_sum_ms(self, subnet: Subnet) -> float:
        """Plain sum of the isolated layers' latencies (no corrections)."""
        return sum(self._latency[i] for i in self._ids(subnet))

    def adjusted_sum_ms(self, subnet: Subnet) -> float:
        """Layers minus their per-probe overhead, plus the one overhead a whole network pays."""
        return self._base + sum(self._cost[i] for i in self._ids(subnet))

    def predict_ms(self, subnet: Subnet) -> float:
        return self.calibration(self.adjusted_sum_ms(subnet))


def load_predictor(recipe: Recipe, table_path, target: str = "budget_stat_ms") -> LatencyPredictor:
    """The predictor for a run's recipe and one table file (refused if measured for another space)."""
    chs, size = recipe.data.channels, recipe.data.image_size
    table = load_table(table_path, space_hash(recipe.space, chs, size))
    return LatencyPredictor(table, recipe.space, chs, size, target=target)


def predicted_range(recipe: Recipe, table_path) -> str:
    """One line a user reads before choosing budgets: what the table predicts for the smallest, middle
    and largest subnet (the budget percentile, p90 by default)."""
    pred = load_predictor(recipe, table_path)
    sp, pct = recipe.space, int(pred.table.percentile)
    lo, mid, hi = (pred.predict_ms(s) for s in (sp.smallest(), sp.middle(), sp.largest()))
    return (f"{pred.table.name}: predicted p{pct} {lo:.3f} ms (smallest) .. {mid:.3f} ms (middle) .. {hi:.3f} ms "
            f"(largest); budgets between these can be searched ({len(pred.table.entries)} table entries)")
