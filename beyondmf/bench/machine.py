"""The machine's own limits, measured in the same run as the benchmarks they normalise."""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass

import jax
import jax.numpy as jnp
import numpy as np

__all__ = ["Machine", "measure", "median_time"]


def median_time(fn: Callable[[], object], repeats: int = 5, warmup: int = 1) -> float:
    """Median wall time (s) of ``fn()``, blocking on JAX results; ``warmup`` untimed calls first."""
    for _ in range(warmup):
        jax.block_until_ready(fn())
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        jax.block_until_ready(fn())
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


@dataclass
class Machine:
    """float64 matrix-product peak (FLOP/s) and streaming bandwidths (bytes/s) of this machine."""

    matmul_flops: float
    read_bandwidth: float
    triad_bandwidth: float
    backend: str

    def rows(self):
        from ._core import Row

        return [
            Row("machine", self.backend, "float64 matmul peak", self.matmul_flops / 1e9, "GFLOP/s",
                "XLA dot of two 2048² matrices, median of 5"),
            Row("machine", self.backend, "read bandwidth", self.read_bandwidth / 1e9, "GB/s",
                "sum over a 512 MiB array, median of 5"),
            Row("machine", self.backend, "triad bandwidth", self.triad_bandwidth / 1e9, "GB/s",
                "a = b + s·c over 3 × 256 MiB arrays (24 B per element), median of 5"),
        ]


def measure(matmul_n: int = 2048, stream_bytes: int = 512 * 2**20) -> Machine:
    """Measure the float64 matmul peak and the read and triad streaming bandwidths with XLA."""
    key = jax.random.PRNGKey(0)
    a = jax.random.normal(key, (matmul_n, matmul_n), dtype=jnp.float64)
    b = jax.random.normal(key, (matmul_n, matmul_n), dtype=jnp.float64)
    mm = jax.jit(jnp.dot)
    t_mm = median_time(lambda: mm(a, b))

    n = stream_bytes // 8
    x = jnp.ones(n, dtype=jnp.float64)
    rd = jax.jit(jnp.sum)
    t_rd = median_time(lambda: rd(x))

    m = n // 2
    y, z = jnp.ones(m), jnp.full(m, 2.0)
    triad = jax.jit(lambda u, v: u + 3.0 * v)
    t_tr = median_time(lambda: triad(y, z))
    return Machine(
        matmul_flops=2 * matmul_n**3 / t_mm,
        read_bandwidth=8 * n / t_rd,
        triad_bandwidth=24 * m / t_tr,
        backend=jax.default_backend(),
    )
