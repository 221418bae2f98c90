import random
from pathlib import Path

import numpy as np
import pytest
import torch
from hypothesis import settings

# Property tests draw the same examples on every run (CI must not pass or fail by luck).
settings.register_profile("fixed", derandomize=True, print_blob=True)
settings.load_profile("fixed")


@pytest.fixture(autouse=True)
def _restore_rng():
    """Each test starts from and leaves the same global RNG state (as torchvision's tests do)."""
    torch_state, np_state, py_state = torch.get_rng_state(), np.random.get_state(), random.getstate()
    torch.manual_seed(0)
    yield
    torch.set_rng_state(torch_state)
    np.random.set_state(np_state)
    random.setstate(py_state)


@pytest.fixture(scope="session")
def tiny_run(tmp_path_factory) -> Path:
    """A briefly trained tiny run, shared by the search tests (read-only for them except search/ and exports/)."""
    from helpers import tiny_recipe
    from tightfit.train.loop import train
    run = tmp_path_factory.mktemp("run")
    train(tiny_recipe(epochs=0.3, recalibration_batches=2, eval_batch_size=256), run, progress=False)
    return run
