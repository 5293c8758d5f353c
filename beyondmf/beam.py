"""A focused probe: the paraxial Gaussian beam (TEM00) as a drive, and the coherent transmission into it.

The mode (A. E. Siegman, *Lasers*, University Science Books 1986, the chapters on Gaussian beams), in
λ0 with k = 2π, for a beam along l̂ with its focus at r_f, z = l̂·(r − r_f) and ρ the distance from the axis:

    u(r) = (w0/w(z)) exp(−ρ²/w(z)²) exp(i[kz + kρ²/(2R(z)) − ψ(z)])
    w(z) = w0 √(1 + (z/z_R)²),  R(z) = z(1 + (z_R/z)²),  ψ(z) = arctan(z/z_R),  z_R = π w0²   (λ0 = 1)

so u = 1 at the focus and |u|² carries the same power through every plane, ∫|u|² dA = π w0²/2. The drive is
Ω_i = Ω u(r_i): Ω is the Rabi frequency at the focus. The derivation of the transmission is in
docs/transmission.md.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["GaussianBeam", "cross_section", "mode_overlap_factor", "photon_flux", "transmission",
           "transmission_factor"]

K = 2 * np.pi  # the wavenumber in units of 1/λ0


def cross_section() -> float:
    """The resonant scattering cross-section of a two-level emitter, σ0 = 3λ0²/(2π) (Foot, *Atomic Physics*,
    OUP 2005, §7.5; Steck, *Quantum and Atom Optics*), in λ0²."""
    return 3 / (2 * np.pi)


@dataclass(frozen=True)
class GaussianBeam:
    """A paraxial Gaussian beam: waist w0 (λ0) and focus position (λ0); its direction is the model's laser.

    The paraxial mode is accurate for k·w0 ≫ 1; waists below 1 λ0 are refused (the field of a beam focused
    that tightly is not transverse, and the mode overlap of docs/transmission.md no longer holds).
    """

    waist: float
    focus: tuple[float, float, float] = (0.0, 0.0, 0.0)

    def __post_init__(self) -> None:
        try:
            w = float(self.waist)
        except (TypeError, ValueError) as err:
            raise ValueError(f"beam waist must be a number of λ0, got {self.waist!r}") from err
        if not np.isfinite(w) or w < 1.0:
            raise ValueError(
                f"beam waist must be at least 1 λ0, got {self.waist!r}: the paraxial mode (and the "
                "transmission derived from it) needs k·w0 ≫ 1; use a plane wave (no beam) for a cloud much "
                "smaller than the beam")
        f = np.asarray(self.focus, dtype=float).reshape(-1)
        if f.shape != (3,) or not np.all(np.isfinite(f)):
            raise ValueError(f"beam focus must be a finite (x, y, z) position in λ0, got {self.focus!r}")
        object.__setattr__(self, "waist", w)
        object.__setattr__(self, "focus", tuple(float(c) for c in f))

    @property
    def rayleigh_range(self) -> float:
        """z_R = π w0²/λ0, in λ0."""
        return np.pi * self.waist**2

    def mode(self, positions: np.ndarray, direction: np.ndarray) -> np.ndarray:
        """u(r) at (M, 3) positions for a beam along the unit vector ``direction``."""
        d = np.asarray(positions, dtype=float) - np.asarray(self.focus)
        z = d @ direction
        rho2 = np.maximum(np.sum(d * d, axis=-1) - z**2, 0.0)
        zr, w0 = self.rayleigh_range, self.waist
        q = 1 + (z / zr) ** 2
        w2 = w0**2 * q
        inv_r = z / (z**2 + zr**2)  # 1/R(z), finite at the focus
        phase = K * z + 0.5 * K * rho2 * inv_r - np.arctan(z / zr)
        return np.sqrt(1 / q) * np.exp(-rho2 / w2) * np.exp(1j * phase)

    def describe(self) -> dict:
        return {"kind": "gaussian", "waist": self.waist, "focus": list(self.focus)}

    @classmethod
    def parse(cls, beam) -> GaussianBeam | None:
        """None (a plane wave), a GaussianBeam, or a mapping {"waist": w0, "focus": (x, y, z)}."""
        if beam is None or isinstance(beam, GaussianBeam):
            return beam
        if isinstance(beam, dict):
            unknown = set(beam) - {"waist", "focus", "kind"}
            if unknown or "waist" not in beam or beam.get("kind", "gaussian") != "gaussian":
                raise ValueError(f"beam must be {{'waist': w0, 'focus': (x, y, z)}}, got {beam!r}")
            return cls(beam["waist"], beam.get("focus", (0.0, 0.0, 0.0)))
        raise ValueError(f"beam must be None (a plane wave) or a GaussianBeam(waist, focus), got {beam!r}")


def mode_overlap_factor(dipole: np.ndarray, direction: np.ndarray) -> float:
    """|ê_⊥|² = 1 − |ê·l̂|²: the part of the dipole a transverse beam along l̂ drives and collects."""
    return float(1 - abs(np.vdot(direction, dipole)) ** 2)


def transmission(beam: GaussianBeam, model, coherence: np.ndarray, envelope: np.ndarray) -> np.ndarray:
    """The coherent amplitude transmitted into the probe's mode (docs/transmission.md),

        t = 1 − i (6 |ê_⊥|² / (k² w0²)) Σ_i u*(r_i) ⟨σ_i⁻⟩ / (Ω · envelope),

    for coherences of shape (..., N); NaN where the probe is off."""
    u = beam.mode(model.positions, model.laser)
    return 1 + transmission_factor(beam, model, envelope) * (coherence @ np.conj(u))


def transmission_factor(beam: GaussianBeam, model, envelope: np.ndarray) -> np.ndarray:
    """z with t = 1 + z Σ_i u*(r_i)⟨σ_i⁻⟩: z = −i 6|ê_⊥|² / (k² w0² Ω · envelope); NaN where the probe is
    off."""
    c = mode_overlap_factor(model.dipole, model.laser)
    field = np.asarray(model.rabi) * np.asarray(envelope, dtype=complex)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = -1j * 6 * c / (K**2 * beam.waist**2) / field
    return np.where(np.abs(field) > 0, z, np.nan + 0j)


def photon_flux(beam: GaussianBeam, model) -> float:
    """The probe's photon flux in photons per 1/Γ0: Φ = |Ω|² π w0² / (2 σ0 |ê_⊥|²) (one emitter at the
    focus with saturation s = 2|Ω|² sees the intensity s·I_sat, I_sat = ħωΓ0/(2σ0); docs/transmission.md)."""
    c = mode_overlap_factor(model.dipole, model.laser)
    return float(abs(model.rabi) ** 2 * np.pi * beam.waist**2 / (2 * cross_section() * c))
