"""Light collected by a lens: the far-field power inside a cone of given numerical aperture.

A lens of numerical aperture NA (in vacuum) looking along n̂0 collects the directions within the half angle
α = arcsin NA of n̂0. The power it receives is the far-field intensity of the data contract integrated over
that cone,

    P_lens = ∫_cone I(n̂) dΩ,     I(n̂) = (3/8π)(1 − |ê·n̂|²) ⟨E†(n̂)E(n̂)⟩,

in photons per 1/Γ0, and likewise its coherent part (|⟨E⟩|² in place of ⟨E†E⟩) and incoherent part (the
difference). Over the whole sphere (α = π) the integral is the total emission rate Σ Γ_ij ⟨σ_i⁺σ_j⁻⟩,
because ∫ (3/8π)(1 − |ê·n̂|²) e^{i2π n̂·(r_i − r_j)} dΩ = Γ_ij (conventions.md); the tests use this.

The integral is a quadrature over directions, so every level computes it from the same far-field moments
it reports for detectors: Gauss–Legendre in the polar angle θ about n̂0 (with the sin θ of the solid angle)
and the trapezoidal rule in the azimuth (spectrally accurate for a periodic integrand). The integrand
oscillates as e^{i2π n̂·(r_i − r_j)}: over the cone its phase changes by at most 2π·D·α in θ and 2π·D·sin α
per radian of azimuth, D the cloud's diameter in λ0, and the node counts follow from that
(`node_counts`; ``resolution`` multiplies them). docs/transmission.md has the derivation and the measured
accuracy. Every node is one more far-field direction for the level, with its ⟨E†E⟩ and ⟨E†E†EE⟩: a lens costs
as much as its nodes' count of detectors (`lens_nodes` in the result's attributes).
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["Lens", "lenses_of", "cone_nodes"]

_KEYS = ("toward", "angle", "azimuth", "na", "half_angle", "resolution")


@dataclass(frozen=True)
class Lens:
    """One lens: its axis n̂0 (unit vector), the cone's half angle α (radians) and the quadrature's
    resolution factor (1 by default; 2 doubles the nodes along both angles)."""

    name: str
    axis: np.ndarray
    half_angle: float
    resolution: float = 1.0

    @property
    def na(self) -> float:
        return math.sin(min(self.half_angle, math.pi / 2))


def _number(spec, key, name):
    v = spec[key]
    if not isinstance(v, numbers.Real) or isinstance(v, bool) or not math.isfinite(v):
        raise ValueError(f"lens {name!r}: {key} must be a finite number, got {v!r}")
    return float(v)


def lenses_of(lenses: Mapping[str, Any] | None, laser) -> tuple[Lens, ...]:
    """The lenses of ``lenses``: name → table with the axis as ``toward`` (x, y, z) or ``angle`` (degrees
    from the laser, 0–180) and optional ``azimuth`` (degrees about it, as for detectors), and the cone as
    ``na`` (0 < NA ≤ 1) or ``half_angle`` (degrees, 0 < α ≤ 180; beyond 90 a cone no lens has, e.g. 180
    for the whole sphere); optional ``resolution`` (≥ 1) multiplies the quadrature nodes."""
    from .geometry import detector_direction

    if lenses is None:
        return ()
    if not isinstance(lenses, Mapping):
        raise ValueError("lenses must map a name to a table, e.g. {'front': {'angle': 0, 'na': 0.5}}")
    out = []
    for name, spec in lenses.items():
        name = str(name)
        usage = ("a table with the axis ('toward': (x, y, z), or 'angle' in degrees from the laser and "
                 "optionally 'azimuth') and the cone ('na' between 0 and 1, or 'half_angle' in degrees)")
        if not isinstance(spec, Mapping):
            raise ValueError(f"lens {name!r} needs {usage}; got {spec!r}")
        extra = sorted(set(spec) - set(_KEYS))
        if extra:
            raise ValueError(f"lens {name!r}: unknown key(s) {', '.join(map(repr, extra))}; it takes "
                             f"{', '.join(_KEYS)}")
        if ("toward" in spec) == ("angle" in spec) or ("toward" in spec and "azimuth" in spec):
            raise ValueError(f"lens {name!r}: give its axis once, as 'toward' or as 'angle' (with "
                             f"'azimuth'); got {dict(spec)!r}")
        if "toward" in spec:
            try:
                v = np.asarray(spec["toward"], dtype=float).reshape(-1)
            except (TypeError, ValueError):
                v = np.zeros(0)
            if v.shape != (3,) or not np.all(np.isfinite(v)) or not np.linalg.norm(v) > 0:
                raise ValueError(f"lens {name!r}: toward must be a non-zero finite (x, y, z), "
                                 f"got {spec['toward']!r}")
            axis = v / np.linalg.norm(v)
        else:
            angle = _number(spec, "angle", name)
            azimuth = _number(spec, "azimuth", name) if "azimuth" in spec else 0.0
            if not 0 <= angle <= 180:
                raise ValueError(f"lens {name!r}: angle must be 0 to 180 degrees from the laser, got {angle}")
            axis = detector_direction(laser, angle, azimuth)
        if ("na" in spec) == ("half_angle" in spec):
            raise ValueError(f"lens {name!r}: give its cone once, as 'na' (0 < NA ≤ 1) or 'half_angle' "
                             f"(degrees); got {dict(spec)!r}")
        if "na" in spec:
            na = _number(spec, "na", name)
            if not 0 < na <= 1:
                raise ValueError(f"lens {name!r}: na must be in (0, 1] (a lens in vacuum), got {na}")
            alpha = math.asin(na)
        else:
            deg = _number(spec, "half_angle", name)
            if not 0 < deg <= 180:
                raise ValueError(f"lens {name!r}: half_angle must be in (0, 180] degrees, got {deg}")
            alpha = math.radians(deg)
        res = _number(spec, "resolution", name) if "resolution" in spec else 1.0
        if not 1 <= res <= 16:
            raise ValueError(f"lens {name!r}: resolution must be between 1 and 16, got {res}")
        out.append(Lens(name, axis, alpha, res))
    if len({lens.name for lens in out}) != len(out):
        raise ValueError("lens names must differ")
    return tuple(out)


def cloud_diameter(positions: np.ndarray) -> float:
    """An upper bound of the largest distance between two emitters (twice the largest distance from the
    centroid), λ0."""
    pos = np.asarray(positions, dtype=float)
    if len(pos) < 2:
        return 0.0
    return 2.0 * float(np.max(np.linalg.norm(pos - pos.mean(axis=0), axis=1)))


def node_counts(diameter: float, half_angle: float, resolution: float = 1.0) -> tuple[int, int]:
    """(polar, azimuthal) quadrature nodes for a cloud of ``diameter`` λ0 and a cone of ``half_angle``.

    f·π·D·α + 8 polar nodes and 2⌈f·2π·D·sin α + 4⌉ + 1 azimuthal ones, D the diameter. Measured on the
    whole sphere of Gaussian clouds of 60 emitters (D = 3.3 and 9.7 λ0, mean field) against the emission
    rate: f = 0.25 errs by 5e-3 and 2e-4, f = 0.5 by 2e-6 and 5e-9, f = 0.75 by 1e-12; f = 0.6 here, times
    ``resolution``."""
    fac = 0.6 * resolution
    n_theta = math.ceil(fac * math.pi * diameter * half_angle + 8 * resolution)
    widest = math.sin(min(half_angle, math.pi / 2))
    n_phi = 2 * math.ceil(fac * 2 * math.pi * diameter * widest + 4 * resolution) + 1
    return n_theta, n_phi


def cone_nodes(axis, half_angle: float, diameter: float,
               resolution: float = 1.0) -> tuple[np.ndarray, np.ndarray]:
    """Directions (K, 3) and solid-angle weights (K,) of the quadrature over the cone about ``axis``;
    the weights add up to the cone's solid angle 2π(1 − cos α)."""
    n_theta, n_phi = node_counts(diameter, half_angle, resolution)
    x, w = np.polynomial.legendre.leggauss(n_theta)
    theta = 0.5 * half_angle * (x + 1)
    w_theta = 0.5 * half_angle * w * np.sin(theta)
    phi = 2 * np.pi * np.arange(n_phi) / n_phi
    from .geometry import axis_frame

    a, e1, e2 = axis_frame(axis)
    st, ct = np.sin(theta)[:, None], np.cos(theta)[:, None]
    around = np.cos(phi)[None, :, None] * e1 + np.sin(phi)[None, :, None] * e2
    dirs = ct[..., None] * a + st[..., None] * around
    weights = w_theta[:, None] * np.full(n_phi, 2 * np.pi / n_phi)[None, :]
    return dirs.reshape(-1, 3), weights.reshape(-1)
