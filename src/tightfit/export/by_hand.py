"""`tightfit cut`: subnets chosen by hand, cut, measured on this machine and exported with manifests,
so they deploy and verify like the search's picks."""
from __future__ import annotations

from pathlib import Path
from typing import Optional

from tightfit.data.dataset import Dataset, load_dataset
from tightfit.errors import UserError
from tightfit.export.cut import CutResult, cut_one, measure_latency, resolve_subnet
from tightfit.export.manifest import export_pick, latency_section
from tightfit.model.space import Subnet
from tightfit.ondevice.hardware import describe_hardware
from tightfit.ondevice.timing import Protocol
from tightfit.rundir import TrainedRun, load_trained


def export_cuts(run: TrainedRun, ds: Dataset, picked: list[tuple[str, Subnet]], out_dir: Path,
                budget_ms: Optional[float] = None) -> list[CutResult]:
    """Cut each subnet into out_dir/<name>, measure them here, and write each folder's manifest, so a
    model cut by hand deploys and verifies like a search pick (budget optional: None claims none)."""
    cuts = [cut_one(run, ds, name, subnet, out_dir) for name, subnet in picked]
    protocol = Protocol()
    figures = measure_latency([c for c, _ in cuts], protocol)
    hardware = describe_hardware()
    for (name, subnet), (cut, net) in zip(picked, cuts):
        measured = figures[str(cut.onnx_path)]
        export_pick(run, ds, subnet=subnet, cut=cut, net=net, export_dir=out_dir / name,
                    latency=latency_section(measured, hardware, protocol.to_dict(), None,
                                            "cut by hand: measured on this machine"),
                    budget_ms=budget_ms, percentile=protocol.percentile,
                    device=None if budget_ms is None else "this-host", use=measured.use(budget_ms))
    return [c for c, _ in cuts]


def cut_subnets(run_dir: str | Path, specs: list[str], out: str | Path | None = None,
                budget_ms: Optional[float] = None) -> list[CutResult]:
    run = load_trained(run_dir)
    picked = [resolve_subnet(run, spec) for spec in specs]  # a bad key fails before anything is written
    ds = load_dataset(run.recipe.data, run.recipe.seed)
    if ds.class_names != run.class_names:
        raise UserError(f"the data the recipe points at has classes {ds.class_names}, the run was trained on {run.class_names}")
    out_dir = Path(out) if out else Path(run_dir) / "exports"
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise UserError(f"cannot create the export folder {out_dir} ({e.strerror}); choose another --out") from None
    return export_cuts(run, ds, picked, out_dir, budget_ms)
