"""Benchmarks of the mean-field level: the right-hand side against the streaming bound, whole solves against
plain NumPy + SciPy, and one large cloud (``--full``).

The mean-field right-hand side reads the N×N coupling matrices once per evaluation (two float64
matrices, 16N² bytes, for real couplings) and does O(N) work per element read, so its speed limit is the
machine's memory bandwidth: we report the effective bandwidth 16N²/t and its ratio to the read and triad
bandwidths measured in the same run.
"""

from __future__ import annotations

import resource
import sys
import time
import warnings

import jax
import numpy as np
from scipy.integrate import solve_ivp

from .. import geometry
from ..api import evolve
from ..levels.meanfield import bloch_to_state, coupling_args, meanfield_rhs
from ..memory import require
from ..model import Model
from ._core import Row, suite
from .machine import Machine, measure, median_time

__all__ = ["reference_meanfield", "cloud_model"]

# The clouds: isotropic Gaussian clouds of width σ (λ0) with a hard-core minimum distance (λ0), driven
# on resonance at Ω = 1 Γ0 along z from the ground state, x-polarised dipoles.
WIDTH, MIN_DISTANCE = 2.0, 0.05
RHS_SIZES, RHS_SIZES_FULL = (1000, 4000), (8000, 16000)
SOLVE_SIZES = (1000, 2000, 4000)
BIG_N, BIG_WIDTH, BIG_MIN_DISTANCE = 20_000, 5.0, 0.1
T_END, POINTS, BIG_POINTS = 20.0, 101, 21
RABI = 1.0
# Tolerances of both implementations in the whole-solve comparison (beyondmf's defaults).
RTOL, ATOL = 1e-6, 1e-8


def _solve_bytes(n: int) -> float:
    """Peak memory of a mean-field solve (bytes), as measured at N = 20,000 (12.2 GiB): the model's J and
    Γ, held once as device arrays (16N²), and up to two N×N temporaries (while the couplings' stiffness
    bound is reduced, and in the observables at a save point)."""
    return 32.0 * n**2


def cloud_model(n: int, width: float = WIDTH, min_distance: float = MIN_DISTANCE, seed: int = 0) -> Model:
    """The benchmark cloud of ``n`` emitters; refused before anything is allocated when it cannot fit."""
    require(_solve_bytes(n), f"the mean-field benchmark with {n} emitters")
    pos = geometry.gaussian_cloud(n, width, seed=seed, min_distance=min_distance)
    return Model(pos, rabi=RABI)


def _cloud_note(width: float, min_distance: float) -> str:
    return f"Gaussian σ={width:g} λ0, min_distance={min_distance:g} λ0, Ω={RABI:g}, Δ=0"


def _rhs_rows(n: int, machine: Machine) -> list[Row]:
    model = cloud_model(n)
    args = coupling_args(model)
    rng = np.random.default_rng(1)
    bloch = rng.normal(size=(n, 3))
    y = bloch_to_state(0.9 * bloch / np.linalg.norm(bloch, axis=1, keepdims=True))
    f = jax.jit(meanfield_rhs(model.envelope))
    repeats = 21 if n <= 4000 else 7
    # the shared machine's load drifts during a run: measure the bandwidth again right beside the RHS
    beside = measure()
    t = median_time(lambda: f(0.0, y, args), repeats=repeats, warmup=2)
    nbytes = 8.0 * n**2 * (4 if model.complex_couplings else 2)
    bw = nbytes / t
    case = f"rhs N={n}"
    note = f"median of {repeats}; " + _cloud_note(WIDTH, MIN_DISTANCE)
    return [
        Row("meanfield", case, "time per evaluation", t * 1e3, "ms", note),
        Row("meanfield", case, "coupling data read", nbytes / 1e6, "MB", "J and Γ, float64, once each"),
        Row("meanfield", case, "effective bandwidth", bw / 1e9, "GB/s", "coupling bytes / time"),
        Row("meanfield", case, "ratio to read bandwidth", bw / machine.read_bandwidth, "1",
            "target ≥ 0.6 at N=4000"),
        Row("meanfield", case, "ratio to triad bandwidth", bw / machine.triad_bandwidth, "1", ""),
        Row("meanfield", case, "ratio to read bandwidth measured beside it", bw / beside.read_bandwidth, "1",
            f"read bandwidth {beside.read_bandwidth / 1e9:.3g} GB/s just before this case"),
    ]


def reference_meanfield(
    model: Model, times: np.ndarray, rtol: float = RTOL, atol: float = ATOL, stats: bool = False
):
    """The emission rate P(t) from the ground state, as a user would compute it without beyondmf.

    The mean-field equations of docs/meanfield.md with complex β and a NumPy right-hand side,
    integrated by ``scipy.integrate.solve_ivp`` (RK45, Dormand–Prince):

        φ = Kβ,  K = iJ + ½(Γ − 1),  z = 2n − 1
        dβ/dt = (iΔ − ½)β + (i/2)Ω_i z + zφ,   dn/dt = −n − Im(Ω_i* β) − 2 Re(β* φ)
        P = β†Γβ + Σ_i (n_i − |β_i|²)

    Real couplings only; the drive is constant. ``stats``: return (P, number of evaluations).
    """
    n = model.n
    K = 1j * model.J + 0.5 * (model.Gamma - np.eye(n))
    om = model.rabi_sites
    det = model.detunings

    def rhs(_t, y):
        beta = y[:n] + 1j * y[n : 2 * n]
        pop = y[2 * n :]
        z = 2 * pop - 1
        phi = K @ beta
        dbeta = (1j * det - 0.5) * beta + 0.5j * om * z + z * phi
        dpop = -pop - np.imag(np.conj(om) * beta) - 2 * np.real(np.conj(beta) * phi)
        return np.concatenate([dbeta.real, dbeta.imag, dpop])

    sol = solve_ivp(rhs, (times[0], times[-1]), np.zeros(3 * n), method="RK45", t_eval=times,
                    rtol=rtol, atol=atol)
    if not sol.success:
        raise RuntimeError(f"scipy reference solve failed: {sol.message}")
    beta = sol.y[:n] + 1j * sol.y[n : 2 * n]
    pop = sol.y[2 * n :]
    coherent = np.real(np.einsum("it,ij,jt->t", np.conj(beta), model.Gamma, beta))
    rate = coherent + (pop - np.abs(beta) ** 2).sum(axis=0)
    return (rate, int(sol.nfev)) if stats else rate


def _timed_evolve(model: Model, times: np.ndarray, **options):
    t0 = time.perf_counter()
    ds = evolve(model, "meanfield", times, progress=False, **options)
    return ds, time.perf_counter() - t0


def _solve_rows(n: int) -> list[Row]:
    model = cloud_model(n)
    times = np.linspace(0.0, T_END, POINTS)
    dmin = geometry.nearest_distance(model.positions)[0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the stiffness warning: its figure is in the note
        ds, t_first = _timed_evolve(model, times, rtol=RTOL, atol=ATOL)
        _, t_warm = _timed_evolve(model, times, rtol=RTOL, atol=ATOL)
    t0 = time.perf_counter()
    p_ref = reference_meanfield(model, times)
    t_ref = time.perf_counter() - t0
    p = ds["emission_rate"].values
    diff = float(np.max(np.abs(p - p_ref)) / np.max(np.abs(p_ref)))
    case = f"solve N={n}"
    note = (f"t=0..{T_END:g}, {POINTS} points, rtol={RTOL:g}, atol={ATOL:g}; solver {ds.attrs['solver']}, "
            f"{ds.attrs['accepted_steps']} steps; stiffness {model.stiffness():.3g} Γ0, r_min={dmin:.3g} λ0; "
            + _cloud_note(WIDTH, MIN_DISTANCE))
    return [
        Row("meanfield", case, "beyondmf time (first call, with compile)", t_first, "s", note),
        Row("meanfield", case, "beyondmf time (compiled)", t_warm, "s", ""),
        Row("meanfield", case, "numpy + solve_ivp RK45 time", t_ref, "s", "complex K@β per evaluation"),
        Row("meanfield", case, "speed-up (scipy / beyondmf first call)", t_ref / t_first, "1", ""),
        Row("meanfield", case, "speed-up (scipy / beyondmf compiled)", t_ref / t_warm, "1", ""),
        Row("meanfield", case, "emission rate max relative difference", diff, "1",
            "max|P − P_scipy| / max P_scipy over the time points"),
    ]


def _big_rows() -> list[Row]:
    t0 = time.perf_counter()
    model = cloud_model(BIG_N, BIG_WIDTH, BIG_MIN_DISTANCE)
    t_model = time.perf_counter() - t0
    times = np.linspace(0.0, T_END, BIG_POINTS)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ds, t_solve = _timed_evolve(model, times)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024  # kB on Linux
    dens = geometry.density(model.positions)
    case = f"dynamics N={BIG_N}"
    note = (f"{_cloud_note(BIG_WIDTH, BIG_MIN_DISTANCE)}; peak density {dens['peak']:.3g} λ0⁻³; "
            f"t=0..{T_END:g}, {BIG_POINTS} points, default tolerances; solver {ds.attrs['solver']}, "
            f"{ds.attrs['accepted_steps']} steps; stiffness {model.stiffness():.3g} Γ0")
    return [
        Row("meanfield", case, "model build time (couplings)", t_model, "s", note),
        Row("meanfield", case, "solve time (with compile)", t_solve, "s", ""),
        Row("meanfield", case, "peak memory (process ru_maxrss)", peak / 2**30, "GiB",
            f"estimate before allocating {_solve_bytes(BIG_N) / 2**30:.1f} GiB"),
        Row("meanfield", case, "final emission rate", float(ds["emission_rate"].values[-1]),
            "photons per 1/Γ0", ""),
    ]


def _case(label: str, fn, *args) -> list[Row]:
    """Run one case, with a line on stderr before and after (whole solves take minutes)."""
    print(f"bench meanfield: {label} ...", file=sys.stderr, flush=True)
    t0 = time.perf_counter()
    rows = fn(*args)
    print(f"bench meanfield: {label} done in {time.perf_counter() - t0:.1f} s", file=sys.stderr, flush=True)
    return rows


@suite("meanfield")
def meanfield_suite(full: bool, machine: Machine) -> list[Row]:
    rows: list[Row] = []
    for n in RHS_SIZES + (RHS_SIZES_FULL if full else ()):
        rows += _case(f"rhs N={n}", _rhs_rows, n, machine)
    for n in SOLVE_SIZES:
        rows += _case(f"solve N={n}", _solve_rows, n)
    if full:
        rows += _case(f"dynamics N={BIG_N}", _big_rows)
    return rows
