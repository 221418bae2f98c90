"""A search's pick as one record: the lead over the runner-up and the "split too small" line through the
choice (search/choose.py choose_pick, measurements and per-image answers injected), and a fine-tuned,
confirmed pick written once (search/driver.py, export/pick.py)."""
from __future__ import annotations

import json
import shutil
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest

from tightfit.export.cut import CutResult
from tightfit.ondevice.timing import Protocol, summarize
from tightfit.search.evolution import Candidate
from tightfit.search.settings import SearchSettings

N_VAL = 400


def _steady_repeats(level_ms: float, repeats: int) -> list[dict]:
    """Fresh-process repeats of identical runs at ``level_ms`` (as timing.measure_interleaved returns them)."""
    ms = np.full(200, level_ms)
    return [{**summarize(ms / 1e3), "times_ms": list(ms), "settled": True} for _ in range(repeats)]


def _vectors(only_pick: int, only_rival: int, both: int = 340) -> tuple[np.ndarray, np.ndarray]:
    """Right/wrong per image for the pick and its rival over N_VAL images: ``both`` right for both, then
    ``only_pick`` right for the pick alone, ``only_rival`` for the rival alone, the rest wrong for both."""
    pick, rival = np.zeros(N_VAL, bool), np.zeros(N_VAL, bool)
    pick[:both] = rival[:both] = True
    pick[both:both + only_pick] = True
    rival[both + only_pick:both + only_pick + only_rival] = True
    return pick, rival


def _choose(tmp_path, monkeypatch, scores: dict[str, float], hits: dict[str, np.ndarray],
            table_protocol: Protocol = Protocol(repeats=2), asked: list | None = None):
    """choose_pick over candidates named by ``scores`` (search validation scores), every one measured 0.9 ms
    for a 1 ms budget (all keep a 5 % guard); each candidate's ONNX file answers ``hits[key]``; the protocol
    of every measurement is appended to ``asked``."""
    import tightfit.search.choose as choose

    def cut_one(run, ds, name, subnet, out_dir, validate=True):
        path = out_dir / name / "model.onnx"
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(subnet.to_key().encode())   # the key stands in for the graph
        return CutResult(name, subnet.to_key(), 1, 1, None, path, 0.0), None

    monkeypatch.setattr(choose, "cut_one", cut_one)
    def measure(paths, protocol):
        (asked if asked is not None else []).append(protocol)
        return {p: _steady_repeats(0.9, protocol.repeats) for p in paths}
    monkeypatch.setattr(choose, "repeat_summaries", measure)
    monkeypatch.setattr(choose, "shipped_hits", lambda data, ds, split: hits[data.decode()])
    said: list[str] = []
    ctx = SimpleNamespace(run_dir=tmp_path, run=SimpleNamespace(recipe=SimpleNamespace(space=None)),
                          ds=SimpleNamespace(val_y=np.zeros(N_VAL)),
                          settings=SearchSettings(top=len(scores), guard=0.05), say=said.append, pick_runs={})
    ranked = [Candidate(k, SimpleNamespace(to_key=lambda k=k: k), acc, 0.9, 0)
              for k, acc in sorted(scores.items(), key=lambda kv: -kv[1])]
    table = SimpleNamespace(name="host", protocol=table_protocol.to_dict(), hardware={})
    return choose.choose_pick(ctx, table, ranked, 1.0, latency=None, verifiable=True), said


def test_the_lead_over_the_runner_up_is_mcnemars_test_on_their_validation_answers(tmp_path, monkeypatch):
    # 12 images only the pick gets right, 3 only the runner-up: McNemar's exact test (McNemar 1947; the binomial
    # formula by hand) p = 2 x (C(15,0) + C(15,1) + C(15,2) + C(15,3)) / 2^15 = 2 x 576 / 32768 = 0.03515625.
    pick, rival = _vectors(12, 3)
    third = np.zeros(N_VAL, bool)
    # the scores span 0.4 points, far less than the pick's interval: only a lead beyond noise keeps the search quiet
    out, said = _choose(tmp_path, monkeypatch, {"a": 90.0, "b": 89.8, "c": 89.6}, {"a": pick, "b": rival, "c": third})
    assert out.key == "a" and out.fits
    lead = out.lead
    assert (lead.against, lead.only_first, lead.only_second, lead.images) == ("b", 12, 3, N_VAL)
    assert lead.p_value == pytest.approx(2 * 576 / 2 ** 15) and lead.beyond_noise()
    assert (out.validation.correct, out.validation.images, out.validation.split) == (352, N_VAL, "validation")
    assert not any("cannot separate" in line for line in said)
    from tightfit.export.pick import pick_row
    row = pick_row(out)   # the row carries the same accuracy section as the manifest, the lead included
    assert row["accuracy"]["lead"] == lead.to_dict() and row["accuracy"]["validation"]["images"] == N_VAL


def test_a_split_too_small_to_separate_the_front_is_said_in_one_line(tmp_path, monkeypatch):
    # The rule (search/lead.py too_small_to_separate): the lead is not beyond noise (5 vs 3 discordant images:
    # exact p = 2 x 93 / 256 = 0.73) and the pick's Wilson 95 % interval on 400 images (about 6 points wide
    # at 86 %) is wider than the contenders' scores span (1 point): one line, naming data.val_fraction.
    pick, rival = _vectors(5, 3)
    hits = {"a": pick, "b": rival, "c": rival}
    out, said = _choose(tmp_path, monkeypatch, {"a": 90.0, "b": 89.5, "c": 89.0}, hits)
    assert out.lead.p_value == pytest.approx(2 * 93 / 256) and not out.lead.beyond_noise()
    lines = [line for line in said if "cannot separate" in line]
    assert len(lines) == 1 and "data.val_fraction" in lines[0] and "400 validation images" in lines[0]
    # the same answers, but the scores span 15 points, wider than the interval: the split did separate them
    out, said = _choose(tmp_path / "wide", monkeypatch, {"a": 90.0, "b": 80.0, "c": 75.0}, hits)
    assert not any("cannot separate" in line for line in said)


@pytest.fixture
def run_copy(tiny_run, tmp_path):
    """A private copy: this test writes under RUN/search and RUN/exports, which the search tests expect absent."""
    return shutil.copytree(tiny_run, tmp_path / "run")


def test_a_fine_tuned_confirmed_pick_is_written_once(run_copy, monkeypatch):
    # The manifest is written once, from the record, at the end of the step that owns it (docs/contract.md,
    # "Export"; the pick is chosen, fine-tuned and confirmed in memory). Timing is injected (identical steady
    # repeats), so the choice and the confirmation keep the pick; everything else runs for real.
    import tightfit.export.manifest as manifest_module
    import tightfit.export.pick as pick_module
    import tightfit.search.choose as choose
    import tightfit.search.confirm as confirm
    import tightfit.search.driver as driver
    from tightfit.data.dataset import load_dataset
    from tightfit.ondevice.hardware import describe_hardware
    from tightfit.rundir import load_trained
    from tightfit.search.cache import AccuracyCache, CachedAccuracy
    run = load_trained(run_copy)
    ds = load_dataset(run.recipe.data, run.recipe.seed)
    space = run.recipe.space
    subnets = [space.largest(), space.middle()]
    cands = [Candidate(s.to_key(), s, acc, ms, 0) for s, acc, ms in zip(subnets, (60.0, 55.0), (0.9, 0.8))]
    monkeypatch.setattr(driver, "search_budget", lambda *a, **k: driver.BudgetResult("this-host", 1.0, cands, 0.0, 2, 0))
    monkeypatch.setattr(choose, "repeat_summaries", lambda paths, p: {x: _steady_repeats(0.9, p.repeats) for x in paths})
    monkeypatch.setattr(driver, "confirm_picks", lambda ctx, table, picks: confirm.confirm_picks(
        ctx, table, picks, measure=lambda paths, p: {x: _steady_repeats(0.9, p.repeats) for x in paths}))
    writes: list[Path] = []
    for module in (manifest_module, pick_module):
        real = module.write_json
        monkeypatch.setattr(module, "write_json", lambda path, data, real=real: writes.append(Path(path)) or real(path, data))
    settings = SearchSettings(top=2, finetune_steps=2, finetune_lr=0.01, slack=0.1, confirm=True)
    fitness = CachedAccuracy(AccuracyCache(run_copy / "search" / "cache.jsonl", {"t": 1}),
                             lambda s: {"val_acc": 50.0, "params": 1, "macs": 1})
    ctx = choose.SearchContext(run_copy, run, ds, settings, fitness, SimpleNamespace(phases=lambda latency: {}),
                               False, lambda line: None)
    table = SimpleNamespace(name="this-host", hardware=describe_hardware(), protocol=Protocol(repeats=2).to_dict())
    rows = driver._search_device(ctx, table, SimpleNamespace(predict_ms=lambda s: 0.5), [1.0])
    manifests = [p for p in writes if p.name == "manifest.json"]
    assert len(manifests) == 1 and [p.name for p in writes].count("picks.json") == 1
    written = json.loads(manifests[0].read_text())
    row, = rows
    assert written["finetune"]["steps"] == 2 and written["finetune"]["inherited_accuracy"]["validation"]["images"] > 0
    assert written["latency"]["confirmation"] == row["confirmed"] and row["confirmed"]["repeats"] == 4
    assert written["budget"]["use"] == row["budget_use"] == pytest.approx(0.9)
    assert written["accuracy"] == row["accuracy"] and written["accuracy"]["lead"]["against"] == cands[1].key
    assert not (run_copy / "search" / "staging").exists()


@pytest.mark.parametrize("table_seconds", [1.0, 0.1])
def test_candidates_are_timed_a_quarter_second_per_repeat_and_the_pick_records_it(tmp_path, monkeypatch,
                                                                                   table_seconds):
    # Measured in this project (docs/measurements.md, "Seconds per process vs processes"): 5 pooled fresh processes
    # of 0.25 s land within +-5 % of the sustained p90 as often as 5 of 1 s. So the choice times each candidate
    # 0.25 s per repeat whatever the table's length, keeps the verification protocol's repeats and run count, and
    # the pick records the protocol its figure was measured with.
    from tightfit.search.choose import verification_protocol
    asked: list[Protocol] = []
    hits = {k: np.ones(N_VAL, bool) for k in "ab"}
    table_protocol = Protocol(repeats=3, time_seconds=table_seconds)
    out, _ = _choose(tmp_path, monkeypatch, {"a": 90.0, "b": 89.0}, hits, table_protocol, asked)
    full = verification_protocol(table_protocol.to_dict())
    assert asked and all(p.time_seconds == 0.25 and p.repeats == full.repeats == 3 for p in asked)
    assert out.protocol == asked[0] and out.protocol.time_runs == full.time_runs
