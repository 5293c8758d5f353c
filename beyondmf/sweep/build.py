"""One sweep task from its parts: the seeds of a realization, the level table, the task's parameters."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from ..levels.base import detector_directions, get_level
from ..model import Model

__all__ = ["realization_seeds", "level_table", "build_task"]

# ---------------------------------------------------------------------------------------------------
# Seeds and tasks


def realization_seeds(seed: int, realization: int) -> tuple[int, int]:
    """(position seed, sampling seed) of realization k: SeedSequence([seed, k]) and ([seed, k, 1])."""
    pos = np.random.SeedSequence([int(seed), int(realization)]).generate_state(1)[0]
    lvl = np.random.SeedSequence([int(seed), int(realization), 1]).generate_state(1)[0]
    return int(pos % 2**31), int(lvl % 2**31)


def level_table(levels: Sequence[str] | Mapping[str, Any]) -> dict[str, dict[str, Any]]:
    """label → {"level": name, "options": {...}} from a list of names or label → {level?, **options}."""
    if isinstance(levels, str) or not isinstance(levels, Sequence | Mapping) or not levels:
        raise ValueError("levels must be a non-empty list of level names or a table label → options")
    items = {name: {} for name in levels} if not isinstance(levels, Mapping) else dict(levels)
    out = {}
    for label, opts in items.items():
        if opts is not None and not isinstance(opts, Mapping):
            raise ValueError(f"levels[{label!r}] must be a table of options, e.g. {{'level': 'twa', "
                             f"'samples': 500}} or {{}}, got {opts!r}")
        opts = dict(opts or {})
        name = opts.pop("level", label)
        get_level(name)  # unknown names raise, listing the known ones
        out[str(label)] = {"level": name, "options": opts}
    return out


def build_task(
    positions: np.ndarray,
    model: Mapping[str, Any],
    run: Mapping[str, Any],
    detectors: Mapping[str, Any] | None,
    level: Mapping[str, Any],
    seed: int,
    realization: int,
    lenses: Mapping[str, Any] | None = None,
) -> dict[str, Any]:
    """The task dictionary of one level on one draw; deterministic levels carry no seed, so equal
    positions at a deterministic level are one task whatever the realization number. ``lenses`` (as
    `beyondmf.evolve` takes them) enter the task only when given, so tasks without lenses keep their
    keys."""
    from ..api import _options

    lvl = get_level(level["level"])
    # refused here, before it becomes a task: a failed task's file is reused by the next run with its key
    _options(lvl, dict(level["options"]))
    task = {
        "positions": np.asarray(positions, dtype=float),
        "model": dict(model),
        "run": dict(run),
        "detectors": None if detectors is None else _task_detectors(detectors, model),
        "level": level["level"],
        "options": dict(level["options"]),
    }
    if lenses:
        from ..lens import lenses_of

        lenses_of(lenses, model.get("laser", Model.laser))  # refused here, naming the lens
        task["lenses"] = {str(k): dict(v) for k, v in lenses.items()}
    if lvl.stochastic:
        task["seed"] = realization_seeds(seed, realization)[1]
    return task


def _task_detectors(detectors: Mapping[str, Any], model: Mapping[str, Any]) -> dict[str, np.ndarray]:
    """Directions as given (so that task keys do not move by a rounding), angle tables turned into
    vectors; every entry validated, naming the detector."""
    resolved = detector_directions(detectors, model.get("laser", Model.laser))
    return {k: resolved[str(k)] if isinstance(v, Mapping) else np.asarray(v, float)
            for k, v in detectors.items()}
