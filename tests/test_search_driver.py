"""The per-(device, budget) driver: the front file, ranking, the corrected second search, drift, and
(slow) search + verification + export end to end on a briefly trained run."""
from __future__ import annotations

import hashlib
import json
import random
from pathlib import Path

import pytest

from helpers import FakePredictor, dominated, fake_pick, steady, synthetic_fitness, wide_space
from tightfit.errors import UserError
from tightfit.model.arithmetic import architecture_size
from tightfit.model.space import Subnet
from tightfit.search.cache import AccuracyCache, CachedAccuracy, CachedLatency
from tightfit.search.driver import ranked_within, search_budget, write_front
from tightfit.search.evolution import Candidate, random_search
from tightfit.search.settings import SearchSettings


def test_front_file_over_evaluated_candidates(tmp_path):
    space = wide_space()
    predictor = FakePredictor(space)
    fitness = CachedAccuracy(AccuracyCache(tmp_path / "cache.jsonl", {"recipe_hash": "r"}),
                             lambda s: {"val_acc": synthetic_fitness(3)(s), "params": 1, "macs": 1})
    log = tmp_path / "candidates.jsonl"
    for budget in (1.15, 1.3):
        search_budget(space, fitness, CachedLatency(predictor), budget, "fake", SearchSettings(
            population=10, evaluations=40, seed=2), log)
    rows = [json.loads(line) for line in log.read_text().splitlines()]
    assert {r["budget_ms"] for r in rows} == {1.15, 1.3} and len(rows) == 80
    assert all(r["predicted_ms"] <= r["budget_ms"] for r in rows)
    front = write_front(tmp_path / "front.json", "fake", log)
    pts = [(r["key"], r["val_acc"], r["predicted_ms"]) for r in rows]
    assert {f["key"] for f in front} == {p[0] for p in pts if not dominated(p, pts)}
    assert json.loads((tmp_path / "front.json").read_text()) == front


# ----------------------------------------------------------------------------- accuracy cache


def test_ranked_within_orders_by_accuracy():
    space = wide_space()
    predictor = FakePredictor(space)
    cands = random_search(space, synthetic_fitness(1), predictor.predict_ms, 1.4, 50, seed=3)
    ranked = ranked_within(cands, 1.25)
    assert all(c.latency_ms <= 1.25 for c in ranked)
    assert [c.fitness for c in ranked] == sorted((c.fitness for c in ranked), reverse=True)
    assert len(ranked) == len({c.key for c in cands if c.latency_ms <= 1.25})


# ----------------------------------------------------------------------------- manifest


# ----------------------------------------------------------------------------- end to end (slow)

class FakeTable:
    """A latency table as tightfit.latency.table.LatencyTable presents it (name, device, protocol)."""

    def __init__(self, name: str, device: dict):
        from tightfit.ondevice.timing import Protocol
        self.name, self.hardware, self.entries = name, device, {}
        self.protocol = Protocol(settle_runs=10, settle_window=5, settle_limit=60, time_runs=50,
                                 time_seconds=0.1).to_dict()


class MacsPredictor:
    """Predicted latency proportional to multiply-adds: enough for the search's plumbing."""

    def __init__(self, space, ms_per_mmac: float):
        self.space, self.k = space, ms_per_mmac

    def predict_ms(self, subnet: Subnet) -> float:
        return self.k * architecture_size(self.space, subnet, 3, 16, 10)[1] / 1e5


@pytest.mark.slow
def test_search_verify_export_end_to_end(tiny_run, monkeypatch, capsys):
    import argparse
    import tightfit.search.driver as search
    import tightfit.search.commands as search_cli
    from tightfit.ondevice.hardware import describe_hardware
    from tightfit.rundir import load_trained
    space = load_trained(tiny_run).recipe.space
    here = FakeTable("this-host", describe_hardware())
    away = FakeTable("far-board", {"cpu_model": "some ARM board", "logical_cores": 4, "hostname": "board"})
    tables = {"here.json": (here, MacsPredictor(space, 1.0)), "away.json": (away, MacsPredictor(space, 1.2))}
    monkeypatch.setattr(search, "load_predictors", lambda paths, recipe: [tables[p] for p in paths])
    parser = argparse.ArgumentParser()
    search_cli.add_search_parser(parser.add_subparsers())

    # Bad input: one UserError, nothing written (product contract, "Errors and safety").
    for budget, needle in (("fast", "'fast'"), ("0.001ms", "fastest subnet")):
        args = parser.parse_args(["search", str(tiny_run), "--table", "here.json", "--budget", budget])
        with pytest.raises(UserError, match=needle):
            args.func(args)
    assert not (tiny_run / "search").exists() and not (tiny_run / "exports").exists()

    smallest, largest = (MacsPredictor(space, 1.0).predict_ms(s) for s in (space.smallest(), space.largest()))
    budget = f"{(smallest + largest) / 2:.4f}ms"
    argv = ["search", str(tiny_run), "--table", "here.json", "--table", "away.json", "--budget", budget,
            "--population", "6", "--evaluations", "14", "--top", "2", "--quiet"]
    args = parser.parse_args(argv)
    code = args.func(args)
    out = capsys.readouterr().out
    assert "this-host" in out and "far-board" in out and "unverified" in out
    picks = json.loads((tiny_run / "search" / "picks.json").read_text())
    assert [p["device"] for p in picks] == ["this-host", "far-board"]
    mine, theirs = picks
    # exit codes (search --help): 1 when a pick does not fit, else 3: the far board's pick is unverified
    assert code == (3 if mine["fits"] and theirs["fits"] else 1)
    assert mine["verified"] and mine["measured"]["repeat_spread"] is not None  # >= 2 fresh-process repeats
    assert mine["fits"] == (mine["measured"]["budget_stat_ms"] <= mine["budget_ms"])  # the contract's verdict, by hand
    # measured again after the device's last budget (search/confirm.py): pooled over both windows, or chosen again
    if "chosen_again" not in mine:
        assert mine["confirmed"]["repeats"] == len(mine["measured"]["repeat_figures_ms"]) >= 4
        confirmation = json.loads((Path(mine["export_dir"]) / "manifest.json").read_text())["latency"]["confirmation"]
        assert confirmation == mine["confirmed"]
    assert not theirs["verified"] and theirs["measured"] is None and "tightfit verify" in theirs["note"]
    for p in picks:
        folder = Path(p["export_dir"])
        m = json.loads((folder / "manifest.json").read_text())
        assert m["sha256"] == hashlib.sha256((folder / "model.onnx").read_bytes()).hexdigest()
        assert m["architecture"]["key"] == p["key"] and m["budget"]["device"] == p["device"]
        assert m["accuracy"]["test"]["images"] > 0 and (folder / "state_dict.pt").is_file()
    # The manifest scores the shipped file in ONNX Runtime; eager torch on the same recalibrated
    # static net (tightfit.export.cut, validate=True) must agree, give or take one image whose top two
    # logits are within the export's parity tolerance (onnxruntime vs torch, reference libraries).
    from tightfit.export.cut import cut_one
    from tightfit.data.dataset import load_dataset
    run = load_trained(tiny_run)
    ds = load_dataset(run.recipe.data, run.recipe.seed)
    torch_cut, _ = cut_one(run, ds, "check", space.parse_key(mine["key"]), tiny_run / "check")
    shipped = json.loads((Path(mine["export_dir"]) / "manifest.json").read_text())["accuracy"]["validation"]
    assert shipped["images"] == len(ds.val_y)
    assert abs(shipped["top1"] - torch_cut.val_acc) <= 100.0 / len(ds.val_y) + 1e-9
    rows = [json.loads(line) for line in (tiny_run / "search" / "candidates.jsonl").read_text().splitlines()]
    assert all(r["predicted_ms"] <= r["limit_ms"] for r in rows)
    here_rows = [r for r in rows if r["device"] == "this-host"]
    # 14 per search; a verified pick far under its budget earns one corrected search (corrected_limit) of half that
    assert len(rows) - len(here_rows) == 14 and len(here_rows) == (14 + 7 if "searching again" in out else 14)
    assert all(r["limit_ms"] == r["budget_ms"] for r in rows if r["device"] == "far-board")  # no slack unmeasured
    assert theirs["predicted_ms"] <= theirs["budget_ms"]
    assert not (tiny_run / "search" / "staging").exists()
    cache = (tiny_run / "search" / "accuracy_cache.jsonl").read_text().splitlines()

    # Re-run: every accuracy comes from the cache, the logs are replaced rather than doubled; --json prints
    # the rows of picks.json on stdout.
    args = parser.parse_args(argv + ["--json"])
    assert args.func(args) in (1, 3)
    assert [r["key"] for r in json.loads(capsys.readouterr().out)] == [p["key"] for p in
                                                                       json.loads((tiny_run / "search" / "picks.json").read_text())]
    assert (tiny_run / "search" / "accuracy_cache.jsonl").read_text().splitlines() == cache
    assert len((tiny_run / "search" / "candidates.jsonl").read_text().splitlines()) == len(rows)


def test_search_exit_codes_tell_ci_what_happened():
    from tightfit.search.commands import exit_code
    fits = {"fits": True, "verified": True}
    assert exit_code([fits, fits]) == 0
    assert exit_code([fits, {"fits": True, "verified": False}]) == 3
    assert exit_code([fits, {"fits": False, "verified": True}]) == 1
    assert exit_code([{"fits": False, "verified": False}, {"fits": True, "verified": False}]) == 1


def test_corrected_limit_only_for_a_verified_pick_far_under_budget(tmp_path):
    # The 85 % use bar and the rescaling by measured/predicted are this project's rule (issue bar, common practice
    # of correcting a biased predictor by the ratio observed on measured candidates); written out by hand:
    # usable = budget x (1 - guard) / ratio, limit = usable x (1 + slack).
    from tightfit.search.correction import UNDER_USE, corrected_limit
    from dataclasses import replace
    row = fake_pick(tmp_path, budget_ms=1.0, predicted_ms=0.95, measurement=steady(0.76), measured_over_predicted=0.8)
    limit, usable = corrected_limit(row, 1.0, 0.0, 0.05, 1.05)  # 76 % use, candidates ran 0.8 x predicted
    assert limit == pytest.approx(1.05 / 0.8) and usable == pytest.approx(1.0 / 0.8)
    assert corrected_limit(replace(row, measurement=steady(UNDER_USE)), 1.0, 0.0, 0.05, 1.05) is None  # uses enough
    assert corrected_limit(replace(row, measurement=None), 1.0, 0.0, 0.05, 1.05) is None  # unverified (another device)
    assert corrected_limit(replace(row, fits=False), 1.0, 0.0, 0.05, 1.05) is None       # over budget: nothing fits
    # predictions were right and the guard as expected: the space has nothing closer
    assert corrected_limit(replace(row, measured_over_predicted=1.0), 1.0, 0.0, 0.05, 1.05) is None
    # the drift check already searched up to base / 0.8: searching the same limit again would find nothing new
    assert corrected_limit(row, 1.0, 0.0, 0.05, 1.05 / 0.8) is None
    assert corrected_limit(row, 1.0, 0.0, 0.05, 1.05 / 0.9)[0] == pytest.approx(1.05 / 0.8)  # corrected only part
    # Every top candidate measured 1.10 x its prediction and over the budget, so the pick fell back to a subnet
    # using 22 % of it (seen on Fashion-MNIST: the evolution's candidates all sat in a band just under the
    # limit): search again lower, where candidates now fit (numbers from that run; 5 % guard, 5 % slack).
    fell_back = fake_pick(tmp_path, budget_ms=0.2763, predicted_ms=0.0604, measurement=steady(0.0612),
                          measured_over_predicted=1.10)
    assert corrected_limit(fell_back, 0.2763, 0.05, 0.05, 0.2873)[0] == pytest.approx(0.2763 * 0.95 * 1.05 / 1.10)
    # The demo at fbcf81f: the top candidates measured 1.03 x their predictions (90 % of the 0.0662 ms budget) but
    # needed guards of 14 % from their spread, so the pick fell to the smallest subnet at 58 %; searched at a 5 %
    # guard up to 0.0662 x 0.95 x 1.05, the ratio alone moved the limit under 3 %: the guard they needed must
    # move it, to 0.0662 x 0.86 / 1.03 and 5 % above.
    demo = fake_pick(tmp_path, budget_ms=0.0662, predicted_ms=0.0371, measurement=steady(0.0385),
                     measured_over_predicted=1.03)
    assert corrected_limit(demo, 0.0662, 0.05, 0.05, 0.0662 * 0.95 * 1.05) is None  # the old rule: no correction
    limit, usable = corrected_limit(demo, 0.0662, 0.14, 0.05, 0.0662 * 0.95 * 1.05)
    assert usable == pytest.approx(0.0662 * 0.86 / 1.03) and limit == pytest.approx(usable * 1.05)
    # The demo at 7eeba9a: every candidate under the limit failed (one by a spiky 32 % guard) and the pick fell
    # back to the smallest at 58 %; the others' 2.3 % median guard and the 1.044 ratio move the limit by 1.4 %,
    # inside the 3 % dead band. Fallen back, the search goes 3 % lower: 0.97 x the limit searched.
    fell = fake_pick(tmp_path, budget_ms=0.0662, predicted_ms=0.0372, measurement=steady(0.0382),
                     measured_over_predicted=1.044)
    searched = 0.0662 * 0.95 * 1.05
    assert corrected_limit(fell, 0.0662, 0.0226, 0.05, searched) is None
    limit, usable = corrected_limit(fell, 0.0662, 0.0226, 0.05, searched, fell_back=True)
    assert limit == pytest.approx(0.97 * searched) and usable == pytest.approx(0.97 * searched / 1.05)
    # guards of half the budget or more (two noisy repeats gave 180 %, and a negative limit): no correction
    assert corrected_limit(fell, 0.0662, 1.8, 0.05, searched, fell_back=True) is None
    assert corrected_limit(fell, 0.0662, 0.5, 0.05, searched) is None
    assert corrected_limit(fell, 0.0662, 0.3, 0.05, searched) is not None


def test_a_corrected_search_centres_on_the_guard_its_candidates_needed(tmp_path):
    # The median guard of the candidates measured for a budget (Guard.typical) is what a corrected search
    # centres on; without one, the expected guard (--guard, else 5 %).
    from tightfit.export.pick import Guard
    from tightfit.search.correction import centre_guard
    from dataclasses import replace
    pick = fake_pick(tmp_path, budget_ms=1.0, measurement=steady(0.5), guard=Guard(0.07, "spread", 0.14))
    assert centre_guard(pick, SearchSettings()) == 0.14
    assert centre_guard(replace(pick, guard=Guard(0.07, "spread")), SearchSettings()) == 0.05
    assert centre_guard(replace(pick, guard=None), SearchSettings(guard=0.08)) == 0.08


def test_drifted_limit_follows_the_machine_and_ignores_noise():
    """Predictions are in the table's time; a machine now 25 % slower allows predictions up to limit / 1.25
    (a ratio of times: arithmetic). Within the 3 % dead band the limit stays put (this project's choice: the
    spread of repeated medians on a quiet 2-core VM is a few percent, measured)."""
    from tightfit.latency.drift import DEADBAND, drift_ratio, drifted_limit
    assert drift_ratio([1.25, 2.5, 0.6], [1.0, 2.0, 0.6]) == pytest.approx(1.25)   # the median ratio, not the mean
    assert drift_ratio([], []) is None
    assert drifted_limit(1.0, 1.25) == pytest.approx(0.8)
    assert drifted_limit(1.0, 0.8) == pytest.approx(1.25)
    assert drifted_limit(1.0, 1.0 + DEADBAND / 2) == 1.0
    assert drifted_limit(1.0, None) == 1.0


# ----------------------------------------------------------------------------- the corrected second search


def _drive(tmp_path, monkeypatch, use: float, ratio: float, found: int = 0):
    """_search_device with the evolution and the measured choice injected: returns (limits searched,
    evaluations asked for, the budget's pick rows). The pick measures ``use`` x the budget and its
    candidates ran ``ratio`` x their predictions, on every attempt."""
    from types import SimpleNamespace
    import tightfit.search.driver as driver
    from tightfit.ondevice.hardware import describe_hardware
    space = wide_space()
    calls = []

    def fake_search(space_, fitness, latency, budget_ms, device, settings, log_path=None, progress=False,
                    limit_ms=None, usable_ms=None, seeds=()):
        calls.append((limit_ms, settings.evaluations, len(seeds)))
        subnets = [space_.sample(random.Random(i)) for i in range(found)]  # ``found`` candidates per search
        cands = [Candidate(f"{len(calls)}-{i}", s, 50.0, 0.5, 0) for i, s in enumerate(subnets)]
        return driver.BudgetResult(device, budget_ms, cands, 0.0, found, 0)

    def fake_choose(ctx, table, ranked, budget_ms, latency, verifiable):
        assert verifiable
        return fake_pick(tmp_path / "exports" / "this-host", device=table.name, budget_ms=budget_ms,
                         measurement=steady(use * budget_ms), measured_over_predicted=ratio)

    monkeypatch.setattr(driver, "search_budget", fake_search)
    monkeypatch.setattr(driver, "choose_pick", fake_choose)
    monkeypatch.setattr(driver, "write_picks", lambda run, picks, path: [{"budget_ms": p.budget_ms} for p in picks])
    monkeypatch.setattr(driver, "remove_staging", lambda ctx, pick: None)
    compute = SimpleNamespace(phases=lambda latency: {"validation": 0.0})
    settings = SearchSettings(population=8, evaluations=40, slack=0.1, guard=0.05, confirm=False)
    ctx = SimpleNamespace(run_dir=tmp_path, run=SimpleNamespace(recipe=SimpleNamespace(space=space)),
                          settings=settings, compute=compute, fitness=None, progress=False, say=lambda s: None,
                          whole=None)
    (tmp_path / "search").mkdir()
    table = FakeTable("this-host", describe_hardware())
    picks = driver._search_device(ctx, table, FakePredictor(space), [1.0])
    return calls, picks


def test_a_pick_far_under_budget_earns_one_corrected_search_with_half_the_evaluations(tmp_path, monkeypatch):
    # This project's rule (search/driver.py corrected_limit): searched up to budget x (1 - guard) x (1 + slack);
    # a pick using 50 % of its budget whose candidates ran 0.8 x their predictions searches once more,
    # up to that base / 0.8, with half the evaluations -- and only once, however far under it still is.
    calls, picks = _drive(tmp_path, monkeypatch, use=0.5, ratio=0.8)
    base = 1.0 * 0.95 * 1.1
    assert [c[1] for c in calls] == [40, 20]
    assert calls[0][0] == pytest.approx(base) and calls[1][0] == pytest.approx(base / 0.8)
    assert len(picks) == 1 and picks[0]["budget_ms"] == 1.0


def test_the_corrected_search_starts_unseeded_so_its_evaluations_are_fresh(tmp_path, monkeypatch):
    # Candidates already evaluated join a search without a fitness call and count towards its evaluations
    # (evolution.py); a correction asked for half the evaluations and got them all from the first search's
    # candidates (the demo at fbcf81f: "12 candidates (0 evaluated ...)"). The correction starts unseeded;
    # what the first search found is still ranked (driver.ranked_within over every candidate seen).
    calls, _ = _drive(tmp_path, monkeypatch, use=0.5, ratio=0.8, found=30)
    assert [(c[1], c[2]) for c in calls] == [(40, 0), (20, 0)]


def test_a_pick_that_uses_its_budget_is_searched_once(tmp_path, monkeypatch):
    calls, picks = _drive(tmp_path, monkeypatch, use=0.9, ratio=0.8)
    assert [c[1] for c in calls] == [40] and len(picks) == 1


def test_capped_scores_choose_what_is_rescored_and_the_whole_split_orders_it():
    # This project's rule (search/driver.py measuring_order): the best `rescore` candidates by the capped score are
    # scored again on the whole split and measured in that order (front first); the rest follow unchanged.
    from types import SimpleNamespace
    from tightfit.search.driver import measuring_order
    from tightfit.search.evolution import Candidate
    space = wide_space()
    subs = [space.smallest(), space.middle(), space.largest()]
    cheap = [Candidate(s.to_key(), s, f, ms, 0) for s, f, ms in zip(subs, (90.0, 89.0, 70.0), (1.0, 1.0, 1.0))]
    whole_acc = {subs[0].to_key(): 85.0, subs[1].to_key(): 88.0}
    asked = []

    def whole(subnet):
        asked.append(subnet.to_key())
        return whole_acc[subnet.to_key()]
    whole.fresh = 0
    from tightfit.search.cpu import CpuSplit
    ctx = SimpleNamespace(settings=SearchSettings(val_images=100, rescore=2), whole=whole, say=lambda s: None,
                          cpu=CpuSplit())
    order = measuring_order(ctx, cheap)
    assert asked == [subs[0].to_key(), subs[1].to_key()]          # only the best two by the capped score
    assert [c.key for c in order] == [subs[1].to_key(), subs[0].to_key(), subs[2].to_key()]
    assert [c.fitness for c in order] == [88.0, 85.0, 70.0]
    off = SimpleNamespace(settings=SearchSettings(), whole=None, say=lambda s: None)
    assert [c.key for c in measuring_order(off, cheap)] == [c.key for c in cheap]
