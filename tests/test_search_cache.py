"""The accuracy cache: re-runs, recipe changes and interrupted searches."""
from __future__ import annotations

from pathlib import Path

import pytest

from helpers import BUDGET, FakePredictor, synthetic_fitness, wide_space
from tightfit.model.space import Subnet
from tightfit.search.cache import AccuracyCache, CachedAccuracy
from tightfit.search.evolution import (EvolutionSettings, regularized_evolution)


class CountingAccuracy:
    """Stands in for BN recalibration + validation: counts calls, can fail after N (an interrupt)."""

    def __init__(self, fail_after: int | None = None):
        self.calls, self.fail_after, self.fn = 0, fail_after, synthetic_fitness(7)

    def __call__(self, subnet: Subnet) -> dict:
        if self.fail_after is not None and self.calls >= self.fail_after:
            raise KeyboardInterrupt
        self.calls += 1
        return {"val_acc": self.fn(subnet), "params": 0, "macs": 0}


def _evolve(path: Path, compute, tag=None, seed=0, evaluations=60):
    space = wide_space()
    fitness = CachedAccuracy(AccuracyCache(path, tag or {"recipe_hash": "abc", "images": 100}), compute)
    cfg = EvolutionSettings(population=12, sample_size=4, evaluations=evaluations, seed=seed)
    return regularized_evolution(space, fitness, FakePredictor(space).predict_ms, BUDGET, cfg), fitness


def test_cache_reused_on_second_run(tmp_path):
    path = tmp_path / "accuracy_cache.jsonl"
    first, f1 = _evolve(path, CountingAccuracy())
    assert f1.fresh == 60
    again = CountingAccuracy()
    second, f2 = _evolve(path, again)
    assert again.calls == 0 and f2.fresh == 0 and f2.hits == 60
    assert [c.key for c in first] == [c.key for c in second]
    # Another budget or seed pays only for subnets it has not seen.
    third = CountingAccuracy()
    cands, f3 = _evolve(path, third, seed=5)
    assert third.calls == f3.fresh == len({c.key for c in cands} - {c.key for c in first})


def test_cache_invalidated_by_recipe_hash(tmp_path):
    path = tmp_path / "accuracy_cache.jsonl"
    _evolve(path, CountingAccuracy())
    other = CountingAccuracy()
    _evolve(path, other, tag={"recipe_hash": "changed", "images": 100})
    assert other.calls == 60


def test_interrupted_search_resumes_from_cache(tmp_path):
    path = tmp_path / "accuracy_cache.jsonl"
    with pytest.raises(KeyboardInterrupt):
        _evolve(path, CountingAccuracy(fail_after=25))
    with open(path, "a") as f:
        f.write('{"key": "3:3/3:')  # a line torn by the kill
    rerun = CountingAccuracy()
    cands, fit = _evolve(path, rerun)
    assert len(cands) == 60 and rerun.calls == 60 - 25 and fit.hits == 25
    assert len(AccuracyCache(path, {"recipe_hash": "abc", "images": 100}).entries) == 60  # nothing glued to the torn line
    fresh = CountingAccuracy()
    reference, _ = _evolve(tmp_path / "fresh.jsonl", fresh)
    assert [c.key for c in cands] == [c.key for c in reference]
