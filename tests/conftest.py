import numpy as np
import pytest

import beyondmf  # noqa: F401  (64-bit JAX)
from beyondmf.memory import release_compiled_code


@pytest.fixture
def rng():
    return np.random.default_rng(12345)


@pytest.fixture(autouse=True)
def _bounded_compiled_code():
    """The default run compiles some 20,000 JAX functions in one process; each keeps memory mappings of
    its machine code, and past the kernel's limit (vm.max_map_count) the process died of a segmentation
    fault late in the run. Dropping compiled code when half the limit is reached keeps it bounded."""
    yield
    release_compiled_code()
