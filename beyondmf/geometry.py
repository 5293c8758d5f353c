"""Emitter positions, in units of the transition wavelength λ0.

Random clouds (Gaussian, uniform ellipsoid, uniform box) are drawn from a seed and may keep a minimum
distance between emitters; regular arrays (line, plane, cubic block) take a spacing. `density` reports the
peak and mean density of any set of positions in n·λ0³.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np
from scipy.spatial import cKDTree

__all__ = [
    "gaussian_cloud",
    "ellipsoid_cloud",
    "box_cloud",
    "line_array",
    "plane_array",
    "block_array",
    "density",
    "nearest_distance",
    "axis_frame",
    "detector_direction",
]

# Random sequential addition jams near a packing fraction of 0.38 (J. Feder, J. Theor. Biol. 87, 237
# (1980), from memory); refuse requests well before it, where redrawing stops converging.
_MAX_PACKING = 0.2


def _triple(value: float | Sequence[float], name: str) -> np.ndarray:
    try:
        arr = np.broadcast_to(np.asarray(value, dtype=float), (3,)).copy()
    except (TypeError, ValueError) as err:
        raise ValueError(f"{name} must be one length or three (x, y, z) in λ0, got {value!r}") from err
    if not np.all(np.isfinite(arr)) or np.any(arr <= 0):
        raise ValueError(f"{name} must be three positive finite lengths in λ0, got {value!r}")
    return arr


def _check_count(n: int) -> int:
    if int(n) != n or n < 1:
        raise ValueError(f"the number of emitters must be a positive integer, got {n!r}")
    return int(n)


def _draw_with_exclusion(
    draw: Callable[[np.random.Generator, int], np.ndarray],
    n: int,
    volume: float,
    min_distance: float,
    seed: int | None,
    what: str,
) -> np.ndarray:
    """Draw n points with `draw`, redrawing one member of every pair closer than min_distance."""
    if min_distance < 0 or not np.isfinite(min_distance):
        raise ValueError(f"min_distance must be a non-negative length in λ0, got {min_distance!r}")
    packing = n * (np.pi / 6) * min_distance**3 / volume
    if packing > _MAX_PACKING:
        raise ValueError(
            f"{n} emitters with min_distance={min_distance} λ0 do not fit in the {what} "
            f"(packing fraction {packing:.2f} > {_MAX_PACKING}): lower n or min_distance, or enlarge it"
        )
    rng = np.random.default_rng(seed)
    pts = draw(rng, n)
    if min_distance == 0:
        return pts
    for _ in range(500):
        pairs = cKDTree(pts).query_pairs(min_distance, output_type="ndarray")
        if len(pairs) == 0:
            return pts
        redo = np.unique(pairs[:, 1])
        pts[redo] = draw(rng, len(redo))
    raise ValueError(
        f"could not place {n} emitters {min_distance} λ0 apart in the {what} after 500 redraws: "
        "lower n or min_distance, or enlarge the cloud"
    )


def gaussian_cloud(
    n: int,
    widths: float | Sequence[float],
    seed: int | None = None,
    min_distance: float = 0.0,
) -> np.ndarray:
    """Gaussian cloud with standard deviations ``widths`` (λ0) along x, y, z, centred on the origin.

    A pair closer than ``min_distance`` has one member redrawn until no such pair remains, so the
    cloud is a hard-core Gaussian. Returns an (n, 3) array.
    """
    n = _check_count(n)
    sig = _triple(widths, "widths")
    # the volume holding most of the emitters, for the packing check: (2π)^{3/2} σx σy σz
    vol = (2 * np.pi) ** 1.5 * np.prod(sig)
    return _draw_with_exclusion(
        lambda rng, m: rng.normal(size=(m, 3)) * sig, n, vol, min_distance, seed, "Gaussian cloud"
    )


def ellipsoid_cloud(
    n: int,
    semi_axes: float | Sequence[float],
    seed: int | None = None,
    min_distance: float = 0.0,
) -> np.ndarray:
    """Uniform filled ellipsoid with semi-axes ``semi_axes`` (λ0). Returns an (n, 3) array."""
    n = _check_count(n)
    ax = _triple(semi_axes, "semi_axes")

    def draw(rng: np.random.Generator, m: int) -> np.ndarray:
        v = rng.normal(size=(m, 3))
        v /= np.linalg.norm(v, axis=1, keepdims=True)
        return v * rng.random((m, 1)) ** (1 / 3) * ax

    return _draw_with_exclusion(draw, n, 4 / 3 * np.pi * np.prod(ax), min_distance, seed, "ellipsoid")


def box_cloud(
    n: int,
    sides: float | Sequence[float],
    seed: int | None = None,
    min_distance: float = 0.0,
) -> np.ndarray:
    """Uniform box with edge lengths ``sides`` (λ0), centred on the origin. Returns an (n, 3) array."""
    n = _check_count(n)
    sd = _triple(sides, "sides")
    return _draw_with_exclusion(
        lambda rng, m: (rng.random((m, 3)) - 0.5) * sd, n, np.prod(sd), min_distance, seed, "box"
    )


def _lattice(counts: Sequence[int], spacing: float) -> np.ndarray:
    if not np.isfinite(spacing) or spacing <= 0:
        raise ValueError(f"spacing must be a positive length in λ0, got {spacing!r}")
    for c in counts:
        _check_count(c)
    axes = [(np.arange(c) - (c - 1) / 2) * spacing for c in counts]
    grid = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, len(counts))
    out = np.zeros((grid.shape[0], 3))
    out[:, : len(counts)] = grid
    return out


def line_array(n: int, spacing: float, axis: str = "x") -> np.ndarray:
    """n emitters on a line along ``axis`` ('x', 'y' or 'z'), ``spacing`` λ0 apart, centred on the origin."""
    if axis not in ("x", "y", "z"):
        raise ValueError(f"axis must be 'x', 'y' or 'z', got {axis!r}")
    pts = _lattice([n], spacing)
    return np.roll(pts, "xyz".index(axis), axis=1)


def plane_array(nx: int, ny: int, spacing: float) -> np.ndarray:
    """A rectangular nx × ny array in the z = 0 plane, centred on the origin."""
    return _lattice([nx, ny], spacing)


def block_array(nx: int, ny: int, nz: int, spacing: float) -> np.ndarray:
    """A cubic-lattice block of nx × ny × nz emitters, centred on the origin."""
    return _lattice([nx, ny, nz], spacing)


def nearest_distance(positions: np.ndarray) -> tuple[float, tuple[int, int]]:
    """The smallest distance between two emitters (λ0) and the pair (i, j) that has it."""
    pos = np.asarray(positions, dtype=float)
    if len(pos) < 2:
        return float("inf"), (0, 0)
    d, idx = cKDTree(pos).query(pos, k=2)
    i = int(np.argmin(d[:, 1]))
    # for coincident points the two nearest (both at distance 0) may come in either order
    j = int(idx[i, 1]) if idx[i, 1] != i else int(idx[i, 0])
    return float(d[i, 1]), (min(i, j), max(i, j))


def density(positions: np.ndarray, neighbours: int = 10) -> dict[str, float]:
    """Peak and mean density n·λ0³ of a set of positions.

    The local density at emitter i is k / ((4π/3) r_k³), with r_k the distance to its k-th neighbour
    (k = ``neighbours``, the standard k-nearest-neighbour estimate; common practice). ``peak`` is the
    largest local density, ``mean`` the average over emitters (the density an emitter sees). Both are
    noisy estimates, ~1/√k; for a Gaussian cloud the exact values are N/((2π)^{3/2} σxσyσz) and
    2^{-3/2} of that.
    """
    pos = np.asarray(positions, dtype=float)
    n = len(pos)
    if n < 2:
        raise ValueError("density needs at least two emitters")
    k = min(neighbours, n - 1)
    d, _ = cKDTree(pos).query(pos, k=k + 1)
    local = k / (4 / 3 * np.pi * d[:, k] ** 3)
    return {"peak": float(local.max()), "mean": float(local.mean())}


def axis_frame(axis) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(â, ê1, ê2): ``axis`` normalised and two unit vectors completing a right-handed frame, ê1 the
    reference axis x̂ (ŷ when |â_x| ≥ 0.9) made perpendicular to â, ê2 = â × ê1."""
    a = np.asarray(axis, dtype=float)
    a = a / np.linalg.norm(a)
    ref = np.array([1.0, 0.0, 0.0]) if abs(a[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
    e1 = ref - (ref @ a) * a
    e1 /= np.linalg.norm(e1)
    return a, e1, np.cross(a, e1)


def detector_direction(laser, angle_deg: float, azimuth_deg: float = 0.0) -> np.ndarray:
    """The unit vector at ``angle_deg`` from the laser direction, turned ``azimuth_deg`` about it.

    Azimuth 0 lies in the plane of the laser and the reference axis x̂ (ŷ when |l̂_x| ≥ 0.9, a laser
    along or near x); with ê1 that axis made perpendicular to l̂, azimuth 90° points along l̂ × ê1
    (ŷ for a laser along z, ẑ for a laser along x, −ẑ for a laser along y).
    """
    l_hat, e1, e2 = axis_frame(laser)
    th, ph = np.radians(angle_deg), np.radians(azimuth_deg)
    return np.cos(th) * l_hat + np.sin(th) * (np.cos(ph) * e1 + np.sin(ph) * e2)
