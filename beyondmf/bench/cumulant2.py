"""Benchmarks of level "cumulant2": right-hand side throughput, a cloud's evolution, peak memory.

The right-hand side is three complex matrix products (K*A, KB, ZKᵀ) done as 12 real N³ products,
24 N³ flops (`RHS_FLOPS`); its speed is reported as a fraction of the machine's float64 matrix-product
peak measured in the same run (target ≥ 0.4 at N = 1000).
"""

from __future__ import annotations

import resource
import sys
import time

import jax
import numpy as np

from .. import geometry
from ..api import evolve, steady
from ..levels.cumulant2 import RHS_FLOPS, cumulant2_args, cumulant2_rhs, product_state
from ..model import Model
from . import Row, suite
from .machine import Machine, median_time


def _cloud(n: int, seed: int = 0) -> Model:
    """Gaussian cloud of peak density ≈ 1/λ0³ (σ = (N/(2π)^{3/2})^{1/3} λ0), min distance 0.1 λ0, s = 2."""
    sigma = (n / (2 * np.pi) ** 1.5) ** (1 / 3)
    pos = geometry.gaussian_cloud(n, sigma, seed=seed, min_distance=0.1)
    return Model(pos, rabi=1.0, detuning=0.0)


def _peak_rss_gib() -> float:
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return rss / 2**30 if sys.platform == "darwin" else rss / 2**20  # bytes on macOS, KiB on Linux


@suite("cumulant2")
def bench_cumulant2(full: bool, machine: Machine) -> list[Row]:
    rows: list[Row] = []
    sizes = (500, 1000, 2000, 4000) if full else (500, 1000, 2000)
    for n in sizes:
        model = _cloud(n)
        args = cumulant2_args(model)
        rng = np.random.default_rng(1)
        bloch = rng.normal(size=(n, 3))
        bloch /= np.linalg.norm(bloch, axis=1, keepdims=True)
        y = product_state(bloch)
        f = jax.jit(cumulant2_rhs(model.envelope))
        t = median_time(lambda f=f, y=y, args=args: f(0.0, y, args), repeats=5 if n <= 2000 else 3)
        flops = RHS_FLOPS(n) / t
        case = f"N={n}"
        rows += [
            Row("cumulant2", case, "rhs time", t, "s", "median of repeated jit-compiled evaluations"),
            Row("cumulant2", case, "rhs GFLOP/s", flops / 1e9, "GFLOP/s", "24 N³ product flops / time"),
            Row("cumulant2", case, "rhs fraction of matmul peak", flops / machine.matmul_flops, "1",
                "target ≥ 0.4 at N = 1000"),
        ]
        del f, y, args, model
    n_cloud = 1000
    model = _cloud(n_cloud, seed=2)
    times = np.linspace(0, 10, 11)
    t0 = time.perf_counter()
    ds = evolve(model, "cumulant2", times, progress=False)
    wall = time.perf_counter() - t0
    case = f"cloud N={n_cloud}, t=0..10"
    rows += [
        Row("cumulant2", case, "evolve wall time", wall, "s",
            f"Gaussian cloud, peak density ≈ 1/λ0³, s = 2, tsit5, includes compile; "
            f"{ds.attrs['accepted_steps']} steps; target < 900 s at N = 1000"),
        Row("cumulant2", case, "peak resident memory", _peak_rss_gib(), "GiB",
            "getrusage maxrss of the whole benchmark process"),
    ]
    rows += _steady_reuse()
    return rows


def _steady_reuse(n: int = 6, clouds: int = 4) -> list[Row]:
    """`steady` on new clouds of one size: the first call compiles, later ones must not (each new cloud
    recompiled the Newton polish and the observables before, ~5 s at N = 6)."""
    def one(seed: int) -> float:
        pos = geometry.ellipsoid_cloud(n, [0.5, 0.5, 0.5], seed=seed, min_distance=0.1)
        t0 = time.perf_counter()
        steady(Model(pos, rabi=0.5 + 0.1 * (seed % 100)), "cumulant2")
        return time.perf_counter() - t0

    first = one(100)
    later = float(np.median([one(101 + k) for k in range(clouds - 1)]))
    case = f"steady, new clouds N={n}"
    return [
        Row("cumulant2", case, "steady wall time, first call", first, "s", "includes compilation"),
        Row("cumulant2", case, "steady wall time, a new cloud", later, "s",
            f"median of {clouds - 1} new clouds and drives, same N: no compilation"),
        Row("cumulant2", case, "first call / new cloud", first / later, "1", "compile share of a first call"),
    ]
