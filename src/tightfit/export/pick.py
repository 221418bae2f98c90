"""A search's pick as one record, from its choice to its export folder.

The search fills a Pick as it goes (choice, fine-tune, confirmation) and keeps it in memory; the
export folder (model.onnx, state_dict.pt, manifest.json) and the pick's row of picks.json are written
once, by `write_pick`, from the same record, so each fact of a pick has one place and one writer.
"""
from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Optional

from torch import nn

from tightfit.export.cut import CutResult
from tightfit.export.manifest import build_manifest, latency_section, write_export
from tightfit.model.space import Subnet
from tightfit.ondevice.accuracy import Accuracy, PairedComparison
from tightfit.ondevice.files import write_json
from tightfit.ondevice.measurement import Measurement
from tightfit.ondevice.timing import Protocol
from tightfit.rundir import TrainedRun


@dataclass(frozen=True)
class Guard:
    """The share of its budget a pick measured here had to leave free, and where that share came from."""
    share: float
    rule: str
    typical: Optional[float] = None  # the median guard of every candidate measured for this budget

    def to_dict(self) -> dict[str, Any]:
        typical = {} if self.typical is None else {"candidates_median": round(self.typical, 4)}
        return {"share": round(self.share, 4), "rule": self.rule, **typical}


@dataclass(frozen=True)
class Confirmation:
    """A pick measured again after its device's last budget, pooled with the repeats it was chosen on."""
    first_ms: float      # the figure of the repeats it was chosen on
    later_ms: float      # the figure of the repeats measured again
    pooled_ms: float     # the figure of both windows' runs pooled
    repeats: int
    after_s: float       # wall-clock seconds between the choice and the second window
    keeps_guard: bool

    def to_dict(self) -> dict[str, Any]:
        return {"first_ms": round(self.first_ms, 6), "later_ms": round(self.later_ms, 6),
                "pooled_ms": round(self.pooled_ms, 6), "repeats": self.repeats, "after_s": round(self.after_s, 1),
                "keeps_guard": self.keeps_guard}


@dataclass(frozen=True)
class Pick:
    """Everything known of one (device, budget) pick; ``cut`` and ``net`` are the files and weights to ship."""
    device: str
    budget_ms: float
    percentile: float
    subnet: Subnet
    predicted_ms: float
    score: float                      # the search's validation score, the one it ranked candidates by
    validation: Accuracy              # the shipped file on the whole validation split
    test: Accuracy                    # ... and on the test split (never used to choose)
    measurement: Optional[Measurement]  # None: chosen by prediction for another device
    hardware: dict[str, Any]
    protocol: Protocol
    guard: Optional[Guard]
    fits: bool
    note: str
    cut: CutResult
    net: nn.Module
    export_dir: Path
    measured_over_predicted: Optional[float] = None
    lead: Optional[PairedComparison] = None     # McNemar: the pick against the runner-up, validation images
    confirmation: Optional[Confirmation] = None
    finetune: Optional[dict[str, Any]] = None   # the fine-tune's record, the inherited accuracies included
    timings: dict[str, float] = field(default_factory=dict)
    session_drift: Optional[float] = None
    chosen_again: Optional[Confirmation] = None  # the confirmation the first pick of this budget lost
    search_cpu_s: dict[str, float] = field(default_factory=dict)  # CPU-seconds per search phase, with "total"

    @property
    def key(self) -> str:
        return self.subnet.to_key()

    def use(self) -> Optional[float]:
        """The measured figure over the budget (Measurement.use); None when not measured."""
        return None if self.measurement is None else self.measurement.use(self.budget_ms)

    def accuracy(self) -> dict[str, Any]:
        """The accuracy section, as the manifest and the picks.json row both carry it."""
        out = {"validation": self.validation.to_dict(), "test": self.test.to_dict()}
        return {**out, "lead": self.lead.to_dict()} if self.lead is not None else out


def latency_of(pick: Pick) -> dict[str, Any]:
    """The manifest's latency section: the measurement, the guard, and what the search and the
    confirmation saw, in one note."""
    note = "; ".join(filter(None, [pick.note, _confirmation_note(pick)]))
    out = latency_section(pick.measurement, pick.hardware, pick.protocol.to_dict(), pick.predicted_ms, note,
                          None if pick.guard is None else pick.guard.to_dict())
    return {**out, "confirmation": pick.confirmation.to_dict()} if pick.confirmation else out


def _confirmation_note(pick: Pick) -> str:
    c = pick.confirmation
    if c is None:
        return ""
    text = (f"measured again {c.after_s:.0f} s after it was chosen: p{pick.percentile:g} {c.first_ms:.4g} then "
            f"{c.later_ms:.4g} ms, pooled {c.pooled_ms:.4g} ms")
    if not c.keeps_guard and pick.guard is not None:
        text += (f"; {'within' if c.pooled_ms <= pick.budget_ms else 'OVER'} the budget but not its guard "
                 f"({100 * pick.guard.share:.1f} %)")
    return text


def pick_row(pick: Pick) -> dict[str, Any]:
    """The pick's row of picks.json (and of `tightfit search --json`)."""
    m = pick.measurement
    row = {"device": pick.device, "budget_ms": pick.budget_ms, "percentile": pick.percentile, "key": pick.key,
           "val_acc": pick.score, "test_acc": round(pick.test.top1, 4), "accuracy": pick.accuracy(),
           "predicted_ms": round(pick.predicted_ms, 5), "measured": None if m is None else m.to_dict(),
           "export_dir": str(pick.export_dir), "fits": pick.fits, "verified": m is not None, "note": pick.note,
           "guard": None if pick.guard is None else pick.guard.to_dict(),
           "measured_over_predicted": None if pick.measured_over_predicted is None
           else round(pick.measured_over_predicted, 4),
           "budget_use": pick.use(), "session_drift": pick.session_drift, "timings": pick.timings,
           "search_cpu_s": pick.search_cpu_s}
    if pick.finetune is not None:
        row["finetune"] = _finetune_summary(pick.finetune)
    if pick.confirmation is not None:
        row["confirmed"] = pick.confirmation.to_dict()
    if pick.chosen_again is not None:
        row["chosen_again"] = pick.chosen_again.to_dict()
    return row


def _finetune_summary(record: dict[str, Any]) -> dict[str, Any]:
    before = record["inherited_accuracy"]
    return {"steps": record["steps"], "lr": record["lr"], "cpu_s": record["cpu_s"], "reused": record["reused"],
            "validation_before": before["validation"], "test_before": before["test"]}


def pick_manifest(run: TrainedRun, pick: Pick, onnx_data: bytes) -> dict[str, Any]:
    """The pick's manifest (tightfit.export.manifest.build_manifest) from the record."""
    cfg = run.recipe
    return build_manifest(
        space=cfg.space, subnet=pick.subnet, params=pick.cut.params, macs=pick.cut.macs, onnx_data=onnx_data,
        channels=cfg.data.channels, image_size=cfg.data.image_size, class_names=run.class_names, mean=run.mean,
        std=run.std, validation=pick.validation, test=pick.test, latency=latency_of(pick), budget_ms=pick.budget_ms,
        percentile=pick.percentile, device=pick.device, recipe_name=cfg.name, recipe_hash=cfg.hash(),
        finetune=pick.finetune, lead=pick.lead, use=pick.use())


def write_pick(run: TrainedRun, pick: Pick) -> dict[str, Any]:
    """Write the pick's export folder (manifest last) and return its picks.json row: one writer for both."""
    data = Path(pick.cut.onnx_path).read_bytes()
    write_export(pick.export_dir, data, pick.net, pick_manifest(run, pick, data))
    return pick_row(pick)


def write_picks(run: TrainedRun, picks: list[Pick], path: Path) -> list[dict[str, Any]]:
    """Write each pick (write_pick) and its row into picks.json at ``path``, which keeps the rows of
    other (device, budget) pairs and replaces those chosen again; returns the new rows."""
    rows = [write_pick(run, p) for p in picks]
    new = {(r["device"], r["budget_ms"]) for r in rows}
    old = []
    if path.is_file():
        try:
            old = [r for r in json.loads(path.read_text("utf-8")) if (r.get("device"), r.get("budget_ms")) not in new]
        except (json.JSONDecodeError, AttributeError, TypeError):
            old = []
    write_json(path, old + rows)
    return rows
