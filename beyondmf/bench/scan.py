"""Benchmark of `beyondmf.drive_scan`: a grid of detunings of one cloud as one batched solve against one
solve per detuning, in the same run, at mean field (N = 4000 and 64 detunings with --full; N = 1000 and 16
otherwise) and at cumulant2 (N = 500 and 8 detunings with --full; N = 100 and 8 otherwise), dynamics to
t = 5 and (mean field) steady states.

Times are medians of repeated calls after a warm-up of the same shapes (compile time apart). Beside them,
what the machine allows: a mean-field step reads J and Γ (16 N² bytes) once per right-hand-side evaluation,
so one solve per drive is bound by the read bandwidth and the batch by the matrix-product peak; the rows
give the measured rate of each against that bound.
"""

from __future__ import annotations

import time
import warnings

import numpy as np

from .. import geometry
from ..api import drive_scan, evolve, steady
from ..integrate import SolveError
from ..model import Model
from ._core import Row, suite
from .machine import Machine

RABI, DENSITY, MIN_DISTANCE, T_END = 0.5, 0.5, 0.1, 5.0
STAGES = 6  # right-hand-side evaluations per accepted Tsit5 step (FSAL: 7 stages, one reused)


def _cloud(n: int) -> Model:
    radius = (3 * n / (4 * np.pi * DENSITY)) ** (1 / 3)
    return Model(geometry.ellipsoid_cloud(n, radius, seed=1, min_distance=MIN_DISTANCE), rabi=RABI)


def _timed(fn, repeats: int):
    out, times = None, []
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return out, float(np.median(times))


def _pair(level: str, model: Model, dets, times, repeats: int):
    def batch():
        return drive_scan(model, level, detuning=dets, times=times)

    def loop():
        calls = [(lambda d=d: evolve(model.with_drive(detuning=d), level, times)) if times is not None
                 else (lambda d=d: steady(model.with_drive(detuning=d), level)) for d in dets]
        return [c() for c in calls]

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        # warm-up of the same shapes: the batch and one single solve
        drive_scan(model, level, detuning=dets, times=times)
        (evolve(model, level, times) if times is not None else steady(model, level))
        scan, t_batch = _timed(batch, repeats)
        singles, t_loop = _timed(loop, max(1, repeats - 2))
    return scan, singles, t_batch, t_loop


@suite("drive_scan")
def scan_suite(full: bool, machine: Machine) -> list[Row]:
    rows = []
    n_mf, b_mf = (4000, 64) if full else (1000, 16)
    n_c2, b_c2 = (500, 8) if full else (100, 8)
    times = np.linspace(0.0, T_END, 11)
    for level, n, b, calcs in (("meanfield", n_mf, b_mf, ("evolve", "steady")), ("cumulant2", n_c2, b_c2,
                                                                                  ("evolve",))):
        model = _cloud(n)
        dets = np.linspace(-3.0, 3.0, b)
        for calc in calcs:
            ts = times if calc == "evolve" else None
            case = f"{level} N={n}, {b} detunings, {calc}"
            try:
                scan, singles, t_batch, t_loop = _pair(level, model, dets, ts, 3)
            except SolveError as err:  # a drive without a steady state here: say so, measure the rest
                rows.append(Row("drive_scan", case, "not measured", float("nan"), "", str(err)[:200]))
                continue
            err = max(float(np.max(np.abs(scan.emission_rate[k].values - s.emission_rate.values)))
                      for k, s in enumerate(singles))
            note = (f"ellipsoid n·λ0³={DENSITY}, Ω={RABI}, Δ in ±3 Γ0"
                    + (f", t = 0…{T_END:g}" if ts is not None else "")
                    + f"; max |ΔP| batch vs loop {err:.1g}")
            rows += [Row("drive_scan", case, "batched", t_batch, "s", note),
                     Row("drive_scan", case, "one solve per drive", t_loop, "s", "same run"),
                     Row("drive_scan", case, "speed-up", t_loop / t_batch, "×", "target ≥ 5 (issue)")]
            steps = scan.attrs.get("accepted_steps")
            if level == "meanfield" and calc == "evolve" and steps:
                evals = STAGES * int(steps)
                flops = evals * 2 * (2 * n * n * 2 * b)  # J and Γ on [Re β, Im β] of every drive
                rows.append(Row("drive_scan", case, "batch matmul rate / peak", flops / t_batch /
                                machine.matmul_flops, "1",
                                f"{evals} evaluations of 2 products N×N · N×{2 * b}"))
                steps_1 = [int(s.attrs.get("accepted_steps", 0)) for s in singles]
                read = STAGES * sum(steps_1) * 16 * n * n
                rows.append(Row("drive_scan", case, "loop read rate / bandwidth", read / t_loop /
                                machine.read_bandwidth, "1", "J and Γ read once per evaluation"))
                # the ratio with both paths at their bounds and these step counts: the loop at the read
                # bandwidth against the batch at the matrix-product peak (a loop whose J and Γ stay in
                # cache, small N, can beat its bound)
                bound = (read / machine.read_bandwidth) / (flops / machine.matmul_flops)
                rows.append(Row("drive_scan", case, "speed-up with both at their bounds", bound, "×",
                                f"{sum(steps_1)} loop steps over {b} drives, {steps} batch steps"))
    return rows
