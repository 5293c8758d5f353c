"""Adaptive integration of a level's real-valued moment equations with diffrax, shared by ODE levels.

A level supplies ``rhs(t, y, args)`` and ``observe(y, obs_args) -> dict of arrays``; this module
integrates, evaluates ``observe`` at the requested times inside the compiled solve (no host round trips,
no storage of the full state history), and turns a failed solve into an error that says what to try.
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from typing import Any, NamedTuple

import diffrax
import jax
import jax.numpy as jnp
import numpy as np

from ._notes import warn as _note

__all__ = [
    "ODE_OPTIONS", "SolveError", "solve", "settle", "observe_once", "hermitian_unit_trace", "pick_solver",
    "per_envelope", "check_ode_options", "OptionError",
    "stabilized", "RELAX_RATE", "check_bounds", "BOUND_SLACK",
]

ODE_OPTIONS: dict[str, Any] = {
    "solver": "auto",
    "rtol": 1e-6,
    "atol": 1e-8,
    "max_steps": 200_000,
    "dtmin": 1e-9,
    "progress": "auto",
}
SOLVERS = {
    "Tsit5": diffrax.Tsit5,
    "Dopri5": diffrax.Dopri5,
    "Dopri8": diffrax.Dopri8,
    "Kvaerno3": diffrax.Kvaerno3,
    "Kvaerno5": diffrax.Kvaerno5,
}
IMPLICIT = ("Kvaerno3", "Kvaerno5")
# Above this many real unknowns a dense Jacobian (what the implicit solvers factorise) costs more than
# the explicit steps it saves.
IMPLICIT_MAX_SIZE = 3000
STIFF_RATIO = 200.0  # stiffness (Γ0) above which an explicit solver is warned about


class OptionError(ValueError):
    """A level option with a value the level cannot use; ``option`` names it, the message starts with it."""

    def __init__(self, option: str, problem: str) -> None:
        super().__init__(f"{option} {problem}")
        self.option = option



def per_envelope(build: Callable) -> Callable:
    """Decorator for a level's ``build(envelope) -> rhs``: equal envelopes get the same right-hand-side
    function, so every model of one shape reuses one compiled solve (`solve` caches by function)."""
    return functools.lru_cache(maxsize=64)(build)


class SolveError(RuntimeError):
    """The integrator failed; the message says what happened and what to try."""


_RESULT_NAMES = list(diffrax.RESULTS._name_to_item)
_ADVICE = {
    "max_steps_reached": "raise max_steps, or relax rtol/atol; if the cloud is dense, enforce a larger "
    "min_distance or use solver='Kvaerno5' (small N)",
    "dt_min_reached": "the step size collapsed below dtmin: the equations are stiff or the state diverges; "
    "try solver='Kvaerno5' (small N), a larger min_distance, or a looser rtol (e.g. 1e-5)",
    "nonfinite": "the state became NaN or infinite: the level's equations diverged here; check the model "
    "(very close emitters, huge Rabi frequency) or use a lower rtol",
}


def check_ode_options(options: dict[str, Any], defaults: dict[str, Any]) -> None:
    """`OptionError` naming the first ODE option (of those in ``defaults``) with a value the solver cannot
    use."""
    def positive(name):
        v = options.get(name)
        if name in defaults and not (isinstance(v, int | float) and not isinstance(v, bool)
                                     and np.isfinite(v) and v > 0):
            raise OptionError(name, f"must be a positive number, got {v!r}")

    for name in ("rtol", "atol", "dtmin"):
        positive(name)
    if "max_steps" in defaults:
        v = options.get("max_steps")
        if not (isinstance(v, int | np.integer) and not isinstance(v, bool) and v >= 1):
            raise OptionError("max_steps", f"must be a positive integer, got {v!r}")
    progress = options.get("progress")
    if "progress" in defaults and not (isinstance(progress, bool) or progress == "auto"):
        raise OptionError("progress", f"must be 'auto', true or false, got {options.get('progress')!r}")
    if "solver" in defaults and options.get("solver") != "auto" and options.get("solver") not in SOLVERS:
        known = ", ".join(SOLVERS)
        got = options.get("solver")
        spelled = {k.lower(): k for k in SOLVERS}.get(got.lower()) if isinstance(got, str) else None
        if spelled:  # the integrator library's class names, spelled as there (docs/study-files.md)
            raise OptionError("solver", f"{got!r} is spelled {spelled!r} (the class name in diffrax)")
        raise OptionError("solver", f"must be 'auto' or one of {known} (diffrax's integrators, "
                          f"spelled as there), got {got!r}")


def pick_solver(name: str, size: int, stiffness: float, implicit_ok: bool = True) -> str:
    """The solver to use: ``name`` unless "auto"; warns when an explicit solver meets a stiff problem.

    ``implicit_ok=False`` (mean field: its stiffness is the oscillation of the exchange J, which implicit
    steps must follow as closely as explicit ones wherever it is excited; docs/meanfield.md): "auto" is
    always Tsit5, and the warning does not suggest an implicit solver.
    """
    if name == "auto":
        stiff = stiffness > STIFF_RATIO and size <= IMPLICIT_MAX_SIZE and implicit_ok
        name = "Kvaerno5" if stiff else "Tsit5"
    if name not in SOLVERS:
        check_ode_options({"solver": name}, {"solver": "auto"})  # raises, naming the known solvers
    if name not in IMPLICIT and stiffness > STIFF_RATIO:
        advice = "draw the cloud with a larger min_distance" + (
            ", or use solver='Kvaerno5' for small N" if implicit_ok else "")
        _note(
            f"stiff equations: coupling rates up to {stiffness:.3g} Γ0 (close emitters) force explicit "
            f"steps of ~{1 / stiffness:.2g}/Γ0 with solver {name!r}; {advice}"
        )
    return name


# Rate (Γ0) at which `stabilized` pulls a state back onto its level's physical manifold.
RELAX_RATE = 1.0


@functools.lru_cache(maxsize=64)
def stabilized(rhs: Callable, project: Callable) -> tuple[Callable, Callable]:
    """(rhs, observe wrapper) that keep a state on the manifold of an affine projection ``project``.

    For a density matrix, P = `hermitian_unit_trace`: the right-hand side is evaluated at P(y) and the
    distance from the manifold is damped,

        dy/dt = f(P(y)) − κ (y − P(y)),        κ = RELAX_RATE,

    identical to dy/dt = f(y) on the manifold. Off it, e = y − P(y) obeys de/dt = (1 − Π) f(P(y)) − κe
    (Π the linear part of P), and (1 − Π) f(P(y)) = 0 because the Lindblad f maps Hermitian unit-trace
    matrices to Hermitian traceless ones: round-off and solver errors off the manifold decay at rate κ
    instead of accumulating. Without it the trace is a neutral direction, and a right-hand side that
    assumes ρ = ρ† (exact's ρH† = (Hρ)†) lets the anti-Hermitian part grow like a polynomial of degree N in
    t (the jump map alone acts on it, nilpotent and undamped); docs/exact.md, "Long runs".
    The wrapped ``observe`` reads P(y).
    """
    def rhs_p(t, y, args):
        p = project(y)
        return rhs(t, p, args) - RELAX_RATE * (y - p)

    def observe_p(observe):
        return _projected_observe(observe, project)

    return rhs_p, observe_p


@functools.lru_cache(maxsize=64)
def _projected_observe(observe: Callable, project: Callable) -> Callable:
    return lambda y, obs_args: observe(project(y), obs_args)


# A physical bound may be exceeded by this many times (rtol + atol) before a run is warned about.
BOUND_SLACK = 100.0


def check_bounds(what: str, excess: dict[str, float], options: dict[str, Any]) -> float:
    """Warn when a solution breaks a bound that the exact dynamics keeps, by more than its own error control
    allows; returns the largest excess.

    ``excess`` maps a bound, in words ("ρ ≥ 0 (smallest eigenvalue)", "|s_i| ≤ 1"), to how far the
    solution went beyond it (≤ 0: kept). The adaptive solver keeps each step's error below about
    rtol·|y| + atol; a bound broken by more than `BOUND_SLACK` × (rtol + atol) means errors accumulated
    over the run beyond that control, and the result is not vouched for.
    """
    tol = BOUND_SLACK * (float(options["rtol"]) + float(options["atol"]))
    worst = max(excess.values(), default=0.0)
    bad = {k: v for k, v in excess.items() if v > tol}
    if bad:
        listed = "; ".join(f"{k} broken by {v:.2g}" for k, v in bad.items())
        _note(
            f"{what}: {listed}, beyond what the solver's error control (rtol={options['rtol']:g}, "
            f"atol={options['atol']:g}) allows ({tol:.2g}): the integration error accumulated over the run "
            "and the result is not reliable. Lower rtol and atol, or shorten the run (a steady state: use "
            "steady())"
        )
    return worst


_COMPILED: dict[tuple, Callable] = {}


def _solver_fn(rhs, observe, solver: str, rtol, atol, max_steps, dtmin, jump_ts, progress: bool):
    key = (rhs, observe, solver, rtol, atol, max_steps, dtmin, jump_ts, progress)
    if key in _COMPILED:
        return _COMPILED[key]
    controller = diffrax.PIDController(
        rtol=rtol,
        atol=atol,
        dtmin=dtmin,
        force_dtmin=False,
        jump_ts=jnp.asarray(jump_ts) if jump_ts else None,
        pcoeff=0.0 if solver in IMPLICIT else 0.3,
        icoeff=1.0 if solver in IMPLICIT else 0.4,
    )
    meter = diffrax.TqdmProgressMeter(refresh_steps=50) if progress else diffrax.NoProgressMeter()

    @jax.jit
    def run(y0, args, ts, obs_args):
        # complex arguments travel as (real, imag) pairs: diffrax's complex support is unfinished (it
        # warns on any complex leaf); the level's right-hand side still sees complex arrays
        flags = jax.tree.map(jnp.iscomplexobj, args)
        split = jax.tree.map(lambda f, x: (jnp.real(x), jnp.imag(x)) if f else x, flags, args)

        def real_rhs(t, y, a):
            return rhs(t, y, jax.tree.map(lambda f, x: x[0] + 1j * x[1] if f else x, flags, a))

        terms, method = diffrax.ODETerm(real_rhs), SOLVERS[solver]()

        sol = diffrax.diffeqsolve(
            terms,
            method,
            t0=ts[0],
            t1=ts[-1],
            dt0=None,
            y0=y0,
            args=split,
            saveat=diffrax.SaveAt(
                subs=[
                    diffrax.SubSaveAt(ts=ts, fn=lambda t, y, a: observe(y, obs_args)),
                    diffrax.SubSaveAt(t1=True),
                ]
            ),
            stepsize_controller=controller,
            max_steps=max_steps,
            throw=False,
            progress_meter=meter,
        )
        obs, y_end = sol.ys
        stats = sol.stats
        y_last = jax.tree.map(lambda a: a[-1], y_end)
        return obs, y_last, sol.result._value, stats["num_accepted_steps"], stats["num_rejected_steps"]

    _COMPILED[key] = run
    return run


_OBSERVE_COMPILED: dict[Callable, Callable] = {}


def observe_once(observe: Callable, y, obs_args):
    """The observables of one state (a time axis of length 1), compiled once per ``observe``.

    Called eagerly, an ``observe`` with `jax.lax.map` inside (the per-detector moments) was compiled
    again on every call, ~0.5 s per steady state.
    """
    fn = _OBSERVE_COMPILED.get(observe)
    if fn is None:
        fn = _OBSERVE_COMPILED[observe] = jax.jit(lambda y, a: jax.tree.map(lambda v: v[None], observe(y, a)))
    return fn(y, obs_args)


def _progress(opt) -> bool:
    from ._config import show_progress

    return show_progress(opt)


def solve(
    rhs: Callable,
    observe: Callable,
    y0,
    args,
    obs_args,
    times: np.ndarray,
    options: dict[str, Any],
    solver: str,
    jump_ts: tuple[float, ...] = (),
    what: str = "solve",
    project: Callable | None = None,
):
    """Integrate from times[0] to times[-1]; returns (observations at ``times``, final state, stats).

    ``project`` (density-matrix levels: `hermitian_unit_trace`): integrate the `stabilized` equations,
    observe and return P(y), so that trace and Hermiticity hold at every time to round-off.
    """
    ts = jnp.asarray(times, dtype=float)
    if project is not None:
        rhs, wrap = stabilized(rhs, project)
        observe = wrap(observe)
        y0 = project(y0)
    if len(ts) == 1:
        obs = observe_once(observe, y0, obs_args)
        return obs, y0, {"solver": solver, "accepted_steps": 0, "rejected_steps": 0}
    run = _solver_fn(
        rhs,
        observe,
        solver,
        float(options["rtol"]),
        float(options["atol"]),
        int(options["max_steps"]),
        float(options["dtmin"]),
        tuple(t for t in jump_ts if times[0] < t < times[-1]),
        _progress(options["progress"]),
    )
    obs, y_end, code, acc, rej = run(y0, args, ts, obs_args)
    if project is not None:
        y_end = project(y_end)
    name = _RESULT_NAMES[int(code)]
    stats = {"solver": solver, "accepted_steps": int(acc), "rejected_steps": int(rej)}
    if name != "successful":
        raise SolveError(
            f"{what} failed ({name.replace('_', ' ')}) after {int(acc)} accepted and {int(rej)} rejected "
            f"steps with solver {solver!r}: {_ADVICE.get(name, 'see the diffrax documentation')}"
        )
    finite = jax.tree.reduce(lambda a, b: a & b, jax.tree.map(lambda a: bool(jnp.all(jnp.isfinite(a))), obs))
    if not finite:
        raise SolveError(f"{what} produced non-finite observables: {_ADVICE['nonfinite']}")
    return obs, y_end, stats


def settle(
    rhs: Callable,
    observe: Callable,
    y0,
    args,
    obs_args,
    options: dict[str, Any],
    solver: str,
    chunk: float = 50.0,
    max_time: float = 2000.0,
    tol: float = 1e-12,
    project: Callable | None = None,
    what: str = "steady state",
    linear: bool = False,
    first_chunk: float | None = None,
    stability_size: int = 0,
):
    """Integrate in chunks of ``chunk`` until the state has settled, then polish it by Newton's method.

    The integration stops when the residual r = max|dy/dt| / max(1, |y|) is below 1e-7, or when two
    chunks in a row have failed to halve it while it is below 1e-4 (the adaptive solver's own error floor,
    about its rtol times the fastest rate: with the default rtol = 1e-6 it often lies above 1e-7, and waiting
    for 1e-7 would run to ``max_time`` for nothing). Newton–GMRES then drives r towards ``tol``.

    ``project``, for density-matrix levels, is the affine map onto the physical states (Hermitian, unit
    trace). The Lindblad right-hand side conserves the trace, so its Jacobian is singular, and it may assume
    a Hermitian ρ; Newton then solves f(P(v)) + (v − P(v)) = 0 instead, whose Jacobian is regular wherever
    the steady state is unique, and whose roots are physical.

    ``linear`` (a right-hand side linear in y, as the Lindblad equation is): Newton is tried after every
    chunk from residual 1e-3 on, and the first polish that reaches 1e-10 ends the integration. Newton
    cannot then go astray (one root where the steady state is unique); for nonlinear equations it could
    land on an unstable fixed point, so they settle first, unless ``stability_size`` ≥ the number of
    unknowns: then Newton (dense Jacobian, step halving) is tried after every chunk too, and its fixed
    point y* is accepted where the Jacobian there has no eigenvalue with Re λ > 0 and either r < 1e-3 or
    max|y − y*| < NEAR_FIXED_POINT (the state is in y*'s neighbourhood, while slow modes still move it:
    mean field of dense clouds relaxes at rates down to 10⁻³ Γ0); an unstable y* with the dynamics still
    moving (r > 1e-3) ends the search with an error (a limit cycle).

    Never runs unannounced for long: the chunks together may take at most ``options["max_steps"]``
    accepted steps (more raises `SolveError` naming the budget and what to do), and a residual above 1e-3
    that has not halved over three chunks ends the search with an error (a limit cycle, chaos or a mode
    slower than the chunks). ``first_chunk`` (default ``chunk``) shortens the first integration.

    Returns (y, info) with the residual before and after the polish in ``info``. Raises SolveError when the
    dynamics does not settle by ``max_time`` (a limit cycle or a slow mode). Records a warning (through
    ``beyondmf._notes``) when the polish cannot bring r below 1e-8.
    """
    fns = _settle_fns(rhs, project)
    P = fns.project
    size = int(np.prod(np.shape(y0)))
    stable_check = 0 < size <= stability_size
    budget = int(options["max_steps"])

    def residual(y):
        return float(fns.rate(y, args)) / max(1.0, float(jnp.max(jnp.abs(y))))

    y, t, steps, stalled = P(y0), 0.0, 0, 0
    res = residual(y)
    history = [res]
    polished = None  # the polish of the current y, where one was tried
    growth = None  # largest Re λ of the Jacobian at the last accepted fixed point (stability_size)
    while res > 1e-7 and t < max_time and stalled < 2:
        span = first_chunk if (t == 0.0 and first_chunk) else chunk
        _, y, st = solve(rhs, observe, y, args, obs_args, np.array([0.0, span]), options, solver, what=what,
                         project=project)
        t += span
        steps += st["accepted_steps"]
        y = P(y)
        new = residual(y)
        stalled = stalled + 1 if (new > 0.5 * res and new < 1e-4) else 0
        res = new
        history.append(res)
        polished = None
        if (linear and res < 1e-3) or stable_check:
            candidate = _dense_newton(rhs, y, args, tol) if stable_check else P(_newton(fns, y, args, tol))
            if residual(candidate) < 1e-10:
                if not stable_check:
                    return candidate, {"settle_time": t, "settle_steps": steps, "residual_settled": res,
                                       "residual": residual(candidate)}
                growth = _growth_rate(rhs, candidate, args)
                near = float(jnp.max(jnp.abs(candidate - y))) < NEAR_FIXED_POINT
                if growth <= 1e-9 and (res < 1e-3 or near):
                    return candidate, {"settle_time": t, "settle_steps": steps, "residual_settled": res,
                                       "residual": residual(candidate), "stability_growth_rate": growth}
                if growth > 1e-9 and res > 1e-3:
                    raise SolveError(
                        f"{what}: the dynamics had not settled after t = {t:g}/Γ0 (residual {res:.2g}), and "
                        f"the fixed point Newton's method finds from there is unstable (a mode grows at rate "
                        f"{growth:.3g} Γ0): these equations most likely oscillate (a limit cycle or chaos) "
                        "and have no steady state here. Use evolve() to follow the dynamics (a level with "
                        "correlations, e.g. cumulant2 or exact, may settle where this one does not)"
                    )
                if growth <= 1e-9:
                    polished = candidate
        if len(history) > 3 and res > 1e-3 and res > 0.5 * history[-4]:
            raise SolveError(
                f"{what}: the dynamics is not settling (residual {res:.2g} at t = {t:g}/Γ0, "
                f"{history[-4]:.2g} three chunks earlier): a limit cycle, chaos, or a mode slower than "
                f"{chunk:g}/Γ0. Use evolve() to look at the dynamics"
            )
        if steps > budget:
            raise SolveError(
                f"{what}: {steps} accepted steps by t = {t:g}/Γ0 (residual {res:.2g}) exceed the budget "
                f"max_steps = {budget}: the equations are stiff (close emitters force small steps) or settle "
                "slowly. Raise max_steps to wait longer, or use evolve() to look at the dynamics"
            )
    if res > 1e-4:
        raise SolveError(
            f"{what}: the dynamics had not settled after t = {t:g}/Γ0 (residual {res:.2g}); the system may "
            "have a limit cycle or bistability. Use evolve() to look at the dynamics"
        )
    res_before = res
    y = polished if polished is not None else P(_newton(fns, y, args, tol))
    res = residual(y)
    if res > res_before:
        raise SolveError(f"{what}: the Newton polish moved away from the settled state (residual {res:.2g})")
    if res > 1e-8:
        _note(
            f"{what}: the Newton polish stopped at residual {res:.2g} (target {tol:g}); the steady state is "
            "accurate to about this residual divided by the slowest relaxation rate. Lower rtol and atol "
            "to settle closer before the polish"
        )
    info = {"settle_time": t, "settle_steps": steps, "residual_settled": res_before, "residual": res}
    if stable_check:
        info["stability_growth_rate"] = _growth_rate(rhs, y, args)
    return y, info


# A stable fixed point this close (max norm) to the integrated state is taken as its limit even while
# slow modes still move the state (`settle(stability_size=...)`).
NEAR_FIXED_POINT = 0.05

_JAC_COMPILED: dict[Callable, tuple[Callable, Callable]] = {}


def _dense_fns(rhs: Callable) -> tuple[Callable, Callable]:
    """(f(y) flattened, its dense Jacobian), compiled once per right-hand side (small systems only)."""
    fns = _JAC_COMPILED.get(rhs)
    if fns is None:
        def flat(y, a):
            return rhs(0.0, y, a).reshape(-1)

        def jac(y, a):
            return jax.jacfwd(lambda v: flat(v.reshape(y.shape), a))(y.reshape(-1))

        fns = _JAC_COMPILED[rhs] = (jax.jit(flat), jax.jit(jac))
    return fns


def _growth_rate(rhs: Callable, y, args) -> float:
    """The largest real part of the eigenvalues of the dense Jacobian ∂f/∂y at y (small systems only)."""
    _, jac = _dense_fns(rhs)
    return float(np.max(np.linalg.eigvals(np.asarray(jac(y, args))).real))


def _dense_newton(rhs: Callable, y, args, tol: float, iterations: int = 30):
    """Newton's method with the dense Jacobian and step halving on max|f| (small systems): the fixed point
    near y, or the best point reached."""
    f, jac = _dense_fns(rhs)
    shape = y.shape
    v = np.asarray(y, dtype=float).reshape(-1)
    r = np.asarray(f(jnp.asarray(v.reshape(shape)), args))
    size = float(np.max(np.abs(r)))
    for _ in range(iterations):
        if size < tol:
            break
        try:
            d = np.linalg.solve(np.asarray(jac(jnp.asarray(v.reshape(shape)), args)), -r)
        except np.linalg.LinAlgError:
            break
        lam = 1.0
        while lam > 1e-3:
            w = v + lam * d
            rw = np.asarray(f(jnp.asarray(w.reshape(shape)), args))
            if np.all(np.isfinite(rw)) and np.max(np.abs(rw)) < size:
                break
            lam /= 2
        else:
            break
        v, r, size = w, rw, float(np.max(np.abs(rw)))
    return jnp.asarray(v.reshape(shape))


def hermitian_unit_trace(y):
    """The affine projection of a (2, D, D) real/imaginary density matrix onto Hermitian, unit-trace ones."""
    re = 0.5 * (y[0] + y[0].T)
    im = 0.5 * (y[1] - y[1].T)
    d = re.shape[0]
    re = re + (1.0 - jnp.trace(re)) / d * jnp.eye(d)
    return jnp.stack([re, im])


class _SettleFns(NamedTuple):
    project: Callable
    rate: Callable  # (y, args) → max |dy/dt| at P(y)
    newton_step: Callable  # (y, args) → (y after one Newton–GMRES step, max |F| there)
    size: Callable  # (y, args) → max |F(y)|


_SETTLE_COMPILED: dict[tuple, _SettleFns] = {}


def _settle_fns(rhs: Callable, project: Callable | None) -> _SettleFns:
    """The compiled pieces of `settle` for one right-hand side, made once per (rhs, project).

    The model enters only through ``args``, an argument of every function (as in `solve`), so that one
    compilation serves every model of the same shape; closing over ``args`` recompiled them, several
    seconds per `steady` call, on every new cloud.
    """
    key = (rhs, project)
    if key in _SETTLE_COMPILED:
        return _SETTLE_COMPILED[key]
    P = project if project is not None else (lambda y: y)

    def F(y, args):
        # with a projection, f(P(y)) + (y − P(y)): regular where the physical steady state is unique
        r = rhs(0.0, P(y), args)
        return r + (y - P(y)) if project is not None else r

    @jax.jit
    def rate(y, args):
        return jnp.max(jnp.abs(rhs(0.0, P(y), args)))

    @jax.jit
    def size(y, args):
        return jnp.max(jnp.abs(F(y, args)))

    @jax.jit
    def newton_step(y, args):
        shape = y.shape
        fv = lambda v: F(v.reshape(shape), args).reshape(-1)  # noqa: E731
        v = y.reshape(-1)
        jvp = lambda d: jax.jvp(fv, (v,), (d,))[1]  # noqa: E731
        d, _ = jax.scipy.sparse.linalg.gmres(jvp, -fv(v), tol=1e-12, restart=60, maxiter=20)
        new = v + d
        return new.reshape(shape), jnp.max(jnp.abs(fv(new)))

    fns = _SettleFns(jax.jit(P) if project is not None else P, rate, newton_step, size)
    _SETTLE_COMPILED[key] = fns
    return fns


def _newton(fns: _SettleFns, y, args, tol: float, iterations: int = 20):
    """Newton's method on F(y) = 0, with GMRES on the Jacobian-vector product (matrix-free).

    Stops at residual ``tol``, after ``iterations`` steps, or at the first step that does not lower the
    residual (or is not finite, e.g. GMRES breaking down on a singular Jacobian); returns the best point.
    """
    best, best_res = y, float(fns.size(y, args))
    for _ in range(iterations):
        if best_res < tol:
            break
        y, r = fns.newton_step(best, args)
        r = float(r)
        if not np.isfinite(r) or r >= best_res:
            break
        best, best_res = y, r
    return best
