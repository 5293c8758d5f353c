"""Benchmarks of level "qsd_product": its Heun step against twa's on the same cloud, in the same run.

Both levels do the same dense work per step (two drifts, one [J; Γ]·[x | y] product each, and the noise
product B·ΔW: 20N²S FLOPs); qsd_product adds an O(NS) noise amplitude and the renormalisation, and no
vacuum control. The figure of merit is the ratio of the two wall times, and the step's FLOP rate as a
fraction of the machine's matrix-product peak measured in the same run.
"""

from __future__ import annotations

import time
import warnings

import numpy as np

from ..api import evolve
from ._core import Row, suite
from .machine import Machine
from .twa import _cloud


def _timed(model, level, times, samples, repeats, **options):
    """Median wall time of ``repeats`` runs after one compiling run on a short time span, and the steps."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # the levels' own diagnostics are not timed here
        evolve(model, level, times * 1e-3, seed=0, samples=samples, **options)
        walls, ds = [], None
        for r in range(repeats):
            t0 = time.perf_counter()
            ds = evolve(model, level, times, seed=r, samples=samples, **options)
            walls.append(time.perf_counter() - t0)
    return float(np.median(walls)), ds.attrs["steps"]


@suite("qsd_product")
def qsd_product_suite(full: bool, machine: Machine) -> list[Row]:
    n, samples, t_end, repeats = (1000, 1000, 10.0, 1) if full else (300, 200, 2.0, 3)
    model = _cloud(n)
    times = np.linspace(0.0, t_end, 11)
    case = f"N={n} S={samples} t={t_end:g}"
    twa_wall, steps = _timed(model, "twa", times, samples, repeats, vacuum_check=0)
    qsd_wall, qsd_steps = _timed(model, "qsd_product", times, samples, repeats)
    assert steps == qsd_steps  # the same dt = "auto" rule
    flops = 20 * n * n * samples * steps
    how = f"median of {repeats} after a compile" if repeats > 1 else "one run after a compile"
    return [
        Row("qsd_product", case, "wall time", qsd_wall, "s", f"{steps} Heun steps, {how}"),
        Row("qsd_product", case, "wall time / twa's", qsd_wall / twa_wall, "1",
            f"twa without its vacuum control: {twa_wall:.3g} s, same cloud, steps and samples"),
        Row("qsd_product", case, "step FLOP/s / matmul peak", flops / qsd_wall / machine.matmul_flops, "1",
            "20N²S FLOPs per Heun step"),
    ]
