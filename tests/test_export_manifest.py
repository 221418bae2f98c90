"""The export manifest: its fields, the file hash, and what an unverified latency says."""
from __future__ import annotations

import hashlib
import json
import math

import numpy as np
import onnxruntime as ort
import pytest
import torch

from tightfit.export.manifest import Accuracy, build_manifest, latency_section, write_export
from tightfit.ondevice.accuracy import paired_comparison
from tightfit.ondevice.measurement import Measurement


REQUIRED = {
    "": ("format", "version", "model_file", "sha256", "architecture", "input", "output", "accuracy", "latency",
         "budget", "software", "recipe", "created"),
    "architecture": ("key", "depths", "params", "macs", "description"),
    "input": ("name", "layout", "dtype", "shape", "channels", "image_size", "color", "scale", "mean", "std", "resize"),
    "output": ("name", "classes"),
    "latency": ("hardware", "protocol", "p50_ms", "p90_ms", "p99_ms", "mean_ms", "cv", "iqr_over_median",
                "repeat_spread", "stable", "note"),
    "budget": ("ms", "percentile", "device"),
    "software": ("tightfit", "torch", "onnx", "onnxruntime", "numpy", "python"),
    "recipe": ("name", "hash"),
}


def test_manifest_fields_and_sha256(tmp_path):
    from tightfit.model.onnx import onnx_bytes
    from tightfit.model.extract import count_macs, count_params, extract_subnet
    from tightfit.ondevice.hardware import describe_hardware
    from tightfit.ondevice.timing import Protocol
    from tightfit.model.supernet import Supernet
    from helpers import tiny_recipe
    recipe = tiny_recipe()
    space = recipe.space
    subnet = space.middle()
    sn = Supernet(space, 3, 4)
    sn.set_subnet(subnet)
    net = extract_subnet(sn, subnet)
    data = onnx_bytes(net, 3, 16)
    measured = Measurement(figure_ms=0.12, percentile=90.0, p50_ms=0.1, p90_ms=0.12, p99_ms=0.2, mean_ms=0.11,
                           min_ms=0.09, max_ms=0.3, cv=0.05, iqr_over_median=0.02, runs=1000, repeat_spread=0.01,
                           stable=True, note="ok")
    lat = latency_section(measured, describe_hardware(), Protocol().to_dict(), 0.115)
    m = build_manifest(space=space, subnet=subnet, params=count_params(net), macs=count_macs(net, 3, 16),
                       onnx_data=data, channels=3, image_size=16, class_names=("a", "b", "c", "d"),
                       mean=(0.5, 0.5, 0.5), std=(0.2, 0.2, 0.2), validation=Accuracy(487, 600, "validation"),
                       test=Accuracy(724, 900, "test"), latency=lat, budget_ms=0.15, percentile=90.0,
                       device="this-host", recipe_name=recipe.name, recipe_hash=recipe.hash(),
                       lead=paired_comparison(np.arange(600) < 487, np.arange(600) < 470, against="1:3/2:3"))
    folder = write_export(tmp_path / "exp", data, net, m)
    for section, keys in REQUIRED.items():
        where = m if not section else m[section]
        assert not [k for k in keys if k not in where], section
    written = json.loads((folder / "manifest.json").read_text())
    # The file's digest computed independently with hashlib (Python standard library).
    assert written["sha256"] == hashlib.sha256((folder / "model.onnx").read_bytes()).hexdigest()
    assert written["architecture"]["key"] == subnet.to_key() and written["input"]["shape"] == [None, 3, 16, 16]
    # parameter count as torch itself counts it (sum of Parameter.numel over the shipped network)
    assert written["architecture"]["params"] == sum(p.numel() for p in net.parameters())
    assert {k: written["budget"][k] for k in ("ms", "percentile", "device")} == {"ms": 0.15, "percentile": 90.0, "device": "this-host"}
    assert "p90" in written["budget"]["rule"]
    # the measurement as the runner's tables and the verdicts hold it: the record reads back unchanged
    assert Measurement.from_dict(written["latency"]) == measured
    # Each accuracy carries its count and 95 % interval: statsmodels' proportion_confint(method="wilson") of the
    # same counts (Wilson 1927); the pick's lead over the runner-up (17 images only it gets right, none the other
    # way) is McNemar's exact test, p = 2 / 2^17 (the binomial formula by hand).
    from statsmodels.stats.proportion import proportion_confint
    for split, correct, images in (("validation", 487, 600), ("test", 724, 900)):
        got = written["accuracy"][split]
        assert (got["correct"], got["images"], got["split"]) == (correct, images, split)
        ref = proportion_confint(correct, images, alpha=0.05, method="wilson")
        assert got["interval_95"] == pytest.approx([100 * ref[0], 100 * ref[1]], abs=1e-4)
    lead = written["accuracy"]["lead"]
    assert (lead["against"], lead["only_first_right"], lead["only_second_right"]) == ("1:3/2:3", 17, 0)
    assert lead["p_value"] == pytest.approx(2 / 2 ** 17, abs=1e-6) and lead["beyond_noise"] is True
    assert [d for d in written["architecture"]["description"] if d["type"] == "inverted_residual"].__len__() == \
        sum(subnet.depths)
    state = torch.load(folder / "state_dict.pt", weights_only=True)
    assert set(state) == set(net.state_dict())
    # ONNX Runtime reads the file and agrees with the static network.
    x = torch.randn(2, 3, 16, 16)
    out = ort.InferenceSession(str(folder / "model.onnx"), providers=["CPUExecutionProvider"]).run(
        None, {"image": x.numpy()})[0]
    assert np.abs(out - net(x).detach().numpy()).max() < 1e-4
    with pytest.raises(ValueError):
        write_export(tmp_path / "bad", data + b"x", net, m)


def test_manifest_unverified_latency_says_so():
    # No measurement: every figure is null, never a prediction dressed up as a measurement, and the
    # note says so even when the caller gives none.
    hardware, protocol = {"cpu_model": "elsewhere"}, {"threads": 1}
    lat = latency_section(None, hardware, protocol, 0.42)
    assert lat["measured"] is False and lat["stable"] is False and lat["note"] == "not measured"
    assert all(lat.get(k) is None for k in ("p50_ms", "p90_ms", "p99_ms", "mean_ms", "cv", "iqr_over_median",
                                            "budget_stat_ms"))
    assert lat["hardware"] == hardware and lat["protocol"] == protocol and math.isclose(lat["predicted_ms"], 0.42)
    figures = Measurement(0.35, 90.0, 0.3, 0.35, 0.4, 0.31, 0.29, 0.5, 0.05, 0.02, 400, stable=True, note="")
    measured = latency_section(figures, hardware, protocol, 0.42, "the search note")
    assert measured["measured"] is True and measured["p90_ms"] == 0.35 and measured["note"] == "the search note"
