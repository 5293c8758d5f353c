"""Benchmarks of `beyondmf.correlations`: the exact spectrum of N = 6 on 400 frequencies, and cumulant2's
g2(τ) on 200 delays (N = 500 with --full, N = 100 otherwise), time and memory.

Each time is a whole call after one warm-up call of the same shapes (compile time reported apart); at
full size cumulant2's case is one call with its compile (a warm-up would double a run of many minutes for
seconds of compile, which the quick case measures). Memory
is the process's peak resident size after the call (`resource.getrusage`, a high-water mark of the whole
benchmark process) and the size of the dominant arrays from the cost model beside it.
"""

from __future__ import annotations

import resource
import time
import warnings

import numpy as np

from .. import geometry
from ..correlations import correlations
from ..model import Model
from ._core import Row, suite
from .machine import Machine

RABI, MIN_DISTANCE = 1.0, 0.1
EXACT_N, EXACT_RADIUS, FREQUENCIES = 6, 0.5, 400
C2_N_FULL, C2_N_QUICK, C2_DENSITY, DELAYS, DELAY_END = 500, 100, 0.5, 200, 10.0


def _peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # kB on Linux


def _timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return out, time.perf_counter() - t0


@suite("correlations")
def correlations_suite(full: bool, machine: Machine) -> list[Row]:
    rows = []
    pos = geometry.ellipsoid_cloud(EXACT_N, EXACT_RADIUS, seed=1, min_distance=MIN_DISTANCE)
    model = Model(pos, rabi=RABI)
    freqs = np.linspace(-10, 10, FREQUENCIES)
    _, t_first = _timed(lambda: correlations(model, "exact", None, frequencies=freqs))
    ds, t = _timed(lambda: correlations(model, "exact", None, frequencies=freqs))
    m = int(max(ds.attrs["krylov_dimension"]))
    note = (f"N={EXACT_N}, sphere r={EXACT_RADIUS} λ0, Ω={RABI:g}, Δ=0, steady state, {FREQUENCIES} "
            f"frequencies in ±10 Γ0, forward detector; Krylov dimension {m}, "
            f"residual {ds.attrs['krylov_residual']:.1g}")
    rows += [
        Row("correlations", f"exact N={EXACT_N}", "spectrum time", t, "s", note),
        Row("correlations", f"exact N={EXACT_N}", "first call (with compile)", t_first, "s", note),
        Row("correlations", f"exact N={EXACT_N}", "Krylov basis", 16.0 * m * 4**EXACT_N / 2**20, "MiB",
            "16·m·4^N bytes"),
        Row("correlations", f"exact N={EXACT_N}", "peak resident memory", _peak_mb(), "MiB", "whole process"),
    ]
    n = C2_N_FULL if full else C2_N_QUICK
    radius = (3 * n / (4 * np.pi * C2_DENSITY)) ** (1 / 3)
    cloud = Model(geometry.ellipsoid_cloud(n, radius, seed=1, min_distance=0.2), rabi=RABI)
    delays = np.linspace(0, DELAY_END, DELAYS)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # cumulant2's own diagnostics are not what is timed here
        if not full:
            small = Model(geometry.ellipsoid_cloud(n, radius, seed=2, min_distance=0.2), rabi=RABI)
            _, t_first = _timed(lambda: correlations(small, "cumulant2", delays))
        ds, t = _timed(lambda: correlations(cloud, "cumulant2", delays))
    steps = ds.attrs.get("regression_accepted_steps", 0) + ds.attrs.get("regression_rejected_steps", 0)
    note = (f"N={n}, sphere n·λ0³={C2_DENSITY:g}, Ω={RABI:g}, steady state, {DELAYS} delays 0…{DELAY_END:g}, "
            f"forward detector (4 tangents), {ds.attrs['solver']}, {steps} steps")
    rows += [
        Row("correlations", f"cumulant2 N={n}", "g2(τ) time (with its steady state)"
            + (", one call with its compile" if full else ""), t, "s", note),
        *([] if full else [Row("correlations", f"cumulant2 N={n}", "first call (with compile, another cloud)",
                               t_first, "s", note)]),
        Row("correlations", f"cumulant2 N={n}", "regression state", 8.0 * 5 * n**2 * 5 / 2**20, "MiB",
            "5 N² reals × (state + 4 tangents) … × the solver's stages"),
        Row("correlations", f"cumulant2 N={n}", "peak resident memory", _peak_mb(), "MiB", "whole process"),
    ]
    return rows
