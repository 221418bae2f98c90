"""ONNX export: checker, ONNX Runtime parity and onnx.reference parity, batch 1 and 7."""
import random
from dataclasses import replace

import numpy as np
import onnx
import pytest
import torch
from onnx.reference import ReferenceEvaluator

from tightfit.model.onnx import export_onnx, max_parity_error, ort_outputs
from tightfit.model.extract import extract_subnet
from tightfit.model.supernet import Supernet
from helpers import perturb, tiny_recipe

SPACE = tiny_recipe().space
WIDE = tiny_recipe(wide=True).space  # elastic width in the stem and every stage


@pytest.mark.parametrize("wide", [False, True], ids=["fixed-width", "elastic-width"])
@pytest.mark.parametrize("which", ["smallest", "largest", "random"])
def test_onnx_matches_torch(tmp_path, which, wide):
    space = WIDE if wide else SPACE
    net = Supernet(replace(space, smaller_kernels="mapped"), 3, 5)
    perturb(net, seed=3)
    sub = space.sample(random.Random(4)) if which == "random" else getattr(space, which)()
    net.set_subnet(sub)
    static = extract_subnet(net, sub)
    data = export_onnx(static, tmp_path / "m.onnx", 3, 16)
    model = onnx.load(tmp_path / "m.onnx")
    onnx.checker.check_model(model, full_check=True)  # onnx.checker reference
    dims = model.graph.input[0].type.tensor_type.shape.dim
    assert dims[0].dim_param and [d.dim_value for d in dims[1:]] == [3, 16, 16]  # dynamic batch axis
    # onnxruntime.InferenceSession vs torch eager, batch 1 and 7 (bar: <= 1e-4).
    assert max_parity_error(static, data, 3, 16, batch_sizes=(1, 7)) <= 1e-4
    # onnx.reference.ReferenceEvaluator: the ONNX specification's own Python implementation.
    ref = ReferenceEvaluator(model)
    for b in (1, 7):
        x = torch.randn(b, 3, 16, 16)
        with torch.no_grad():
            expected = static(x).numpy()
        got = ref.run(None, {"image": x.numpy()})[0]
        assert np.abs(got - expected).max() <= 1e-4
        assert np.abs(ort_outputs(data, x.numpy()) - got).max() <= 1e-4
