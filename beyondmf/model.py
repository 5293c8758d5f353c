"""The one model every level solves: emitters, their couplings, and the drive (conventions.md)."""

from __future__ import annotations

import copy
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import jax.numpy as jnp
import numpy as np

from .beam import GaussianBeam, mode_overlap_factor, photon_flux
from .couplings import KINDS, _unit, device_couplings, validate_custom
from .geometry import nearest_distance
from .memory import require

__all__ = ["Model", "Envelope", "MIN_SEPARATION", "ModelInputError"]

# Emitters closer than this (λ0) are refused: |J| ~ (3/4)/(2π r)³ exceeds 10⁶ Γ0 and no level is meaningful.
MIN_SEPARATION = 1e-3


class ModelInputError(ValueError):
    """A refused model input; ``param`` names the argument it is about ("envelope", "positions"), so that a
    caller with its own names for them (a study file's keys) can point at the right one."""

    def __init__(self, message: str, param: str | None = None) -> None:  # a default: it must unpickle
        super().__init__(message)
        self.param = param


@dataclass(frozen=True)
class Envelope:
    """Time dependence of the Rabi frequency, Ω(t) = Ω · envelope(t).

    ``windows`` is a tuple of (t_on, t_off) pairs during which the laser is on (envelope 1, else 0);
    ``function`` is a JAX-traceable callable of time. Neither: the envelope is 1 at all times.
    """

    windows: tuple[tuple[float, float], ...] | None = None
    function: Callable[[Any], Any] | None = None

    @property
    def constant(self) -> bool:
        return self.windows is None and self.function is None

    def __call__(self, t):
        import jax.numpy as jnp

        if self.function is not None:
            return self.function(t)
        if self.windows is None:
            return jnp.ones_like(t)
        on = jnp.zeros_like(t)
        for t0, t1 in self.windows:
            on = on + jnp.where((t >= t0) & (t < t1), 1.0, 0.0)
        return on

    @property
    def jumps(self) -> tuple[float, ...]:
        """Times where the envelope is discontinuous (the integrator steps onto them)."""
        return tuple(sorted({t for w in (self.windows or ()) for t in w}))

    def describe(self) -> str:
        if self.function is not None:
            return f"function {getattr(self.function, '__name__', repr(self.function))}"
        if self.windows is not None:
            return "windows " + ", ".join(f"[{a:g}, {b:g})" for a, b in self.windows)
        return "constant"

    @classmethod
    def parse(cls, envelope) -> Envelope:
        if envelope is None:
            return cls()
        if isinstance(envelope, Envelope):
            return envelope
        if callable(envelope):
            return cls(function=envelope)
        try:
            wins = tuple((float(a), float(b)) for a, b in envelope)
        except (TypeError, ValueError) as err:
            raise ValueError(
                "envelope must be None, a list of (t_on, t_off) windows, or a JAX-traceable function of time"
            ) from err
        for a, b in wins:
            if not (np.isfinite(a) and np.isfinite(b) and b > a):
                raise ModelInputError(f"envelope window ({a}, {b}) must have finite t_on < t_off", "envelope")
        ordered = sorted(wins)
        for (a0, b0), (a1, b1) in zip(ordered, ordered[1:], strict=False):
            if a1 < b0:  # the envelope is 1 or 0: overlapping windows would add up to 2
                raise ModelInputError(
                    f"envelope windows ({a0:g}, {b0:g}) and ({a1:g}, {b1:g}) overlap; the laser is either on "
                    f"or off, so give them as one window ({a0:g}, {max(b0, b1):g})", "envelope"
                )
        return cls(windows=wins)


def _finite_scalar(value, name: str, complex_ok: bool = False):
    kind = "a (complex) number" if complex_ok else "a real number"
    if isinstance(value, str | bytes) or np.ndim(value) != 0:  # float("0") would accept a string
        raise ValueError(f"{name} must be {kind}, got {value!r}")
    try:
        v = complex(value) if complex_ok else float(value)
    except (TypeError, ValueError) as err:
        raise ValueError(f"{name} must be {kind}, got {value!r}") from err
    if not np.isfinite(v):
        raise ValueError(f"{name} must be finite, got {value!r}")
    return v


def _detunings(value, n: int):
    """One detuning (a float) or N of them (a read-only float array; a float again if they are all equal)."""
    if np.ndim(value) == 0:
        return _finite_scalar(value, "detuning")
    try:
        arr = np.array(value, dtype=float)
    except (TypeError, ValueError) as err:
        raise ValueError(
            f"detuning must be a number or an array of N = {n} numbers (Γ0), got {value!r:.80}") from err
    if arr.shape != (n,):
        raise ValueError(f"detuning must be a number or one per emitter, shape ({n},); got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        bad = int(np.argwhere(~np.isfinite(arr))[0, 0])
        raise ValueError(f"detuning has NaN or infinite values (emitter {bad})")
    if np.all(arr == arr[0]):
        return float(arr[0])
    arr.setflags(write=False)
    return arr


@dataclass(frozen=True, eq=False)
class Model:
    """N two-level emitters driven by a laser, in the units of conventions.md.

    H = Σ_i [−Δ_i σ_i⁺σ_i⁻ + ½(Ω_i σ_i⁺ + h.c.)] + Σ_{i≠j} J_ij σ_i⁺σ_j⁻, Ω_i = Ω(t) e^{i2π l̂·r_i} (a plane
    wave) or Ω(t) u(r_i) (a Gaussian beam, beyondmf.beam), with collective decay Γ_ij. Immutable; validated
    once on construction.

    Parameters
    ----------
    positions : (N, 3) positions in λ0.
    dipole : transition dipole unit vector ê (complex allowed; normalised).
    coupling : "vector", "scalar", "all-to-all", or a (J, Gamma) pair of (N, N) arrays.
    rabi : Rabi frequency Ω in Γ0 (complex allowed: a phase of the laser).
    detuning : Δ = ω_laser − ω_atom in Γ0: one number, or an (N,) array Δ_i of static per-emitter detunings
        (inhomogeneous broadening: Doppler shifts frozen during a run, docs/transmission.md).
    laser : propagation direction l̂ (normalised).
    beam : None (a plane wave) or a `GaussianBeam` (waist, focus) along l̂; Ω is then the Rabi frequency at
        the focus and the results carry the probe's transmission.
    envelope : None (constant), a list of (t_on, t_off) windows, or a JAX-traceable function of t.
    """

    positions: np.ndarray
    dipole: Sequence[complex] = (1, 0, 0)
    coupling: Any = "vector"
    rabi: complex = 0.0
    detuning: float = 0.0
    laser: Sequence[float] = (0, 0, 1)
    envelope: Any = None
    beam: Any = None
    J: np.ndarray = field(init=False, repr=False)
    Gamma: np.ndarray = field(init=False, repr=False)
    _device: tuple = field(init=False, repr=False)
    _stiffness: float = field(init=False, repr=False)
    _norm: list = field(init=False, repr=False)

    def __post_init__(self) -> None:
        raw = np.asarray(self.positions)
        if np.iscomplexobj(raw):
            raise ValueError("positions must be real coordinates (λ0), got complex values")
        try:
            pos = np.array(raw, dtype=float)
        except (TypeError, ValueError) as err:
            raise ValueError(
                f"positions must be an (N, 3) array of numbers, got {self.positions!r:.80}") from err
        if pos.ndim == 1 and pos.shape == (3,):
            pos = pos[None, :]
        if pos.ndim != 2 or pos.shape[1] != 3 or len(pos) == 0:
            raise ValueError(f"positions must be an (N, 3) array with N ≥ 1, got shape {pos.shape}")
        if not np.all(np.isfinite(pos)):
            bad = int(np.argwhere(~np.isfinite(pos))[0, 0])
            raise ValueError(f"positions contain NaN or infinite values (emitter {bad})")
        dip = _unit(self.dipole, "dipole")
        las = _unit(self.laser, "laser")
        if np.abs(las.imag).max() > 0:
            raise ValueError("laser must be a real propagation direction")
        las = las.real
        rabi = _finite_scalar(self.rabi, "rabi", complex_ok=True)
        det = _detunings(self.detuning, len(pos))
        env = Envelope.parse(self.envelope)
        beam = GaussianBeam.parse(self.beam)
        if beam is not None and mode_overlap_factor(dip, las) < 1e-6:
            raise ValueError("a beam along the dipole cannot drive it (its field is transverse); turn the "
                             "dipole or the laser direction")

        require(2 * 8 * len(pos) ** 2 * 1.1, f"the couplings of {len(pos)} emitters")
        if isinstance(self.coupling, str):
            if self.coupling not in KINDS:
                raise ValueError(
                    f"unknown coupling {self.coupling!r}; choose one of {', '.join(KINDS)} or pass (J, Gamma)"
                )
            if self.coupling != "all-to-all":
                dmin, (i, j) = nearest_distance(pos)
                if dmin < MIN_SEPARATION:
                    raise ModelInputError(
                        f"emitters {i} and {j} are {dmin:.3g} λ0 apart, closer than {MIN_SEPARATION} λ0: "
                        "the couplings diverge there; place them further apart (a random cloud: draw it with "
                        "a min_distance)", "positions"
                    )
            Jd, Gd = device_couplings(pos, dip, self.coupling)
            kind = self.coupling
        else:
            try:
                Jc, Gc = self.coupling
            except (TypeError, ValueError) as err:
                raise ValueError("coupling must be a kind name or a (J, Gamma) pair of arrays") from err
            Jd, Gd = (jnp.asarray(m) for m in validate_custom(Jc, Gc, len(pos)))
            kind = "custom"
        pos.setflags(write=False)
        # Gershgorin bound, one fused reduction over the device arrays (no N×N temporaries)
        stiff = jnp.max(jnp.sum(jnp.abs(Jd), axis=1) + 0.5 * jnp.sum(jnp.abs(Gd), axis=1))
        set_ = object.__setattr__
        set_(self, "positions", pos)
        set_(self, "dipole", dip)
        set_(self, "laser", las)
        set_(self, "rabi", rabi)
        set_(self, "detuning", det)
        set_(self, "beam", beam)
        set_(self, "envelope", env)
        set_(self, "coupling", kind)
        set_(self, "_device", (Jd, Gd))
        set_(self, "_stiffness", float(stiff))
        set_(self, "_norm", [])  # filled on the first call of coupling_norm()
        # zero-copy read-only NumPy views of the device arrays (on the CPU)
        set_(self, "J", np.asarray(Jd))
        set_(self, "Gamma", np.asarray(Gd))

    def with_drive(self, rabi=None, detuning=None) -> Model:
        """The same emitters and couplings under another Rabi frequency and/or detuning(s), without
        computing the couplings again (a scan over the drive, `beyondmf.drive_scan`)."""
        other = copy.copy(self)
        if rabi is not None:
            object.__setattr__(other, "rabi", _finite_scalar(rabi, "rabi", complex_ok=True))
        if detuning is not None:
            object.__setattr__(other, "detuning", _detunings(detuning, self.n))
        return other

    @property
    def n(self) -> int:
        """Number of emitters N."""
        return len(self.positions)

    @property
    def complex_couplings(self) -> bool:
        return np.iscomplexobj(self.J) or np.iscomplexobj(self.Gamma)

    @property
    def drive_phases(self) -> np.ndarray:
        """e^{i 2π l̂·r_i}: the laser's phase at each emitter."""
        return np.exp(2j * np.pi * self.positions @ self.laser)

    @property
    def drive_profile(self) -> np.ndarray:
        """Ω_i/Ω: e^{i 2π l̂·r_i} for a plane wave, the beam's mode u(r_i) for a Gaussian beam."""
        if self.beam is None:
            return self.drive_phases
        return self.beam.mode(self.positions, self.laser)

    @property
    def rabi_sites(self) -> np.ndarray:
        """Ω_i = Ω e^{i 2π l̂·r_i} or Ω u(r_i) (at envelope 1)."""
        return self.rabi * self.drive_profile

    @property
    def detunings(self) -> np.ndarray:
        """Δ_i of every emitter, an (N,) array (all equal unless the model was given per-emitter ones)."""
        if np.ndim(self.detuning) == 0:
            return np.full(self.n, float(self.detuning))
        return self.detuning

    @property
    def uniform_detuning(self) -> bool:
        return np.ndim(self.detuning) == 0

    @property
    def saturation(self) -> float:
        """Single-emitter saturation parameter s = 2|Ω_i|²/(1 + 4Δ_i²), the largest over the emitters (a
        plane wave: 2|Ω|²/(1 + 4Δ²))."""
        return float(np.max(2 * np.abs(self.rabi_sites) ** 2 / (1 + 4 * self.detunings**2)))

    def stiffness(self) -> float:
        """Gershgorin bound on the coupling rates, max_i Σ_j |J_ij| + |Γ_ij|/2, in Γ0.

        An explicit integrator needs steps of order 1/stiffness; far above the drive and decay scales
        the equations are stiff.
        """
        return self._stiffness

    def coupling_norm(self) -> float:
        """Spectral norm ‖iJ + ½Γ‖₂ of the couplings between distinct emitters, in Γ0 (computed once).

        The fastest rate of the linear coupled-dipole dynamics is at most this, and it is far tighter than
        the Gershgorin bound `stiffness()` in a large random cloud, where the rows' many couplings of mixed
        sign add up in the bound but not in the spectrum (N = 1000 at n·λ0³ ≈ 1: 2.0 against 25.7). It
        is unchanged by the signs ±1 a level's samples put in front of the couplings, so a fixed-step
        integrator can use it for every sample. Dense LAPACK norm up to N = 512, ARPACK (Lanczos on the
        normal matrix, relative tolerance 1e-8) beyond.
        """
        if not self._norm:
            m = 1j * np.asarray(self.J) + 0.5 * np.asarray(self.Gamma)
            m = m - np.diag(np.diag(m))
            if self.n <= 512:
                value = float(np.linalg.norm(m, 2))
            else:
                from scipy.sparse.linalg import svds

                value = float(svds(m, k=1, tol=1e-8, return_singular_vectors=False, random_state=0)[0])
            self._norm.append(value)
        return self._norm[0]

    def device_couplings(self):
        """(J, Γ) as the JAX arrays the levels compute with, held once per model."""
        return self._device

    def parameters(self) -> dict[str, Any]:
        """The model's parameters as plain values, for a results file's attributes."""
        return {
            "N": self.n,
            "coupling": self.coupling,
            "dipole": [complex(c) for c in self.dipole],
            "laser": [float(c) for c in self.laser],
            "rabi": complex(self.rabi),
            "detuning": float(self.detuning) if self.uniform_detuning else [float(d) for d in self.detuning],
            "drive_beam": self.beam.describe() if self.beam is not None else {"kind": "plane wave"},
            **({"probe_photon_flux": photon_flux(self.beam, self)} if self.beam is not None else {}),
            "saturation": self.saturation,
            "envelope": self.envelope.describe(),
            # the exact windows (the description rounds them to 6 digits); empty: constant or a function
            "envelope_windows": [list(w) for w in (self.envelope.windows or ())],
        }
