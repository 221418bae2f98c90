"""The latency record (tightfit.ondevice.measurement): the one fit rule, budget use, and the record on disk."""
from __future__ import annotations

import json

import numpy as np
import pytest

from helpers import steady
from tightfit.ondevice.measurement import Measurement, SpeedStates, figure_of
from tightfit.ondevice.repeats import combine_repeats
from tightfit.ondevice.timing import Protocol, summarize


@pytest.mark.parametrize("figure, budget, guard, fits", [
    (0.95, 1.0, 0.05, True),     # 0.95 <= 1.0 x 0.95: exactly at the budget less its guard
    (0.951, 1.0, 0.05, False),   # a thousandth over it
    (0.97, 1.0, 0.0, True),      # guard 0: the verdict, met at or under the budget
    (1.0, 1.0, 0.0, True),
    (1.001, 1.0, 0.0, False),
    (0.30, 0.32, 0.10, False),   # 0.32 x 0.90 = 0.288 < 0.30
    (0.28, 0.32, 0.10, True),
])
def test_a_figure_fits_the_budget_less_its_guard(figure, budget, guard, fits):
    # The rule written out by hand (DEVELOPERS.md glossary, "guard"): figure <= budget x (1 - guard); with no
    # guard it is docs/contract.md's verdict, "a budget is met when p90 <= budget".
    assert steady(figure).fits(budget, guard) is fits


def test_budget_use_is_the_figure_over_the_budget():
    # budget use = measured percentile / budget (docs/contract.md, the manifest's budget.use), to 4 decimals
    assert steady(0.0436 * 0.934).use(0.0436) == 0.934
    assert steady(0.221).use(0.4) == pytest.approx(0.5525)
    assert steady(0.2).use(None) is None       # a model cut by hand without a budget claims none


def _repeat(ms: np.ndarray) -> dict:
    return {**summarize(ms / 1e3), "times_ms": list(ms), "settled": True}


def test_the_record_round_trips_through_json_as_the_files_hold_it():
    # A real pooled measurement (two speed states, so every field carries information) written as a table entry
    # is written, read back with the standard library's json, and read into an equal record.
    rng = np.random.default_rng(0)
    reps = [_repeat(np.where(rng.random(300) < share, 1.9, 1.0) * (1 + 0.02 * rng.standard_normal(300)))
            for share in (0.1, 0.3, 0.2)]
    m = combine_repeats(reps, Protocol(repeats=3))
    assert m.states.two_states and len(m.repeats) == 3
    back = Measurement.from_dict(json.loads(json.dumps(m.to_dict())))
    assert back == m and back.repeats == m.repeats
    assert back.figure_ms == pytest.approx(np.percentile(np.concatenate([r["times_ms"] for r in reps]), 90))
    # the on-disk keys the tables, verdicts and manifests have always had
    assert {"budget_stat_ms", "budget_percentile", "p50_ms", "p90_ms", "guard", "states", "repeats"} <= set(m.to_dict())
    # a table entry's own keys beside the record are ignored; a record without its figure is a damaged file
    assert Measurement.from_dict({**m.to_dict(), "kind": "subnet", "file": "a.onnx"}) == m
    broken = {k: v for k, v in m.to_dict().items() if k != "budget_stat_ms"}
    with pytest.raises(ValueError, match="budget_stat_ms"):
        Measurement.from_dict(broken)
    assert Measurement.from_dict(None) is None


def test_older_records_read_with_the_defaults_and_readers_that_tolerate_gaps_get_the_figure():
    old = {k: v for k, v in steady(0.5).to_dict().items() if k not in ("states", "guard", "repeats")}
    m = Measurement.from_dict(old)
    assert m.states == SpeedStates() and m.guard is None and m.repeats == ()
    assert figure_of({"budget_stat_ms": 0.31}) == 0.31       # a report reading a partial row
    assert figure_of(None) is None and figure_of({"p90_ms": 0.3}) is None


def test_a_record_refuses_figures_that_are_not_latencies():
    with pytest.raises(ValueError):
        steady(float("nan"))
    with pytest.raises(ValueError):
        steady(-0.1)
    with pytest.raises(ValueError):
        steady(0.1, percentile=0.0)
