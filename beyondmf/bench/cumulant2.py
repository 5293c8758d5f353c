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
import jax.numpy as jnp
import numpy as np

from .. import geometry
from ..api import evolve, steady
from ..levels.cumulant2 import RHS_FLOPS, cumulant2_args, cumulant2_rhs, product_state
from ..model import Model
from ._core import Row, suite
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
            f"Gaussian cloud, peak density ≈ 1/λ0³, s = 2, Tsit5, includes compile; "
            f"{ds.attrs['accepted_steps']} steps; target < 900 s at N = 1000"),
        Row("cumulant2", case, "peak resident memory", _peak_rss_gib(), "GiB",
            "getrusage maxrss of the whole benchmark process"),
    ]
    rows += _steady_reuse()
    rows += bench_cumulant2_radius(full, machine)  # the pair radius (also alone: --suite cumulant2_radius)
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


# ---- pair radius (near pairs dynamical, far pairs by the first-order rule) ------------------------------

def _dense_cloud(n: int, seed: int = 0, rabi: float = 1.0) -> Model:
    """Gaussian cloud of peak density n·λ0³ ≈ 2, min distance 0.05 λ0 (the case of the radius benchmarks)."""
    sigma = (n / (2.0 * (2 * np.pi) ** 1.5)) ** (1 / 3)
    pos = geometry.gaussian_cloud(n, sigma, seed=seed, min_distance=0.05)
    return Model(pos, rabi=rabi, detuning=0.0)


def radius_side_by_side(n: int, radius: float, t_end: float = 10.0) -> list[Row]:
    """The dense level and the pair radius on one cloud in one run: wall times and emission rates."""
    import warnings

    model = _dense_cloud(n, seed=3)
    times = np.linspace(0, t_end, 11)
    t0 = time.perf_counter()
    dense = evolve(model, "cumulant2", times, progress=False)
    t_dense = time.perf_counter() - t0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t0 = time.perf_counter()
        near = evolve(model, "cumulant2", times, progress=False, pair_radius=radius)
        t_near = time.perf_counter() - t0
        t0 = time.perf_counter()
        mf = evolve(model, "meanfield", times, progress=False)
        t_mf = time.perf_counter() - t0
    late = times >= 2
    d, s, m = (x.emission_rate.values[late] for x in (dense, near, mf))
    case = f"radius {radius:g} vs dense, N={n}, t=0..{t_end:g}"
    return [
        Row("cumulant2", case, "dense wall time", t_dense, "s",
            f"{dense.attrs['accepted_steps']} steps, incl. compile"),
        Row("cumulant2", case, "pair-radius wall time", t_near, "s",
            f"{near.attrs['accepted_steps']} steps, K = {near.attrs['near_partners_max']} near partners"),
        Row("cumulant2", case, "meanfield wall time", t_mf, "s", "same cloud"),
        Row("cumulant2", case, "dense / pair-radius time", t_dense / t_near, "1",
            "one run, same machine load"),
        Row("cumulant2", case, "emission-rate difference", float(np.max(np.abs(s - d) / d)), "1",
            "max over t ≥ 2 of |P_radius − P_dense| / P_dense"),
        Row("cumulant2", case, "dense correction to mean field", float(np.max(np.abs(m - d) / d)), "1",
            "max over t ≥ 2 of |P_mf − P_dense| / P_dense: what the pair radius must reproduce"),
        Row("cumulant2", case, "max far_share", float(near.attrs["max_far_share"]), "1",
            "truncation indicator"),
    ]


def radius_rhs_split(model: Model, radius: float, machine: Machine) -> list[Row]:
    """Time of one pair-radius right-hand side and of its parts, against the machine's limits."""
    from ..levels import _cumulant2_near as near

    n = model.n
    args = near.near_args(model, radius, "first_order")
    k = int(args["nbr"].shape[1])
    rng = np.random.default_rng(1)
    bloch = rng.normal(size=(n, 3))
    bloch /= np.linalg.norm(bloch, axis=1, keepdims=True)
    y = near.near_product_state(bloch, np.asarray(args["nbr"]), np.asarray(args["mask"]))
    f = jax.jit(near.NEAR_RHS["first_order"](model.envelope))
    t_all = median_time(lambda: f(0.0, y, args), repeats=3)
    beta, nn, *_ = near.unpack_near(y)
    om = args["omega"][0] + 1j * args["omega"][1]
    det = args["detuning"]
    kmv = jax.jit(near._kmv)
    t_u = median_time(lambda: kmv(args, beta), repeats=3)
    u = kmv(args, beta)
    feed = jax.jit(near._far_feedback)
    t_far = median_time(lambda: feed(args, beta, nn, u, om, det), repeats=3)
    factors = jax.jit(near.far_factors)
    t_fac = median_time(lambda: factors(beta, nn, u, om, det, args["quad"]), repeats=3)
    cols = 2 * 4 * near.QUAD_NODES  # real columns of the three far products
    far_flops = 3 * 2 * n**2 * cols
    case = f"pair radius {radius:g} RHS, N={n}, K={k}"
    return [
        Row("cumulant2", case, "rhs time", t_all, "s", "median of 3 jit-compiled evaluations"),
        Row("cumulant2", case, "Kβ (two N² streams)", t_u, "s",
            f"streaming bound {2 * 8 * n**2 / machine.read_bandwidth:.3g} s at the read bandwidth"),
        Row("cumulant2", case, "far feedback (3 N×N products)", t_far, "s",
            f"matmul bound {far_flops / machine.matmul_flops:.3g} s ({far_flops / 1e9:.3g} GFLOP); streaming "
            f"bound {3 * 8 * n**2 / machine.read_bandwidth:.3g} s"),
        Row("cumulant2", case, "far factors (e^{G s} f, 3×3)", t_fac, "s", "part of the far feedback"),
        Row("cumulant2", case, "near pairs and the rest", t_all - t_u - t_far, "s",
            f"whole minus the parts timed alone (fusion makes it inexact, even negative); O(N·K²) work, "
            f"N·K² = {n * k * k:.3g}"),
    ]


def radius_large(n: int = 10_000, radius: float = 1.5, t_end: float = 10.0) -> list[Row]:
    """The pair radius on a large cloud to t_end: wall time and peak memory (emission rate only at the saved
    times: the full observables' dense estimator is O(N³) and ~70 N² numbers, see docs/cumulant2.md)."""
    from ..integrate import pick_solver, solve
    from ..levels import _cumulant2_near as near

    t_start = time.perf_counter()
    model = _dense_cloud(n, seed=4)
    args = near.near_args(model, radius, "first_order")
    nbr, mask = np.asarray(args["nbr"]), np.asarray(args["mask"])
    y0 = near.near_product_state(np.tile([0.0, 0.0, -1.0], (n, 1)), nbr, mask)
    solver = pick_solver("Tsit5", y0.size, model.stiffness())
    opts = {"rtol": 1e-6, "atol": 1e-8, "max_steps": 200_000, "dtmin": 1e-9, "progress": False}
    times = np.linspace(0, t_end, 3)
    rhs = near.NEAR_RHS["first_order"](model.envelope)
    obs, _, stats = solve(rhs, _rate_only, y0, args, args, times, opts, solver, what="pair-radius benchmark")
    wall = time.perf_counter() - t_start
    case = f"pair radius {radius:g}, N={n}, t=0..{t_end:g}"
    return [
        Row("cumulant2", case, "evolve wall time", wall, "s",
            f"incl. couplings, lists, compile; {stats['accepted_steps']} steps; K = {nbr.shape[1]}; "
            "target < 900 s"),
        Row("cumulant2", case, "peak resident memory", _peak_rss_gib(), "GiB",
            "getrusage maxrss; target < 12 GiB"),
        Row("cumulant2", case, "emission rate at t_end", float(np.asarray(obs["rate"])[-1]), "Γ0",
            "readout with the near correlations only (the far rule acts in the dynamics)"),
    ]


def _rate_only(y, args):
    from ..levels import _cumulant2_near as near

    beta, n, A, *_ = near.unpack_near(y)
    G = args["Gamma"]
    prod = jnp.real(jnp.vdot(beta, G @ beta)) - jnp.sum(jnp.diagonal(G) * jnp.abs(beta) ** 2) + jnp.sum(
        jnp.diagonal(G) * n)
    nbr, mask = args["nbr"], args["mask"]
    a = (A - jnp.conj(beta)[:, None] * beta[nbr]) * mask
    near_corr = jnp.real(jnp.sum(G[jnp.arange(n.shape[0])[:, None], nbr] * a))
    return {"rate": prod + near_corr}


@suite("cumulant2_radius")
def bench_cumulant2_radius(full: bool, machine: Machine) -> list[Row]:
    rows = radius_side_by_side(2000 if full else 500, 2.0)
    rows += radius_rhs_split(_dense_cloud(4000 if full else 1000, seed=5), 1.5, machine)
    if full:
        rows += radius_large()
    return rows
