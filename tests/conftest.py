import numpy as np
import pytest

import beyondmf  # noqa: F401  (64-bit JAX)


@pytest.fixture
def rng():
    return np.random.default_rng(12345)
