"""Fine-tuning a pick from its inherited weights (tightfit.train.finetune, tightfit.export.finetuned):
the student moves toward its teacher, the export folder is rewritten consistently, the graph (and so the
measured latency) is unchanged, and a second request reuses the first fine-tune."""
from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from helpers import perturb
from tightfit.data.dataset import calibration_batches, eval_batches, load_dataset
from tightfit.errors import UserError
from tightfit.export.cut import cut_one
from tightfit.export.finetuned import finetuned_cut, graph_signature
from tightfit.model.onnx import ort_outputs
from tightfit.model.extract import extract_subnet
from tightfit.train.finetune import FinetuneSettings, finetune, inherited_net, teacher_of
from tightfit.rundir import load_trained


@pytest.fixture
def run_copy(tiny_run, tmp_path):
    """A private copy: these tests write under RUN/search, which the search tests expect absent."""
    return shutil.copytree(tiny_run, tmp_path / "run")


def _kl_to_teacher(student, teacher, batches) -> float:
    """Mean KL(teacher || student) over ``batches``: what soft-label distillation minimises (Hinton et al. 2015)."""
    student.eval()
    total, n = 0.0, 0
    with torch.no_grad():
        for x, _ in batches:
            p = F.log_softmax(teacher(x), 1)
            total += float(F.kl_div(F.log_softmax(student(x), 1), p, log_target=True, reduction="sum"))
            n += len(x)
    return total / n


def test_a_fine_tune_moves_the_pick_toward_its_teacher_and_changes_only_its_weights(run_copy):
    run = load_trained(run_copy)
    ds = load_dataset(run.recipe.data, run.recipe.seed)
    cfg = run.recipe.train
    calib = calibration_batches(ds, cfg.batch_size, cfg.recalibration_batches, run.recipe.seed)
    teacher = teacher_of(run, calib)
    smallest = run.recipe.space.smallest()
    net = inherited_net(run, smallest, calib)
    perturb(net, seed=3)  # the briefly trained tiny run's subnets already agree with its largest
    before = {k: v.clone() for k, v in net.state_dict().items()}
    val = list(eval_batches(ds.val_x, ds.val_y, ds, 256))
    kl_before = _kl_to_teacher(net, teacher, val)
    record = finetune(run, ds, net, FinetuneSettings(steps=30, lr=0.05), teacher=teacher)
    kl_after = _kl_to_teacher(net, teacher, val)
    # on held-out images, not only on the batches it trained on (common practice)
    assert kl_after < 0.9 * kl_before, (kl_before, kl_after)
    assert record["steps"] == 30 and record["cpu_s"] > 0 and record["teacher"] == run.recipe.space.largest().to_key()
    after = net.state_dict()
    assert set(after) == set(before) and all(after[k].shape == before[k].shape for k in before)
    assert any(not torch.equal(after[k], before[k]) for k in before if k.endswith("weight"))
    # the supernet is left as it was: the same subnet extracted twice matches
    once, twice = (inherited_net(run, smallest, calib).state_dict() for _ in range(2))
    assert all(torch.equal(once[k], twice[k]) for k in once)
    # the teacher is frozen: nothing in it took a step
    fresh = teacher_of(run, calib).state_dict()
    assert all(torch.equal(fresh[k], v) for k, v in teacher.state_dict().items())


def test_zero_steps_leave_the_weights_as_inherited(run_copy):
    run = load_trained(run_copy)
    ds = load_dataset(run.recipe.data, run.recipe.seed)
    cfg = run.recipe.train
    calib = calibration_batches(ds, cfg.batch_size, cfg.recalibration_batches, run.recipe.seed)
    net = inherited_net(run, run.recipe.space.middle(), calib)
    before = {k: v.clone() for k, v in net.state_dict().items()}
    finetune(run, ds, net, FinetuneSettings(steps=0), teacher=teacher_of(run, calib))
    assert all(torch.allclose(net.state_dict()[k].float(), before[k].float(), atol=1e-6) for k in before)


def test_a_fine_tuned_cut_keeps_its_graph_and_changes_only_its_weights(run_copy):
    run = load_trained(run_copy)
    ds = load_dataset(run.recipe.data, run.recipe.seed)
    inherited, _ = cut_one(run, ds, "middle", run.recipe.space.middle(), run_copy / "staging", validate=False)
    old_onnx = Path(inherited.onnx_path).read_bytes()
    settings = FinetuneSettings(steps=12, lr=0.05)
    cut, net, record = finetuned_cut(run, run_copy, ds, run.recipe.space.middle(), inherited, settings)
    data = Path(cut.onnx_path).read_bytes()
    assert data != old_onnx and graph_signature(data) == graph_signature(old_onnx)
    assert Path(inherited.onnx_path).read_bytes() == old_onnx          # the inherited file is left as it was
    assert (cut.key, cut.params, cut.macs) == (inherited.key, inherited.params, inherited.macs)
    assert record["steps"] == 12 and record["lr"] == 0.05 and not record["reused"] and "graph" in record["latency"]
    # the shipped file computes what the fine-tuned network computes (onnxruntime vs torch, reference libraries)
    x = next(iter(eval_batches(ds.val_x, ds.val_y, ds, 7)))[0]
    with torch.no_grad():
        ref = net.eval()(x).numpy()
    assert np.abs(ort_outputs(data, x.numpy()) - ref).max() < 1e-4
    # the same subnet and settings again (another budget, another device): reused, the same weights
    again, _, record_again = finetuned_cut(run, run_copy, ds, run.recipe.space.middle(), inherited, settings)
    assert record_again["reused"] and Path(again.onnx_path).read_bytes() == data


def test_the_graph_signature_tells_different_subnets_apart(run_copy):
    run = load_trained(run_copy)
    space = run.recipe.space
    from tightfit.model.onnx import onnx_bytes
    sigs = set()
    for s in (space.smallest(), space.middle(), space.largest()):
        run.supernet.set_subnet(s)
        sigs.add(graph_signature(onnx_bytes(extract_subnet(run.supernet, s).eval(), 3, 16)))
    assert len(sigs) == 3


def test_search_refuses_a_bad_fine_tune_setting_in_one_line(tiny_run):
    import argparse
    from tightfit.search.commands import add_search_parser
    parser = argparse.ArgumentParser()
    add_search_parser(parser.add_subparsers())
    base = ["search", str(tiny_run), "--table", "t.json", "--budget", "1ms"]
    for extra, needle in ((["--finetune-steps", "-1"], "finetune-steps"), (["--finetune-lr", "0"], "finetune-lr")):
        args = parser.parse_args(base + extra)
        with pytest.raises(UserError, match=needle):
            args.func(args)
