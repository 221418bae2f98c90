"""The MobileNetV2 recipe's largest subnet is the published MobileNetV2 (Sandler et al. 2018, Table 2)."""
import subprocess
import sys
from pathlib import Path

import pytest
import torch
from torch.utils.flop_counter import FlopCounterMode

from tightfit.model.extract import count_macs, count_params, extract_subnet
from tightfit.recipe import load_recipe
from tightfit.model.supernet import Supernet

torchvision = pytest.importorskip("torchvision")
RECIPE_PATH = Path(__file__).parents[1] / "recipes" / "mobilenetv2-224.toml"
RECIPE = load_recipe(RECIPE_PATH)


@pytest.fixture(scope="module")
def pair():
    supernet = Supernet(RECIPE.space, 3, 1000)
    sub = RECIPE.space.largest()
    supernet.set_subnet(sub)
    ours = extract_subnet(supernet, sub)
    reference = torchvision.models.mobilenet_v2(weights=None).eval()  # random init, nothing downloaded
    return ours, reference


def test_parameter_count_equals_torchvision(pair):
    ours, reference = pair
    # torchvision.models.mobilenet_v2(): 3,504,872 parameters (torchvision model docs).
    assert count_params(ours) == count_params(reference) == 3_504_872


def test_same_function_after_loading_torchvision_weights(pair):
    ours, reference = pair
    # Key mapping: both networks list layers in the paper's order (stem, 17 bottlenecks,
    # 1x1 conv, classifier), so their state_dicts pair up in order, with equal shapes.
    theirs = reference.state_dict()
    assert len(theirs) == len(ours.state_dict())
    mapped = {}
    for (k_ours, v_ours), (k_ref, v_ref) in zip(ours.state_dict().items(), theirs.items()):
        assert v_ours.shape == v_ref.shape, (k_ours, k_ref)
        assert k_ours.rsplit(".", 1)[-1] == k_ref.rsplit(".", 1)[-1]
        mapped[k_ours] = v_ref
    ours.load_state_dict(mapped)
    with torch.no_grad():  # random BN statistics so the comparison is not dominated by zeros
        for bn_ours, bn_ref in zip([m for m in ours.modules() if isinstance(m, torch.nn.BatchNorm2d)],
                                   [m for m in reference.modules() if isinstance(m, torch.nn.BatchNorm2d)]):
            mean, var = torch.randn_like(bn_ref.running_mean) * 0.1, torch.rand_like(bn_ref.running_var) + 0.5
            for bn in (bn_ours, bn_ref):
                bn.running_mean.copy_(mean)
                bn.running_var.copy_(var)
    x = torch.randn(1, 3, 224, 224)
    with torch.no_grad():
        assert (ours.eval()(x) - reference(x)).abs().max().item() <= 1e-5


def test_macs_match_flop_counter_and_paper(pair):
    ours, _ = pair
    macs = count_macs(ours, 3, 224)
    with FlopCounterMode(display=False) as counter:  # torch.utils.flop_counter forward count
        ours(torch.zeros(1, 3, 224, 224))
    assert macs == counter.get_total_flops() // 2
    # Sandler et al. 2018, Table 3: MobileNetV2 (1.0, 224) has ~300M multiply-adds.
    assert abs(macs - 300e6) / 300e6 <= 0.02


def _largest_line(text: str) -> tuple[int, float]:
    """(params, multiply-adds) from inspect's 'largest' line: '  largest  3,504,872 params  300.77 M MACs  KEY'."""
    words = next(line for line in text.splitlines() if line.split()[:1] == ["largest"]).split()
    return int(words[1].replace(",", "")), float(words[3]) * 1e6


def _inspect_cli(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "tightfit", "inspect", str(RECIPE_PATH), *args], cwd=cwd,
                          capture_output=True, text=True)


def test_inspect_without_the_data_reports_the_published_size(tmp_path):
    # Sandler et al. 2018, Table 4: MobileNetV2 (1.0, 224) has 3.4 M parameters and 300 M multiply-adds for
    # ImageNet's 1,000 classes. The paper rounds its count; torchvision's MobileNetV2, built from the paper's
    # Table 2, has 3,504,872 (torchvision model docs), 3 % above the rounded figure. data.path ('data/my-images')
    # does not exist in tmp_path, so the figures come from the space and the class count alone.
    done = _inspect_cli("--classes", "1000", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "1000 classes" in done.stdout
    params, macs = _largest_line(done.stdout)
    assert params == 3_504_872 and abs(params - 3.4e6) / 3.4e6 <= 0.05
    assert abs(macs - 300e6) / 300e6 <= 0.02


def test_inspect_takes_the_class_count_from_the_recipe_and_says_how_to_give_it(tmp_path):
    from tightfit.report.inspect import inspect
    stated = tmp_path / "stated.toml"
    stated.write_text(RECIPE_PATH.read_text("utf-8").replace("channels = 3\n", "channels = 3\nclasses = 1000\n", 1))
    params, macs = _largest_line(inspect(str(stated), [], [], front=False))
    assert params == 3_504_872 and abs(macs - 300e6) / 300e6 <= 0.02  # the same figures as with --classes
    # Neither the count nor the data: exit 2 and one line that names both ways to give the count.
    refused = _inspect_cli(cwd=tmp_path)
    assert refused.returncode == 2 and refused.stderr.count("\n") == 1
    assert "--classes" in refused.stderr and "data.classes" in refused.stderr
