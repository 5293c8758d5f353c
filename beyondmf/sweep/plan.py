"""A study's plan before it runs (``beyondmf run --dry-run``): its tasks, the memory each level needs, and
a time estimated from a short probe on this machine.

The probe runs the first task of each level twice in this process, cut short: a dynamics to the first
tenth of its report times (at least 3 of them), a sampled level at no more than `PROBE_SAMPLES` samples;
a steady state is probed whole (a sampled one with fewer samples). The first run includes compilation,
the second reuses it, so

    compile ≈ t_first − t_second,   per task ≈ t_second · (time span / probed span) · (samples / probed),

and a run of K tasks of that level in one process takes about compile + K · per task (each worker of
``--workers`` compiles once). Adaptive steps do not scale exactly with the span (a transient may be the
costly part): the estimate is a guide to the order of magnitude, not a promise. A two-time
("correlations") study is not probed: its cost is dominated by the steady state and the delays together.
Nothing is written.
"""

from __future__ import annotations

import time
import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..levels import get_level
from ..study import Study
from ..tasks import build_model, compute, task_key, times_of
from .run import study_tasks

__all__ = ["LevelPlan", "plan_study", "PROBE_SAMPLES"]

PROBE_SAMPLES = 64  # the most samples a probe of a sampled level draws
PROBE_FRACTION = 0.1  # the share of the report times a probe of a dynamics integrates


@dataclass
class LevelPlan:
    """One level of a study's plan: its distinct tasks, the emitters and memory of its first task, and the
    probe's timings (None where there was no probe; ``probe_error`` says why it failed)."""

    label: str
    level: str
    tasks: int
    emitters: int
    memory: int | None
    probe: str = ""
    cold: float | None = None
    warm: float | None = None
    scale: float | None = None
    probe_error: str | None = None

    @property
    def per_task(self) -> float | None:
        return None if self.warm is None else self.warm * self.scale

    @property
    def compile(self) -> float | None:
        return None if self.cold is None else max(self.cold - self.warm, 0.0)

    @property
    def total(self) -> float | None:
        return None if self.warm is None else self.compile + self.tasks * self.per_task


def _probe_task(task: dict[str, Any]) -> tuple[dict[str, Any], float, str]:
    """The shortened task, the factor from its cost to the full task's, and what was cut."""
    probe = {**task, "run": dict(task.get("run") or {"calculation": "steady"}),
             "options": dict(task.get("options") or {})}
    scale, cut = 1.0, []
    if probe["run"].get("calculation", "steady") == "evolve":
        times = times_of(probe["run"])
        k = min(len(times), max(3, int(np.ceil(PROBE_FRACTION * len(times)))))
        short = times[:k]
        probe["run"]["times"] = [float(t) for t in short]
        scale *= (times[-1] - times[0]) / (short[-1] - short[0])
        cut.append(f"t to {short[-1]:.3g} of {times[-1]:.3g}")
    else:
        cut.append("the whole steady state")
    lvl = get_level(task["level"])
    options = {**lvl.options, **probe["options"]}
    if lvl.stochastic and "samples" in options:
        samples = int(options["samples"])
        fewer = max(2, min(samples, PROBE_SAMPLES))
        if fewer < samples:
            probe["options"]["samples"] = fewer
            scale *= samples / fewer
            cut.append(f"{fewer} of {samples} samples")
    return probe, scale, ", ".join(cut)


def plan_study(study: Study, probe: bool = True) -> tuple[int, list[LevelPlan]]:
    """(number of distinct tasks, one `LevelPlan` per level of the study, in its order)."""
    index, labels, _k, _dims, _params = study_tasks(study)
    unique: dict[str, tuple[str, dict]] = {}
    for key, task in index.items():
        unique.setdefault(task_key(task), (key[-2], task))
    plans = []
    for label in labels:
        mine = [t for lab, t in unique.values() if lab == label]
        first = mine[0]
        lvl = get_level(first["level"])
        model = build_model(first)
        plan = LevelPlan(label, first["level"], len(mine), model.n,
                         lvl.memory_bytes(model, {**lvl.options, **(first.get("options") or {})}))
        calculation = (first.get("run") or {}).get("calculation", "steady")
        if probe and calculation != "correlations":
            short, plan.scale, plan.probe = _probe_task(first)
            try:
                with warnings.catch_warnings():  # the run itself will say them
                    warnings.simplefilter("ignore")
                    timings = []
                    for _ in range(2):
                        t0 = time.perf_counter()
                        compute(short)
                        timings.append(time.perf_counter() - t0)
                plan.cold, plan.warm = timings
            except (ValueError, MemoryError, ArithmeticError, RuntimeError) as err:
                plan.probe_error = f"{type(err).__name__}: {err}"
        elif calculation == "correlations":
            plan.probe = "not probed (two-time correlations)"
        plans.append(plan)
    return len(unique), plans
