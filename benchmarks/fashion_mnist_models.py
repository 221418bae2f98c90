"""The Fashion-MNIST benchmark's models: the hand-scaled family (measured from its architectures, then
trained), the search's picks, and the final session that measures and tests them all alike.

Paths kept in results are relative to the run folder (``relative``), so a result names no machine.
"""
from __future__ import annotations

import json
from dataclasses import replace
from pathlib import Path

DEVICES = (("host-1-thread", 1), ("host-2-threads", 2))  # two latency profiles of this machine (intra-op threads)
FINETUNE_STEPS = 200  # per pick, from its inherited weights (docs/measurements.md, "Fine-tuning the picks: screen")
FINETUNE_LR = 0.1


def relative(path: str | Path, run: Path) -> str:
    """``path`` relative to the run folder (as stored in results); unchanged if it lies outside it."""
    p = Path(path)
    try:
        return str(p.resolve().relative_to(run.resolve()))
    except ValueError:
        return str(path)


def smoke_data(recipe, smoke: bool):
    """None (train loads the data itself), or for smoke runs a dataset with 1,000 validation images."""
    if not smoke:
        return None
    from tightfit.data.dataset import load_dataset
    ds = load_dataset(recipe.data, recipe.seed)
    return replace(ds, val_x=ds.val_x[:1000], val_y=ds.val_y[:1000])


def protocol_for(threads: int, smoke: bool):
    from tightfit.ondevice.timing import Protocol
    return (Protocol(threads=threads, repeats=1, time_runs=20, time_seconds=0.1, settle_runs=5) if smoke
            else Protocol(threads=threads))


def export_architecture(recipe, member, out: Path) -> Path:
    """A member's architecture, untrained, as ONNX: latency depends on the architecture only, so the
    family is measured before anything is trained (fresh BatchNorm folds like a trained one)."""
    import torch
    from tightfit.latency.probe import class_count
    from tightfit.model.extract import extract_subnet
    from tightfit.model.onnx import export_onnx
    from tightfit.recipe import build_supernet
    from tightfit.train.baselines import member_recipe
    r = member_recipe(recipe, member)
    torch.manual_seed(r.seed)
    net = extract_subnet(build_supernet(r, class_count(r)), r.space.largest()).eval()
    export_onnx(net, out, r.data.channels, r.data.image_size)
    return out


def measure_family(recipe, family, run: Path, threads: int, smoke: bool) -> dict[str, float]:
    """What a family user does before choosing a member: measure each on the device (p90 ms)."""
    from tightfit.ondevice.repeats import measure_repeated
    paths = {m.name: str(export_architecture(recipe, m, run / "family-architectures" / f"{m.name}.onnx")) for m in family}
    figures = measure_repeated(list(paths.values()), protocol_for(threads, smoke))
    return {name: figures[p].p90_ms for name, p in paths.items()}


def throughput(run: Path) -> dict:
    import resource
    rows = [json.loads(line) for line in (run / "metrics.jsonl").read_text().splitlines() if line.strip()]
    ips = [r["images_per_s"] for r in rows if "images_per_s" in r]
    last = [r for r in rows if "val_acc_largest" in r]
    return {"images_per_s": ips[-1] if ips else None, "peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
            "last_epoch": last[-1] if last else None}


def train_member(recipe, member, family_dir: Path, smoke: bool) -> dict:
    from tightfit.rundir import checkpoint_path
    from tightfit.train.baselines import member_recipe
    from tightfit.train.loop import train
    r = member_recipe(recipe, member)
    run = family_dir / member.name
    train(r, run, resume=checkpoint_path(run).exists(), ds=smoke_data(recipe, smoke), progress=not smoke)
    return {"name": member.name, "describe": member.describe(), "key": r.space.largest().to_key(),
            "channels": [r.space.stem_channels] + [s.out_channels for s in r.space.stages], "throughput": throughput(run)}


def export_member(run: Path) -> tuple[Path, int, int]:
    """The trained member as a static net (its own running BN statistics) → ONNX."""
    from tightfit.model.extract import count_macs, count_params, extract_subnet
    from tightfit.model.onnx import export_onnx
    from tightfit.rundir import load_trained
    t = load_trained(run)
    net = extract_subnet(t.supernet, t.recipe.space.largest()).eval()
    path = run / "model.onnx"
    export_onnx(net, path, t.recipe.data.channels, t.recipe.data.image_size)
    return path, count_params(net), count_macs(net, t.recipe.data.channels, t.recipe.data.image_size)


def family_models(members: list[dict], run: Path) -> list[dict]:
    out = []
    for mem in members:
        path, params, macs = export_member(run / "family" / mem["name"])
        out.append({"kind": "baseline", "name": mem["name"], "key": mem["key"], "onnx": relative(path, run),
                    "params": params, "macs": macs, "describe": mem["describe"]})
    return out


def search_settings(smoke: bool):
    """Cheap ranking (3,000 validation images), the best 8 re-scored on all 6,000, 3 measured per budget,
    each pick fine-tuned FINETUNE_STEPS steps."""
    from tightfit.search.settings import SearchSettings
    return (SearchSettings(population=4, evaluations=8, top=1, val_images=200, rescore=2, finetune_steps=2,
                           finetune_lr=FINETUNE_LR) if smoke
            else SearchSettings(population=12, evaluations=24, top=3, val_images=3000, rescore=8,
                                finetune_steps=FINETUNE_STEPS, finetune_lr=FINETUNE_LR))


PICK_FIELDS = ("device", "budget_ms", "key", "val_acc", "fits", "budget_use", "measured_over_predicted", "finetune",
               "confirmed", "chosen_again", "timings")


def search(run: Path, table: Path, budgets: list[float], smoke: bool) -> list[dict]:
    """All of a device's budgets in one call, so its picks are confirmed minutes after they were chosen
    (search/confirm.py); the picks as tightfit.search.driver.run_search returns them (picks.json rows)."""
    import torch
    from tightfit.search.commands import format_picks
    from tightfit.search.driver import run_search
    threads = torch.get_num_threads()
    torch.set_num_threads(1)  # recalibration and validation: 1 thread is the fewest CPU-seconds per candidate
    try:
        rows = run_search(run, [str(table)], budgets, search_settings(smoke), progress=not smoke)
    finally:
        torch.set_num_threads(threads)
    print(format_picks(rows))
    return [{**{k: r.get(k) for k in PICK_FIELDS}, "export_dir": relative(r["export_dir"], run)} for r in rows]


def ort_accuracy(onnx_path: Path, ds, split: str = "test") -> float:
    """Top-1 through ONNX Runtime: the same code path for picks and baselines."""
    from tightfit.data.dataset import eval_batches
    from tightfit.model.onnx import ort_session, ort_top1
    session = ort_session(Path(onnx_path).read_bytes())
    top1, _ = ort_top1(session, eval_batches(getattr(ds, f"{split}_x"), getattr(ds, f"{split}_y"), ds, 1000))
    return top1  # smoke: the first 1,000 test images only


def pick_model(p: dict, run: Path, smoke: bool) -> dict:
    """A pick as a model row: its architecture and inherited accuracy from its manifest."""
    folder = run / p["export_dir"]
    m = json.loads((folder / "manifest.json").read_text())
    inherited = (m.get("finetune") or {}).get("inherited_accuracy")
    return {"kind": "pick", "name": f"pick-{p['device']}-{p['budget_ms']:g}ms", "key": p["key"],
            "onnx": relative(folder / "model.onnx", run), "params": m["architecture"]["params"],
            "macs": m["architecture"]["macs"], "budget_ms": p["budget_ms"], "device": p["device"],
            "search_budget_use": p.get("budget_use"),
            "test_acc_inherited": None if smoke or not inherited else round(inherited["test"]["top1"], 2),
            "finetune": p.get("finetune")}


def measure_all(picks: list[dict], members: list[dict], run: Path, recipe, smoke: bool) -> dict:
    """Every pick and member: test accuracy once (ONNX Runtime), latency on each device in one
    interleaved session per device."""
    from tightfit.data.dataset import load_dataset
    from tightfit.ondevice.repeats import measure_repeated
    ds = load_dataset(recipe.data, recipe.seed)
    if smoke:
        ds = replace(ds, test_x=ds.test_x[:1000], test_y=ds.test_y[:1000])
    models = [pick_model(p, run, smoke) for p in picks] + family_models(members, run)
    for m in models:
        m["test_acc"] = round(ort_accuracy(run / m["onnx"], ds), 2)
        m["latency"] = {}
    protocols = {}
    for device, threads in DEVICES:
        proto = protocol_for(threads, smoke)
        protocols[device] = proto.to_dict()
        figures = measure_repeated([str(run / m["onnx"]) for m in models], proto)
        for m in models:
            m["latency"][device] = figures[str(run / m["onnx"])].to_dict()
    return {"protocols": protocols, "models": models, "test_images": len(ds.test_y)}


def write_baselines(run: Path, models: list[dict], recipe) -> Path:
    """RUN/baselines.json for `tightfit report`: the family on the validation split, like the candidates."""
    from tightfit.data.dataset import load_dataset
    from tightfit.ondevice.files import write_json
    ds = load_dataset(recipe.data, recipe.seed)
    rows = [{"name": m["name"], "key": m["key"], "val_acc": round(ort_accuracy(run / m["onnx"], ds, "val"), 2),
             "p50_ms": m["p50_ms"], "p90_ms": m["p90_ms"], "params": m["params"], "macs": m["macs"]}
            for m in models if m["kind"] == "baseline"]
    return write_json(run / "baselines.json", rows)
