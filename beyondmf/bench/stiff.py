"""Benchmarks of mean field on stiff clouds (close pairs): the automatic solver (Tsit5 at this level,
docs/meanfield.md) against a plain NumPy + SciPy solve of the same equations, and a dense box whose
couplings are its physics.

Cases (all driven on resonance at Ω = 1 Γ0 along z from the ground state, x-polarised dipoles):

- a Gaussian cloud of 2000 emitters, σ = 4 λ0 in every direction, drawn without a minimum distance
  (seed 1): peak density N/((2π)^{3/2}σ³) = 1.98 λ0⁻³, closest pair 0.0265 λ0 (|J| = 160 Γ0), to t = 20;
- the box of 50 emitters of side 0.3 λ0 (seed 8, closest pair 0.0234 λ0): evolve to t = 10 and steady.
"""

from __future__ import annotations

import sys
import time
import warnings

import numpy as np

from .. import geometry
from ..api import evolve, steady
from ..model import Model
from ._core import Row, suite
from .machine import Machine
from .meanfield import reference_meanfield

__all__ = ["stiff_cloud", "stiff_box"]

CLOUD_N, CLOUD_WIDTH, CLOUD_SEED = 2000, 4.0, 1
BOX_N, BOX_SIDE, BOX_SEED = 50, 0.3, 8
RABI, T_CLOUD, T_BOX, POINTS = 1.0, 20.0, 10.0, 101
RTOL, ATOL = 1e-6, 1e-8


def stiff_cloud(n: int = CLOUD_N, width: float = CLOUD_WIDTH, seed: int = CLOUD_SEED) -> Model:
    return Model(geometry.gaussian_cloud(n, width, seed=seed), rabi=RABI)


def stiff_box(n: int = BOX_N, side: float = BOX_SIDE, seed: int = BOX_SEED) -> Model:
    return Model(geometry.box_cloud(n, side, seed=seed), rabi=RABI)


def _timed(fn, *args, **kw):
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the explicit run's stiffness warning: its figure is in the note
        out = fn(*args, **kw)
    return out, time.perf_counter() - t0


def _say(text: str) -> None:
    print(f"bench stiff: {text}", file=sys.stderr, flush=True)


def _cloud_rows(full: bool) -> list[Row]:
    model = stiff_cloud()
    times = np.linspace(0.0, T_CLOUD, POINTS)
    dmin = geometry.nearest_distance(model.positions)[0]
    peak = CLOUD_N / ((2 * np.pi) ** 1.5 * CLOUD_WIDTH**3)
    opts = dict(rtol=RTOL, atol=ATOL, progress=False)
    _say("cloud: beyondmf auto (first call)")
    ds, t_first = _timed(evolve, model, "meanfield", times, **opts)
    _say(f"cloud: first call {t_first:.1f} s; compiled")
    reps = [_timed(evolve, model, "meanfield", times, **opts)[1] for _ in range(3 if full else 2)]
    t_auto = float(np.median(reps))
    _say(f"cloud: compiled {t_auto:.1f} s; scipy baseline")
    (p_ref, nfev), t_ref = _timed(reference_meanfield, model, times, RTOL, ATOL, True)
    _say(f"cloud: scipy {t_ref:.1f} s")
    p = ds["emission_rate"].values
    scale = float(np.max(np.abs(p_ref)))
    case = f"cloud N={CLOUD_N}"
    note = (f"Gaussian σ={CLOUD_WIDTH:g} λ0, no min_distance, seed {CLOUD_SEED}: peak density "
            f"{peak:.3g} λ0⁻³, "
            f"closest pair {dmin:.3g} λ0, max|J| {np.max(np.abs(model.J)):.3g} Γ0, stiffness "
            f"{model.stiffness():.3g} Γ0; Ω={RABI:g}, t=0..{T_CLOUD:g}, {POINTS} points, rtol={RTOL:g}, "
            f"atol={ATOL:g}")
    return [
        Row("stiff", case, "beyondmf auto: time (first call, with compile)", t_first, "s", note),
        Row("stiff", case, "beyondmf auto: time (compiled)", t_auto, "s",
            f"median of {len(reps)}; solver {ds.attrs['solver']}, {ds.attrs['accepted_steps']} steps"),
        Row("stiff", case, "numpy + solve_ivp RK45: time", t_ref, "s", f"{nfev} evaluations"),
        Row("stiff", case, "speed-up (scipy / beyondmf auto, compiled)", t_ref / t_auto, "1", "target ≥ 10"),
        Row("stiff", case, "speed-up (scipy / beyondmf auto, first call)", t_ref / t_first, "1", ""),
        Row("stiff", case, "emission rate max relative difference auto vs scipy",
            float(np.max(np.abs(p - p_ref))) / scale, "1", "max|P − P_scipy| / max P_scipy; target ≤ 1e-6"),
    ]


def _box_rows() -> list[Row]:
    model = stiff_box()
    times = np.linspace(0.0, T_BOX, POINTS)
    dmin = geometry.nearest_distance(model.positions)[0]
    opts = dict(progress=False)
    _say("box: evolve")
    ds, t_first = _timed(evolve, model, "meanfield", times, **opts)
    _, t_warm = _timed(evolve, model, "meanfield", times, **opts)
    _say(f"box: evolve {t_first:.1f} s / {t_warm:.1f} s; steady")
    ss, s_first = _timed(steady, model, "meanfield", **opts)
    _, s_warm = _timed(steady, model, "meanfield", **opts)
    _say(f"box: steady {s_first:.1f} s / {s_warm:.1f} s")
    case = f"box N={BOX_N}"
    note = (f"box side {BOX_SIDE:g} λ0, seed {BOX_SEED}, closest pair {dmin:.3g} λ0, stiffness "
            f"{model.stiffness():.3g} Γ0, ‖iJ + ½Γ‖ {model.coupling_norm():.3g} Γ0; Ω={RABI:g}, "
            "default tolerances")
    return [
        Row("stiff", case, "evolve t ≤ 10: time (first call, with compile)", t_first, "s", note),
        Row("stiff", case, "evolve t ≤ 10: time (compiled)", t_warm, "s",
            f"solver {ds.attrs['solver']}, {ds.attrs['accepted_steps']} steps; target < 10 s"),
        Row("stiff", case, "steady: time (first call, with compile)", s_first, "s", ""),
        Row("stiff", case, "steady: time (compiled)", s_warm, "s",
            f"settled t = {ss.attrs['settle_time']:g}, residual {ss.attrs['residual']:.2g}, largest Re λ "
            f"{ss.attrs.get('stability_growth_rate', float('nan')):.3g} Γ0; target < 10 s"),
        Row("stiff", case, "steady emission rate", float(ss["emission_rate"].values), "photons per 1/Γ0", ""),
    ]


@suite("stiff")
def stiff_suite(full: bool, machine: Machine) -> list[Row]:
    del machine  # ratios here are against the scipy baseline measured in the same run
    return _box_rows() + _cloud_rows(full)
