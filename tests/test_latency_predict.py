"""Probe bundles, latency tables and the latency predictor, on a tiny space with fresh weights
(weights do not change latency, so no training is needed)."""
from __future__ import annotations

import itertools
import json
import math
import random
import re
from pathlib import Path

import onnx
import pytest
import torch

from tightfit.errors import UserError
from tightfit.latency.check import check_predictor
from tightfit.latency.layers import layer_configs, overhead_id, subnet_layer_ids
from tightfit.latency.predict import LatencyPredictor, calibrate, kendall_tau, load_predictor
from tightfit.latency.probe import layer_module, load_source, write_bundle
from tightfit.model.arithmetic import conv_out
from tightfit.latency.table import load_table, profile_host
from tightfit.ondevice import runner
from tightfit.model.extract import extract_subnet
from tightfit.ondevice.files import TABLE_VERSION
from tightfit.ondevice.timing import Protocol
from tightfit.model.space import space_hash

STAGES = """
[[space.stage]]
channels = 8
stride = 1
depths = [1]
expansions = [1]
kernels = [3]

[[space.stage]]
channels = 12
stride = 2
depths = [1, 2]
expansions = [2, 4]
kernels = [3, 5]

[[space.stage]]
channels = 16
stride = 2
depths = [1, 2, 3]
expansions = [2, 3]
kernels = [3, 5]
activation = "hswish"
squeeze_excite = true
"""


WIDE_STAGES = (STAGES.replace("channels = 8\n", "channels = [4, 8]\n").replace("channels = 12\n", "channels = [8, 12]\n")
               .replace("channels = 16\n", "channels = [8, 12, 16]\n"))


def tiny_recipe_text(head_channels: int = 24, stem_stride: int = 1, wide: bool = False) -> str:
    """The tiny space; ``wide``: the same stages with elastic width in the stem and every stage."""
    return (f'name = "tiny-latency"\nseed = 0\n[data]\nsource = "builtin"\nimage_size = 15\nchannels = 3\n'
            f'samples = 600\n[space]\nstem_channels = {"[4, 8]" if wide else 8}\nstem_stride = {stem_stride}\n'
            f'head_channels = {head_channels}\n' + (WIDE_STAGES if wide else STAGES))


@pytest.fixture(autouse=True)
def _one_torch_thread():
    """Tiny forwards on a shared 2-core machine: two torch threads only contend (measured 14x slower)."""
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(threads)


def make_run(root: Path, **kw) -> Path:
    """A run directory holding only recipe.toml (the probe then uses a fresh supernet)."""
    root.mkdir(parents=True, exist_ok=True)
    (root / "recipe.toml").write_text(tiny_recipe_text(**kw))
    return root


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory) -> Path:
    return make_run(tmp_path_factory.mktemp("latency") / "run")


@pytest.fixture(scope="module")
def bundle(run_dir) -> Path:
    return write_bundle(run_dir, n_subnets=4, progress=False)


@torch.no_grad()
def input_shapes(net, modules, in_channels: int, size: int) -> list[tuple[int, int]]:
    """(channels, height) entering each of `modules`, recorded with forward hooks while `net` runs."""
    shapes = []
    hooks = [m.register_forward_hook(lambda m, inp, out: shapes.append((inp[0].shape[1], inp[0].shape[2])))
             for m in modules]
    net(torch.zeros(1, in_channels, size, size))
    for h in hooks:
        h.remove()
    return shapes


@pytest.mark.parametrize("head_channels,stem_stride,wide", [(24, 1, False), (0, 2, False), (24, 1, True), (0, 1, True)])
def test_layer_ids_match_the_shapes_the_network_runs(tmp_path, head_channels, stem_stride, wide):
    """Property over random subnets: every layer id names a config whose input shape is what
    torch's forward hooks see in the extracted network (torch.nn.Module.register_forward_hook)."""
    recipe, supernet = load_source(make_run(tmp_path, head_channels=head_channels, stem_stride=stem_stride, wide=wide))
    space = recipe.space
    configs = {c.id: c for c in layer_configs(space, 3, 15)}
    per_block = [len(st.expansions) * len(st.kernels) for st in space.stages]
    later = [max(st.depths) > 1 for st in space.stages]
    widths = [len(w) for w in space.width_options()]  # stem, then each stage
    # one stem per stem width, one head per last width; a first block per (input width, width), a later per width
    assert len(configs) == widths[0] + widths[-1] + sum(
        n * (widths[i] * widths[i + 1] + widths[i + 1] * lt) for i, (n, lt) in enumerate(zip(per_block, later)))
    rng = random.Random(0)
    for subnet in [space.largest(), space.smallest()] + [space.sample(rng) for _ in range(20)]:
        ids = subnet_layer_ids(space, subnet)
        net = extract_subnet(supernet, subnet)
        # the head probe starts at the head conv, or at the pool when there is none
        seen = input_shapes(net, list(net.features) + ([] if head_channels else [net.pool]), 3, 15)
        assert [(configs[i].in_channels, configs[i].resolution) for i in ids] == seen
        blocks = [configs[i] for i in ids if configs[i].role == "block"]
        positions = [j for stage in subnet.stages for j in range(len(stage))]
        for cfg, block, j in zip(blocks, list(net.features)[1:], positions):
            probe = layer_module(supernet, cfg)
            assert repr(probe) == repr(block)  # same layers, channels, kernels, strides, activations
            if j <= 1:  # the very module (later positions share one probe: weights do not change latency)
                x = torch.randn(1, cfg.in_channels, cfg.resolution, cfg.resolution)
                torch.testing.assert_close(probe(x), block(x), rtol=0, atol=0)


def test_bundle_is_valid_and_covers_random_subnets(bundle, run_dir):
    """The on-device runner's own reader accepts the bundle (folder and zip); every id a random
    subnet uses is present, with the ONNX input shape its config states (onnx.load)."""
    parsed = runner.read_index(bundle)
    recipe, _ = load_source(run_dir)
    assert parsed.space_hash == space_hash(recipe.space, 3, 15)
    entries = {e.id: e for e in parsed.entries}
    rng = random.Random(1)
    for _ in range(40):
        for eid in subnet_layer_ids(recipe.space, recipe.space.sample(rng)):
            assert entries[eid].kind == "layer"
    for e in parsed.entries:
        dims = [d.dim_value or d.dim_param for d in onnx.load(e.path).graph.input[0].type.tensor_type.shape.dim]
        if e.kind == "layer":
            assert dims[1:] == [e.meta["in_channels"], e.meta["resolution"], e.meta["resolution"]]
        else:
            assert recipe.space.contains(recipe.space.parse_key(e.meta["key"]))
    keys = [e.meta["key"] for e in parsed.entries if e.kind == "subnet"]
    assert len(keys) == 4 == len(set(keys)) and recipe.space.largest().to_key() in keys
    zipped = write_bundle(run_dir, bundle.parent / "zipped", n_subnets=2, zip=True, progress=False)
    assert len(runner.open_bundle(zipped, bundle.parent / "unzipped").entries) == len(parsed.entries) - 2


def test_elastic_width_bundle_covers_every_width_combination(tmp_path):
    """With elastic width, every subnet's layer ids are in the bundle with the input shape the ONNX
    file declares, including first blocks between every pair of neighbouring widths."""
    run = make_run(tmp_path / "wide", wide=True)
    parsed = runner.read_index(write_bundle(run, n_subnets=3, progress=False))
    recipe, _ = load_source(run)
    entries = {e.id: e for e in parsed.entries}
    rng = random.Random(4)
    used = set()
    for subnet in [recipe.space.smallest(), recipe.space.largest()] + [recipe.space.sample(rng) for _ in range(60)]:
        for eid in subnet_layer_ids(recipe.space, subnet):
            assert entries[eid].kind == "layer"
            used.add(eid)
    pairs = {(entries[i].meta["in_channels"], entries[i].meta["out_channels"]) for i in used
             if entries[i].meta["role"] == "block" and entries[i].meta["stage"] == 2 and entries[i].meta["first"]}
    assert pairs == {(a, b) for a in (8, 12) for b in (8, 12, 16)}
    for eid in used:
        dims = [d.dim_value for d in onnx.load(entries[eid].path).graph.input[0].type.tensor_type.shape.dim]
        assert dims[1:] == [entries[eid].meta["in_channels"], entries[eid].meta["resolution"], entries[eid].meta["resolution"]]


def synthetic_table(bundle: Path, tmp: Path, fit=lambda x: x, **overrides) -> Path:
    """A table whose layer latencies are known numbers and whose subnet entries follow `fit`."""
    index = json.loads((bundle / "index.json").read_text())
    rng = random.Random(7)
    entries = {}
    for e in index["entries"]:
        if e["kind"] == "layer":
            v = rng.randint(1, 50) / 1000 + (0.3 if e["id"].startswith("passthrough") else 0.5)
            entries[e["id"]] = {"kind": "layer", "meta": e["meta"], **dict.fromkeys(
                ("p50_ms", "p90_ms", "p99_ms", "mean_ms", "budget_stat_ms"), v)}
    table = {"format": "tightfit-latency-table", "version": TABLE_VERSION, "space_hash": index["space_hash"],
             "hardware": {"hostname": "synthetic"}, "protocol": Protocol().to_dict(), "entries": entries}
    table.update(overrides)
    path = tmp / "synthetic.json"
    path.write_text(json.dumps(table))
    recipe, supernet = load_source(bundle.parent)
    pred = LatencyPredictor(load_table(path), recipe.space, 3, 15)
    for e in index["entries"]:
        if e["kind"] == "subnet":
            y = fit(pred.adjusted_sum_ms(recipe.space.parse_key(e["meta"]["key"])))
            entries[e["id"]] = {"kind": "subnet", "meta": e["meta"], **dict.fromkeys(
                ("p50_ms", "p90_ms", "p99_ms", "mean_ms", "budget_stat_ms"), y)}
    path.write_text(json.dumps(table))
    return path


def test_predictor_sums_the_layers_a_subnet_runs(bundle, tmp_path):
    """layer_sum_ms equals a sum found independently: each block of the extracted network is matched
    to the table entry with its shape (channels, hidden, kernel, stride, resolution) by hand."""
    recipe, supernet = load_source(bundle.parent)
    table = load_table(synthetic_table(bundle, tmp_path))
    pred = LatencyPredictor(table, recipe.space, 3, 15)
    by_shape = {(m["in_channels"], m["hidden_channels"], m["kernel"], m["stride"], m["resolution"]): v["p50_ms"]
                for v in table.entries.values() if (m := v["meta"]).get("role") == "block"}
    rng = random.Random(3)
    for subnet in [recipe.space.largest()] + [recipe.space.sample(rng) for _ in range(15)]:
        net, expected, res = extract_subnet(supernet, subnet), table.entries["stem-out8"]["p50_ms"], 15
        res = conv_out(res, recipe.space.stem_stride)
        for block in list(net.features)[1:1 + sum(subnet.depths)]:
            dw = next(m for m in block.modules() if isinstance(m, torch.nn.Conv2d) and m.groups > 1)
            expected += by_shape[(block.conv[0][0].in_channels, dw.in_channels, dw.kernel_size[0], dw.stride[0], res)]
            res = conv_out(res, dw.stride[0])
        expected += table.entries["head-in16"]["p50_ms"]
        assert pred.layer_sum_ms(subnet) == pytest.approx(expected, rel=1e-12)
        def overhead(chs, res, skip):  # the passthrough once, minus its second copy
            return (2 * table.entries[overhead_id(chs, res, skip, 1)]["p50_ms"]
                    - table.entries[overhead_id(chs, res, skip, 2)]["p50_ms"])
        configs = {c.id: c for c in layer_configs(recipe.space, 3, 15)}
        overheads = sum(overhead(c.in_channels, c.resolution, c.skip) for c in map(configs.get, subnet_layer_ids(recipe.space, subnet)))
        assert pred.adjusted_sum_ms(subnet) == pytest.approx(expected - overheads + overhead(3, 15, False), rel=1e-12)


def test_layers_add_their_means_by_default(bundle, tmp_path):
    """Skewed layer timings (mean > median): the default predictor adds the means, because the
    mean of a sum is the sum of the means (linearity of expectation; a sum of medians is not
    the median of the sum); layer_stat="p50_ms" adds the medians."""
    recipe, _ = load_source(bundle.parent)
    path = synthetic_table(bundle, tmp_path)
    table = json.loads(path.read_text())
    for e in table["entries"].values():
        if e["kind"] == "layer":
            e["mean_ms"] = 1.25 * e["p50_ms"]
    path.write_text(json.dumps(table))
    s = recipe.space.sample(random.Random(4))
    means = LatencyPredictor(load_table(path), recipe.space, 3, 15)
    medians = LatencyPredictor(load_table(path), recipe.space, 3, 15, layer_stat="p50_ms")
    assert means.layer_sum_ms(s) == pytest.approx(1.25 * medians.layer_sum_ms(s), rel=1e-12)


def test_calibration_recovers_a_known_affine_map(bundle, tmp_path):
    """Whole subnets that cost exactly 1.7 x adjusted sum + 0.2 ms: the fit finds that map."""
    recipe, _ = load_source(bundle.parent)
    pred = LatencyPredictor(load_table(synthetic_table(bundle, tmp_path, fit=lambda x: 1.7 * x + 0.2)),
                            recipe.space, 3, 15, target="p50_ms")
    assert pred.calibration.kind == "affine"
    assert (pred.calibration.a, pred.calibration.b) == (pytest.approx(1.7), pytest.approx(0.2))
    s = recipe.space.sample(random.Random(9))
    assert pred.predict_ms(s) == pytest.approx(1.7 * pred.adjusted_sum_ms(s) + 0.2)
    assert calibrate([1.0, 2.0, 3.0], [2.0, 4.0, 6.0]).kind in ("ratio", "affine")  # exact ratio data
    assert calibrate([1.0], [5.0]).kind == "sum"  # too few points to fit anything


def test_bad_tables_are_refused(bundle, tmp_path):
    recipe, _ = load_source(bundle.parent)
    good = synthetic_table(bundle, tmp_path)
    with pytest.raises(UserError, match="another search space"):
        load_table(good, "0123456789abcdef")
    other = make_run(tmp_path / "other", head_channels=0)
    with pytest.raises(UserError, match="another search space"):
        load_predictor(load_source(other)[0], good)
    data = json.loads(good.read_text())
    for name, text in [("garbage", "{not json"), ("fmt", json.dumps({**data, "format": "x"})),
                       ("empty", json.dumps({**data, "entries": {}})),
                       ("nan", json.dumps({**data, "entries": {"stem-out8": {**data["entries"]["stem-out8"], "p50_ms": None}}}))]:
        path = tmp_path / f"{name}.json"
        path.write_text(text)
        with pytest.raises(UserError, match=re.escape(str(path))):
            load_table(path)
    del data["entries"]["head-in16"]
    (tmp_path / "missing.json").write_text(json.dumps(data))
    with pytest.raises(UserError, match="lacks 1 layer entries"):
        load_predictor(recipe, tmp_path / "missing.json")


def brute_force_tau_b(x, y) -> float:
    """Kendall's tau-b (Kendall 1945, 'The treatment of ties in ranking problems') by counting all pairs."""
    c = d = tx = ty = 0
    for i, j in itertools.combinations(range(len(x)), 2):
        sx, sy = (x[i] > x[j]) - (x[i] < x[j]), (y[i] > y[j]) - (y[i] < y[j])
        if sx and sy:
            c, d = c + (sx == sy), d + (sx != sy)
        tx, ty = tx + (sx == 0 and sy != 0), ty + (sy == 0 and sx != 0)
    return (c - d) / math.sqrt((c + d + tx) * (c + d + ty))


def test_kendall_tau_matches_an_independent_count():
    """Kendall 1938: tau = (concordant - discordant) / pairs; checked against an O(n^2) count of
    tau-b (ties included), against scipy.stats.kendalltau when scipy is installed, and on the limits."""
    rng = random.Random(0)
    assert kendall_tau([1, 2, 3, 4], [10, 20, 30, 40]) == 1.0
    assert kendall_tau([1, 2, 3, 4], [4, 3, 2, 1]) == -1.0
    assert math.isnan(kendall_tau([1, 1, 1], [1, 2, 3]))
    try:
        from scipy.stats import kendalltau as scipy_tau
    except ImportError:
        scipy_tau = None
    for n, levels in [(30, 1000), (31, 4), (8, 3), (3, 10)]:
        x = [rng.randrange(levels) for _ in range(n)]
        y = [xi + rng.randrange(levels) for xi in x]
        assert kendall_tau(x, y) == pytest.approx(brute_force_tau_b(x, y), abs=1e-12)
        if scipy_tau is not None:
            assert kendall_tau(x, y) == pytest.approx(scipy_tau(x, y).statistic, abs=1e-12)


@pytest.mark.timing
def test_profile_host_end_to_end(run_dir, tmp_path):
    """Real run: probe, measure with the on-device runner in a subprocess (--quick), predict, check."""
    table_path = profile_host(run_dir, "testhost", quick=True, n_subnets=3, progress=False)
    assert table_path == run_dir / "latency" / "testhost.json"
    recipe, _ = load_source(run_dir)
    pred = load_predictor(recipe, table_path, target="p50_ms")
    assert pred.table.name == "testhost" and pred.calibration.points == 3
    small, large = pred.predict_ms(recipe.space.smallest()), pred.predict_ms(recipe.space.largest())
    assert 0 < small < large and math.isfinite(large)
    quick = Protocol(**runner.QUICK)
    result = check_predictor(run_dir, table_path, n=5, protocol=quick, progress=False, twice=True)
    assert result["subnets"] == 5 and not {r["key"] for r in result["rows"]} & set(pred.calibration_keys)
    # the check's figures are the definitions applied to its own rows (MAPE in percent; Kendall 1938 tau)
    pred_ms, meas_ms = [r["predicted_p50_ms"] for r in result["rows"]], [r["measured_p50_ms"] for r in result["rows"]]
    assert result["p50"]["mape"] == pytest.approx(100 * sum(abs(p - m) / m for p, m in zip(pred_ms, meas_ms)) / 5)
    assert result["p50"]["kendall_tau"] == pytest.approx(brute_force_tau_b(pred_ms, meas_ms), nan_ok=True)
    assert (run_dir / "latency" / "checks" / "testhost.json").is_file()
    # a second measurement of the same files, scored like a predictor: the floor of any predictor's error
    again = result["measurement_vs_measurement"]
    assert set(again) == {"p50", "budget_stat"} and all(0 <= e["mape"] < 100 for e in again.values())
    # taking the calibration subnets' drift out rescales every prediction by the same factor
    drift = 1 + result["session_drift"]
    rescaled = [abs(drift * r["predicted_p50_ms"] - r["measured_p50_ms"]) / r["measured_p50_ms"] for r in result["rows"]]
    assert result["p50_drift_corrected"]["mape"] == pytest.approx(100 * sum(rescaled) / len(rescaled))
    assert result["p50_drift_corrected"]["kendall_tau"] == pytest.approx(result["p50"]["kendall_tau"])
    # the search's drift check measures the table's calibration subnets again, in fresh processes: a ratio
    # near 1 on the same machine minutes later (wide bounds: a shared CI machine's speed moves by tens of %)
    from tightfit.latency.drift import measure_drift
    now = measure_drift(load_source(run_dir)[1], pred.table, pred.calibration_keys, recipe.data.channels,
                        recipe.data.image_size)
    assert now is not None and 0.2 < now < 5
    assert measure_drift(None, pred.table, [], recipe.data.channels, recipe.data.image_size) is None
    # another machine's table: check-latency would compare it with this machine's timings; refused, one line
    foreign = json.loads(table_path.read_text())
    foreign["hardware"]["hostname"] = "some-board"
    (tmp_path / "foreign.json").write_text(json.dumps(foreign))
    with pytest.raises(UserError, match="can only check a table of this machine"):
        check_predictor(run_dir, tmp_path / "foreign.json", n=5, protocol=quick, progress=False)


def test_inspect_shows_the_space_and_the_latency_range_a_table_predicts(bundle, run_dir, tmp_path):
    # Issue "users choose budgets blind": `tightfit inspect RECIPE --table T --subnet KEY`. Sizes are checked against
    # torch's own parameter count of the extracted network (sum of numel), latencies against the predictor.
    from tightfit.report.inspect import inspect
    recipe, supernet = load_source(bundle.parent)
    table = synthetic_table(bundle, tmp_path)
    key = recipe.space.middle().to_key()
    text = inspect(str(run_dir / "recipe.toml"), [str(table)], [key], front=False)
    assert f"space: {recipe.space.size():,} subnets" in text
    pred = LatencyPredictor(load_table(table), recipe.space, 3, 15)
    for name in ("smallest", "middle", "largest"):
        sub = getattr(recipe.space, name)()
        params = sum(p.numel() for p in extract_subnet(supernet, sub).parameters())
        assert re.search(rf"{name}\s+{params:,} params", text), (name, params, text)
        assert f"{pred.predict_ms(sub):.3f} ms ({name})" in text
    assert f"subnet {key}:" in text and f"predicted p90 {pred.predict_ms(recipe.space.middle()):.3f} ms" in text
    with pytest.raises(UserError, match="neither a recipe file nor a run directory"):
        inspect(str(tmp_path / "missing"), [], [], front=False)
