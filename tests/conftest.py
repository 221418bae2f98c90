import random

import numpy as np
import pytest
import torch


@pytest.fixture(autouse=True)
def _restore_rng():
    """Each test starts from and leaves the same global RNG state (as torchvision's tests do)."""
    torch_state, np_state, py_state = torch.get_rng_state(), np.random.get_state(), random.getstate()
    torch.manual_seed(0)
    yield
    torch.set_rng_state(torch_state)
    np.random.set_state(np_state)
    random.setstate(py_state)
