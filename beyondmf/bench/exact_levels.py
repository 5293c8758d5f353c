"""Benchmarks of the exact reference levels: "exact" (density matrix), "jumps" (trajectories), "dicke".

Each figure is a whole `evolve` call after one warm-up call of the same shapes (so compile time is
reported apart). The cost model beside each: "exact" and "jumps" are dominated by the coupling product
(N × N)·(N × 4^N) resp. (N × N)·(N × 2^N) per right-hand side — 8N²·4^N resp. 8N²·2^N real FLOP per
evaluation — so we report the achieved rate of that product against the machine's matmul peak.
"""

from __future__ import annotations

import time

import numpy as np

from .. import geometry
from ..api import evolve
from ..model import Model
from ._core import Row, suite
from .machine import Machine

# Our own scenarios: a small spherical cloud (radius in λ0, hard core 0.1 λ0) driven on resonance at Ω = 1.
RABI, MIN_DISTANCE = 1.0, 0.1
EXACT_N, EXACT_RADIUS = 8, 0.5
JUMPS_N, JUMPS_RADIUS, JUMPS_SAMPLES, JUMPS_QUICK_SAMPLES, JUMPS_CHUNK = 12, 0.7, 500, 16, 8
DICKE_N = 2000
T_END = 10.0


def _cloud(n: int, radius: float) -> Model:
    return Model(geometry.ellipsoid_cloud(n, radius, seed=1, min_distance=MIN_DISTANCE), rabi=RABI)


def _timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return out, time.perf_counter() - t0


def _note(model: Model, extra: str) -> str:
    return f"N={model.n}, Ω={RABI:g}, Δ=0, {extra}"


@suite("exact")
def exact_suite(full: bool, machine: Machine) -> list[Row]:
    model = _cloud(EXACT_N, EXACT_RADIUS)
    times = np.linspace(0, T_END, 11)
    _, t_first = _timed(lambda: evolve(model, "exact", times))
    ds, t = _timed(lambda: evolve(model, "exact", times))
    steps = ds.attrs["accepted_steps"] + ds.attrs["rejected_steps"]
    evals = 6 * steps  # Tsit5: six right-hand sides per step (FSAL)
    flops = evals * 8 * model.n**2 * 4.0**model.n
    note = _note(model, f"sphere r={EXACT_RADIUS} λ0, ground state, t=0…{T_END:g}, {ds.attrs['solver']}")
    return [
        Row("exact", f"N={model.n}", "evolve time", t, "s", note),
        Row("exact", f"N={model.n}", "first call (with compile)", t_first, "s", note),
        Row("exact", f"N={model.n}", "steps", float(steps), "1", note),
        Row("exact", f"N={model.n}", "coupling product vs matmul peak", flops / t / machine.matmul_flops, "1",
            "8N²·4^N FLOP per right-hand side, 6 per step"),
    ]


@suite("jumps")
def jumps_suite(full: bool, machine: Machine) -> list[Row]:
    model = _cloud(JUMPS_N, JUMPS_RADIUS)
    samples = JUMPS_SAMPLES if full else JUMPS_QUICK_SAMPLES
    times = np.linspace(0, T_END, 11)
    # the warm-up compiles the same chunk shape that the timed run uses
    _, t_first = _timed(lambda: evolve(model, "jumps", times, seed=0, samples=JUMPS_CHUNK, chunk=JUMPS_CHUNK))
    ds, t = _timed(lambda: evolve(model, "jumps", times, seed=1, samples=samples, chunk=JUMPS_CHUNK))
    dt = ds.attrs["dt"]
    flops = samples * (T_END / dt) * 5 * 8 * model.n**2 * 2.0**model.n  # ≥ 4 RK4 stages + the jump branch
    note = _note(model, f"sphere r={JUMPS_RADIUS} λ0, ground state, t=0…{T_END:g}, dt={dt:g}, "
                 f"{samples} samples, chunk {ds.attrs['chunk']}")
    return [
        Row("jumps", f"N={model.n}", "evolve time", t, "s", note),
        Row("jumps", f"N={model.n}", f"first call (with compile, {JUMPS_CHUNK} samples)", t_first, "s", note),
        Row("jumps", f"N={model.n}", "trajectories per second", samples / t, "1/s", note),
        Row("jumps", f"N={model.n}", "coupling product vs matmul peak (lower bound)",
            flops / t / machine.matmul_flops, "1", "8N²·2^N FLOP per H_eff application, 5 per step"),
    ]


@suite("dicke")
def dicke_suite(full: bool, machine: Machine) -> list[Row]:
    n = DICKE_N
    model = Model(np.zeros((n, 3)), coupling="all-to-all")
    t_end = (np.log(n) + 6) / n  # past the superradiant burst (delay ~ ln N/N: Gross and Haroche 1982)
    times = np.linspace(0, t_end, 41)
    _, t_first = _timed(lambda: evolve(model, "dicke", times, initial="excited"))
    ds, t = _timed(lambda: evolve(model, "dicke", times, initial="excited"))
    peak = float(ds.emission_rate.max())
    note = f"N={n} all-to-all, burst from full inversion, t=0…{t_end:.3g}, solver {ds.attrs['solver']}"
    return [
        Row("dicke", f"N={n}", "evolve time", t, "s", note),
        Row("dicke", f"N={n}", "first call (with compile)", t_first, "s", note),
        Row("dicke", f"N={n}", "steps", float(ds.attrs["accepted_steps"] + ds.attrs["rejected_steps"]), "1",
            note),
        Row("dicke", f"N={n}", "peak emission rate / (N²/4)", peak / (n**2 / 4), "1", note),
    ]
