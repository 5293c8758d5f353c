"""Two-time photon statistics: g1(τ), g2(τ) and the spectrum of the emitted light (docs/correlations.md).

    correlations(model, level, delays, detectors=None, at=None, frequencies=None, initial=None, **options)

Conventions (E_d = Σ_j e^{−i2π n̂_d·r_j} σ_j⁻, the field of the data contract; t the reference time, the
steady state unless ``at`` is given):

    g1_d(τ) = ⟨E_d†(t) E_d(t+τ)⟩ / √(⟨E_d†E_d⟩(t) ⟨E_d†E_d⟩(t+τ))            (complex; g1(0) = 1)
    g2_d(τ) = ⟨E_d†(t) E_d†(t+τ) E_d(t+τ) E_d(t)⟩ / (⟨E_d†E_d⟩(t) ⟨E_d†E_d⟩(t+τ))
    g2_total(τ) = Σ Γ_ij Γ_kl ⟨σ_i⁺(t) σ_k⁺(t+τ) σ_l⁻(t+τ) σ_j⁻(t)⟩ / (P(t) P(t+τ))

In a steady state the denominators are ⟨E†E⟩² and P², so g2(0) is the equal-time g2 of `steady`. The
spectrum is that of the light towards each detector, at the frequency ν = ω − ω_laser (Γ0) of the emitted
light relative to the laser, split as the data contract splits the intensity:

    I_d = intensity_coherent_d + ∫ spectrum_d(ν) dν,   intensity_coherent_d = elastic_fraction_d · I_d,

with spectrum_d(ν) = (3/8π)(1 − |ê·n̂_d|²) (1/π) Re ∫_0^∞ e^{iντ} [G1_d(τ) − |⟨E_d⟩|²] dτ the inelastic
part (photons per 1/Γ0 per steradian per unit of ν in Γ0) and the elastic part a line of weight
intensity_coherent at ν = 0.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import xarray as xr

from ._notes import collecting
from .api import _check_model, _detectors, _with_inputs, initial_bloch
from .integrate import check_ode_options
from .levels.base import OptionError, Probes, get_level, is_count, is_real_number
from .model import Model
from .observables import detector_prefactor
from .results import provenance
from .twotime import TwoTime

__all__ = ["correlations", "supported_levels", "REFUSED"]

# Levels with no two-time functions, and why (each is refused with this reason).
_HAVE = "exact, dicke (symmetric models) and cumulant2"
REFUSED = {
    "twa": (
        "truncated Wigner samples have no two-time estimator supported by a published derivation for "
        "these driven, dissipative spins and calibrated here (the sampled products at two times are "
        "symmetrically ordered, not the normally and time-ordered products of g1 and g2)"
    ),
    "qsd_product": (
        "product-state diffusion trajectories are unravellings restricted to product states; no published "
        "derivation gives two-time correlations from them, and the calibration of this package does not "
        "cover them"
    ),
    "jumps": (
        "the two-time method for quantum-jump trajectories (J. Dalibard, Y. Castin, K. Mølmer, Phys. Rev. "
        "Lett. 68, 580 (1992)) is not implemented here"
    ),
}


def _modules() -> dict[str, Any]:
    from .twotime import cumulant2, dicke, exact, meanfield

    return {"exact": exact, "dicke": dicke, "cumulant2": cumulant2, "meanfield": meanfield}


def supported_levels() -> dict[str, str]:
    """Levels with two-time functions, with what each gives."""
    return {name: mod.SUPPORT for name, mod in _modules().items()}


def _module(level: str):
    if not isinstance(level, str):
        raise ValueError(f"level must be a level name, got {level!r}")
    mods = _modules()
    if level in mods:
        return mods[level]
    get_level(level)  # raises for an unknown name, listing the known ones
    if level in REFUSED:
        raise ValueError(f"level {level!r} has no two-time correlations: {REFUSED[level]}. Levels with "
                         f"g1(τ), g2(τ) and the spectrum: {_HAVE}")
    raise ValueError(f"level {level!r} has no two-time correlations; levels with them: {_HAVE}")


def _check_options(mod, level: str, given: dict[str, Any]) -> dict[str, Any]:
    unknown = sorted(set(given) - set(mod.OPTIONS))
    if unknown:
        allowed = ", ".join(sorted(mod.OPTIONS)) or "none"
        raise ValueError(f"correlations at level {level!r} take no option {', '.join(map(repr, unknown))}; "
                         f"its options: {allowed}")
    opts = {**mod.OPTIONS, **given}
    check_ode_options(opts, mod.OPTIONS)
    if "spectrum_tol" in opts and not (is_real_number(opts["spectrum_tol"]) and 0 < opts["spectrum_tol"] < 1):
        raise OptionError("spectrum_tol", f"must be a number in (0, 1), got {opts['spectrum_tol']!r}")
    if "krylov_max" in opts and not is_count(opts["krylov_max"], 1):
        raise OptionError("krylov_max", f"must be a positive integer, got {opts['krylov_max']!r}")
    return opts


def _delays(delays) -> np.ndarray | None:
    if delays is None:
        return None
    if isinstance(delays, str) or np.ndim(delays) != 1:
        raise ValueError(f"delays must be a 1-D sequence of delays τ ≥ 0 (1/Γ0), e.g. numpy.linspace(0, 10, "
                         f"101), or None; got {delays!r}")
    try:
        d = np.asarray(delays, dtype=float)
    except (TypeError, ValueError):
        raise ValueError(f"delays must be numbers (1/Γ0), got {delays!r}") from None
    if d.size == 0 or not np.all(np.isfinite(d)):
        raise ValueError("delays must be a non-empty sequence of finite delays (1/Γ0)")
    if d[0] < 0:
        raise ValueError(f"delays must be ≥ 0 (τ ≥ 0; g(−τ) follows from g(τ)* in a steady state), got "
                         f"{d[0]:g}")
    if np.any(np.diff(d) <= 0):
        i = int(np.argmax(np.diff(d) <= 0))
        raise ValueError(f"delays must be strictly increasing; delay {i + 1} ({d[i + 1]:g}) does not follow "
                         f"delay {i} ({d[i]:g})")
    return d


def _frequencies(frequencies) -> np.ndarray | None:
    if frequencies is None:
        return None
    if isinstance(frequencies, str) or np.ndim(frequencies) != 1:
        raise ValueError(f"frequencies must be a 1-D sequence of ν = ω − ω_laser (Γ0), e.g. "
                         f"numpy.linspace(-5, 5, 401), or None; got {frequencies!r}")
    try:
        f = np.asarray(frequencies, dtype=float)
    except (TypeError, ValueError):
        raise ValueError(f"frequencies must be numbers (Γ0), got {frequencies!r}") from None
    if f.size == 0 or not np.all(np.isfinite(f)):
        raise ValueError("frequencies must be a non-empty sequence of finite frequencies (Γ0)")
    if np.any(np.diff(f) <= 0):
        raise ValueError("frequencies must be strictly increasing")
    return f


def correlations(
    model: Model,
    level: str,
    delays,
    detectors: Mapping[str, Any] | None = None,
    at: float | None = None,
    frequencies=None,
    initial=None,
    **options,
) -> xr.Dataset:
    """Two-time photon statistics of ``model`` at one level (module docstring for the definitions).

    Parameters
    ----------
    model : the emitters, couplings and drive.
    level : "exact", "dicke" or "cumulant2" (g1, g2, g2_total, spectrum); "meanfield" gives only the
        elastic part (``delays=None``, no ``frequencies``); twa, qsd_product and jumps are refused with
        the reason (`REFUSED`).
    delays : increasing delays τ ≥ 0 (1/Γ0), or None for no time axis (spectrum or elastic part only).
    detectors : name → direction, as in `evolve`; default "forward" along the laser.
    at : None (the steady state, constant drive) or a time t ≥ 0 (1/Γ0): the two-time functions at
        reference time t of the dynamics from ``initial`` at time 0 (the drive may then vary in time).
    frequencies : increasing ν = ω − ω_laser (Γ0) at which to give the inelastic spectrum (steady state
        only), or None.
    initial : the state at time 0 for ``at`` (as in `evolve`; default "ground"); only with ``at``.
    options : ODE options of the regression (as the level's), ``spectrum_tol`` (relative residual of the
        resolvent at every frequency, default 1e-9) and ``krylov_max`` (largest Krylov space, 3000).

    Returns
    -------
    xarray.Dataset with ``g1``, ``g2`` (detector, delay), ``g2_total`` (delay), ``intensity_delayed``
    (detector, delay) where delays are given; ``spectrum`` (detector, frequency) where frequencies are;
    always ``intensity``, ``intensity_coherent``, ``elastic_fraction`` (detector) and ``emission_rate``
    at the reference time. Attributes as `evolve`'s (level, model, options, provenance, warnings) and
    ``calculation = "correlations"``.
    """
    _check_model(model)
    mod = _module(level)
    opts = _check_options(mod, level, options)
    d = _delays(delays)
    f = _frequencies(frequencies)
    if at is not None:
        if not (is_real_number(at) and at >= 0):
            raise ValueError(f"at must be None (the steady state) or a time ≥ 0 (1/Γ0), got {at!r}")
        if f is not None:
            raise ValueError("frequencies need the steady state: a spectrum is defined for stationary light. "
                             "Drop at (steady state under the constant drive) or drop frequencies")
        bloch = initial_bloch(model, "ground" if initial is None else initial)
    else:
        if initial is not None:
            raise ValueError("initial is used only with at (the two-time functions at time at of the "
                             "dynamics from initial); the steady state does not depend on it")
        if not model.envelope.constant:
            raise ValueError("the steady state needs a constant drive: build the model with envelope=None, "
                             "or give at (a reference time of the dynamics)")
        bloch = None
    probes = Probes.build(model, _detectors(model, detectors))
    mod.check(model, probes, d, f, at)
    with collecting() as said:
        tt = mod.compute(model, probes, d, None if at is None else float(at), bloch, f, opts).to_numpy()
    attrs = {"level": level, "calculation": "correlations", **model.parameters(), "options": opts, "seed": -1,
             "reference_time": "steady state" if at is None else float(at),
             "initial": "steady state" if at is None else (initial if isinstance(initial, str) else
                                                           "ground" if initial is None else "bloch vectors"),
             "warnings": said, **tt.attrs, **provenance()}
    ds = _assemble(model, probes, d, f, tt, attrs)
    if at is not None and not isinstance(initial, str | None):
        ds["initial_bloch"] = (("emitter", "axis"), bloch,
                               {"units": "1", "long_name": "initial Bloch vectors (⟨σ^x⟩, ⟨σ^y⟩, ⟨σ^z⟩)"})
    return _with_inputs(model, ds)


_UNITS = {
    "g1": ("1", "first-order coherence g1(τ) = ⟨E†(t)E(t+τ)⟩/√(⟨E†E⟩(t)⟨E†E⟩(t+τ))"),
    "g2": ("1", "second-order coherence g2(τ) per detector"),
    "g2_total": ("1", "second-order coherence g2(τ) of all emitted light"),
    "intensity_delayed": ("photons per 1/Γ0 per steradian", "far-field intensity I(n̂) at t + τ"),
    "spectrum": ("photons per 1/Γ0 per steradian per Γ0",
                 "inelastic spectrum at ν = ω − ω_laser (∫ dν = intensity_incoherent)"),
    "elastic_fraction": ("1", "elastic (coherent) weight |⟨E⟩|²/⟨E†E⟩ of the light towards the detector"),
    "intensity": ("photons per 1/Γ0 per steradian", "far-field intensity I(n̂) at the reference time"),
    "intensity_coherent": ("photons per 1/Γ0 per steradian", "coherent (elastic) part of I(n̂)"),
    "emission_rate": ("photons per 1/Γ0", "total emission rate P at the reference time"),
}


def _assemble(model: Model, probes: Probes, delays, freqs, tt: TwoTime, attrs) -> xr.Dataset:
    pref = detector_prefactor(model, probes)
    coherent = np.abs(tt.field1) ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        data = {
            "intensity": (("detector",), pref * tt.field2),
            "intensity_coherent": (("detector",), pref * coherent),
            "elastic_fraction": (("detector",), coherent / tt.field2),
            "emission_rate": ((), tt.rate),
        }
        if delays is not None:
            data["g1"] = (("detector", "delay"), (tt.G1 / np.sqrt(tt.field2 * tt.field2_tau)).T)
            if tt.G2 is not None:
                data["g2"] = (("detector", "delay"), (tt.G2 / (tt.field2 * tt.field2_tau)).T)
            if tt.G2_total is not None:
                data["g2_total"] = (("delay",), tt.G2_total / (tt.rate * tt.rate_tau))
            data["intensity_delayed"] = (("detector", "delay"), (pref * tt.field2_tau).T)
        if freqs is not None:
            data["spectrum"] = (("detector", "frequency"), (pref * tt.inelastic).T)
    coords = {
        "emitter": np.arange(model.n), "detector": list(probes.names), "axis": ["x", "y", "z"],
        "position": (("emitter", "axis"), model.positions),
        "direction": (("detector", "axis"), probes.directions),
    }
    if delays is not None:
        coords["delay"] = delays
    if freqs is not None:
        coords["frequency"] = freqs
    ds = xr.Dataset(data, coords=coords)
    for name, (unit, long) in _UNITS.items():
        if name in ds:
            ds[name].attrs.update(units=unit, long_name=long)
    if delays is not None:
        ds["delay"].attrs.update(units="1/Γ0", long_name="delay τ")
    if freqs is not None:
        ds["frequency"].attrs.update(units="Γ0", long_name="frequency ν = ω − ω_laser of the emitted light")
    ds["position"].attrs.update(units="λ0", long_name="emitter positions")
    ds["direction"].attrs.update(units="1", long_name="detector directions (unit vectors)")
    ds.attrs.update(attrs)
    return ds
