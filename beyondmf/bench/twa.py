"""Benchmarks of level "twa": a large sampled run, and the batched drift's FLOP/s against the matmul peak.

The drift of all S samples is one dense product [J; Γ] (2N × N) · [x | y] (N × 2S), 8N²S FLOPs, plus
O(NS) elementwise work; a stochastic Heun step is two drifts and the noise product B · dW (4N²S FLOPs).
"""

from __future__ import annotations

import time

import jax
import jax.numpy as jnp
import numpy as np

from ..api import evolve
from ..geometry import ellipsoid_cloud
from ..levels._spin_sampling import spin_args, spin_drift
from ..model import Model
from ._core import Row, suite
from .machine import Machine, median_time


def _cloud(n: int) -> Model:
    """A driven spherical cloud of our own: n·λ0³ ≈ 1, hard-core 0.1 λ0, resonant drive Ω = 1."""
    radius = (3 * n / (4 * np.pi)) ** (1 / 3)
    return Model(positions=ellipsoid_cloud(n, radius, seed=1, min_distance=0.1), rabi=1.0)


@suite("twa")
def twa_suite(full: bool, machine: Machine) -> list[Row]:
    rows = []
    n, samples = (1000, 1000) if full else (300, 200)
    model = _cloud(n)

    # batched drift as a fraction of the matmul peak
    args = spin_args(model)
    drift = jax.jit(spin_drift(model.envelope))
    Y = jnp.asarray(np.random.default_rng(0).choice([-1.0, 1.0], size=(n, 3 * samples)))
    t = median_time(lambda: drift(0.0, Y, args))
    flops = 8 * n * n * samples
    rows.append(Row("twa", f"N={n} S={samples}", "drift FLOP/s", flops / t / 1e9, "GFLOP/s",
                    "one [J;Γ]·[x|y] product per drift"))
    rows.append(Row("twa", f"N={n} S={samples}", "drift / matmul peak", flops / t / machine.matmul_flops, "1",
                    "target ≥ 0.5"))

    # the sampled run to t = 10 (issue target: N = 1000 × 1000 samples within 10 minutes), measured
    t_end = 10.0
    times = np.linspace(0.0, t_end, 11)
    evolve(model, "twa", times * 0.001, seed=0, samples=samples)  # compile (same shapes, fewer steps)
    t0 = time.perf_counter()
    ds = evolve(model, "twa", times, seed=0, samples=samples)
    wall = time.perf_counter() - t0
    steps, dt = ds.attrs["steps"], ds.attrs["dt"]
    per_step = wall / steps
    step_flops = 20 * n * n * samples
    rows.append(Row("twa", f"N={n} S={samples} t={t_end:g}", "wall time", wall, "s",
                    f"{steps} Heun steps of dt={dt:g} (‖iJ+Γ/2‖₂ = {model.coupling_norm():.3g} Γ0), "
                    "11 observation times; target 600 s at N=1000 S=1000"))
    rows.append(Row("twa", f"N={n} S={samples}", "step FLOP/s / matmul peak",
                    step_flops / per_step / machine.matmul_flops, "1", "20N²S FLOPs per Heun step"))
    return rows
