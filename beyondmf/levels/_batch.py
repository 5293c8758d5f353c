"""One solve for many drives of the same cloud: the right-hand side mapped over a leading batch axis.

`jax.vmap` of a right-hand side whose couplings act as matrix-vector products K @ β turns them into one
matrix-matrix product K @ [β_1 … β_B] per evaluation, so the couplings are read once per step for the whole
batch (the cost of a step is memory-bound on K for B = 1). The batch shares one adaptive step sequence,
set by its most demanding member; each member's error is still held to the tolerances.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import jax
import jax.numpy as jnp

from ..integrate import SolveError, observe_once, settle, solve
from ..memory import available_bytes

_FNS: dict[tuple, tuple[Callable, Callable]] = {}
DRIVE_KEYS = ("detuning", "omega")


def batched(rhs: Callable, observe: Callable) -> tuple[Callable, Callable]:
    """(rhs, observe) over states with a leading batch axis; args["detuning"] and args["omega"] carry the
    same axis (compiled once per pair of functions)."""
    key = (rhs, observe)
    if key not in _FNS:
        def brhs(t, Y, a):
            def one(y, det, om):
                return rhs(t, y, {**a["base"], "detuning": det, "omega": om})
            return jax.vmap(one)(Y, a["detuning"], a["omega"])

        def bobserve(Y, obs_args):
            return jax.vmap(lambda y: observe(y, obs_args))(Y)

        _FNS[key] = (brhs, bobserve)
    return _FNS[key]


def stack_args(per_model: list[dict[str, Any]]) -> dict[str, Any]:
    """The arguments of one model each → shared couplings and stacked drives."""
    base = {k: v for k, v in per_model[0].items() if k not in DRIVE_KEYS}
    return {"base": base, **{k: jnp.stack([a[k] for a in per_model]) for k in DRIVE_KEYS}}


def groups(items: list, bytes_each: float, fraction: float = 0.5) -> list[list]:
    """``items`` in consecutive groups that each fit in ``fraction`` of the free memory (at least one
    item per group: a single one is the unbatched solve, whose own check refuses it if it does not fit)."""
    size = max(1, int(fraction * available_bytes() // max(bytes_each, 1.0)))
    return [items[i:i + size] for i in range(0, len(items), size)]


def drive_of(model) -> str:
    """The drive of one member, for an error message."""
    det = model.detuning if model.uniform_detuning else f"{float(model.detunings.mean()):g} (mean)"
    return f"Ω = {complex(model.rabi):g}, Δ = {det}"


def steady_one_by_one(level, models, probes, seed, options, err) -> list:
    """The batch's steady-state search failed (it settles only when every member does): solve the members
    one by one, so that each one that settles is kept and a failing one is named by its drive."""
    out = []
    for m in models:
        try:
            out.append(level.steady(m, probes, seed, options))
        except SolveError as one:
            raise SolveError(f"at the drive {drive_of(m)}: {one}") from err
    return out


def split(obs: dict, count: int) -> list[dict]:
    """Observations with a batch axis after the time axis → one dict per member."""
    return [{k: v[:, b] for k, v in obs.items()} for b in range(count)]


def evolve_groups(models, times, y0_one, options, bytes_each: float, parts: Callable, finish: Callable,
                  label: str) -> list:
    """A level's `evolve_batch`: ``parts(group)`` → (solver, args, obs_args, rhs, observe) of a group,
    ``finish(observations, attrs)`` → the Moments of one member."""
    out = []
    for group in groups(models, bytes_each):
        solver, args, obs_args, rhs, observe = parts(group)
        y0 = jnp.stack([y0_one] * len(group))
        obs, _, stats = solve(rhs, observe, y0, args, obs_args, times, options, solver,
                              jump_ts=group[0].envelope.jumps,
                              what=f"{label} evolution of {len(group)} drives in one solve")
        out += [finish(one, {**stats, "batched_drives": len(group)}) for one in split(obs, len(group))]
    return out


def steady_groups(level, models, y0_one, probes, seed, options, bytes_each: float, parts: Callable,
                  finish: Callable, label: str, **settle_options) -> list:
    """A level's `steady_batch` (see `evolve_groups`); a group that does not settle as a whole is solved
    member by member (`steady_one_by_one`)."""
    out = []
    for group in groups(models, bytes_each):
        solver, args, obs_args, rhs, observe = parts(group)
        y0 = jnp.stack([y0_one] * len(group))
        try:
            what = f"{label} steady state of {len(group)} drives in one solve"
            y, info = settle(rhs, observe, y0, args, obs_args, options, solver, what=what, **settle_options)
        except SolveError as err:
            out += steady_one_by_one(level, group, probes, seed, options, err)
            continue
        obs = observe_once(observe, y, obs_args)
        out += [finish(one, {"solver": solver, **info, "batched_drives": len(group)})
                for one in split(obs, len(group))]
    return out
