"""Figures of a results Dataset (matplotlib, Agg backend): emission rate, intensity per detector, set-up.

Each function takes a Dataset as `beyondmf.study.run_study` returns it (a ``level`` dimension; with or
without ``time``) and writes one PNG. Units are those of conventions.md: time in 1/Γ0, rates in photons
per 1/Γ0, intensities per steradian, lengths in λ0.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")  # files only: never open a window, work without a display

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import xarray as xr  # noqa: E402

__all__ = ["plot_emission", "plot_intensity", "plot_geometry", "plot_all"]

_RATE = "emission rate P (photons per 1/Γ0)"
_INTENSITY = "intensity I (photons per 1/Γ0 per sr)"
_TIME = "time t (1/Γ0)"


def _levels(ds: xr.Dataset) -> list[str]:
    return [str(v) for v in ds["level"].values] if "level" in ds.dims else [str(ds.attrs.get("level", ""))]


def _by_level(ds: xr.Dataset, level: str) -> xr.Dataset:
    return ds.sel(level=level) if "level" in ds.dims else ds


def _title(ds: xr.Dataset, what: str) -> str:
    title = ds.attrs.get("title") or ""
    return f"{what} — {title}" if title else what


def _save(fig, path: Path) -> Path:
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def _bars(ax, labels: list[str], groups: list[str], values: np.ndarray, ylabel: str) -> None:
    """Grouped bar chart: one group per label, one bar per entry of ``groups`` (values[label, group])."""
    width = 0.8 / len(groups)
    x = np.arange(len(labels))
    for k, g in enumerate(groups):
        ax.bar(x + (k - (len(groups) - 1) / 2) * width, values[:, k], width, label=g)
    ax.set_xticks(x, labels)
    ax.set_ylabel(ylabel)
    ax.legend(title="level")


def plot_emission(ds: xr.Dataset, path: str | Path) -> Path:
    """Total emission rate P against time, one line per level (a bar per level for a steady state)."""
    levels = _levels(ds)
    fig, ax = plt.subplots(figsize=(6.4, 4.2), layout="constrained")
    if "time" in ds.dims:
        for lv in levels:
            ax.plot(ds["time"], _by_level(ds, lv)["emission_rate"], label=lv)
        ax.set_xlabel(_TIME)
        ax.set_ylabel(_RATE)
        ax.legend(title="level")
    else:
        vals = np.array([[float(_by_level(ds, lv)["emission_rate"]) for lv in levels]])
        _bars(ax, ["steady state"], levels, vals, _RATE)
    ax.set_title(_title(ds, f"Total emission, N = {ds.sizes['atom']}"))
    ax.grid(alpha=0.3)
    return _save(fig, Path(path))


def _angle_label(ds: xr.Dataset, det: str) -> str:
    laser = np.asarray(ds.attrs.get("laser", (0, 0, 1)), dtype=float)
    n = ds["direction"].sel(detector=det).values
    ang = np.degrees(np.arccos(np.clip(n @ laser / np.linalg.norm(laser), -1, 1)))
    return f"{det} ({ang:.0f}° from laser)"


def plot_intensity(ds: xr.Dataset, path: str | Path) -> Path:
    """Far-field intensity per detector: one panel per detector against time, or bars for a steady state.

    Dashed lines show the coherent part |⟨E⟩|² of each level's intensity.
    """
    levels = _levels(ds)
    dets = [str(d) for d in ds["detector"].values]
    if "time" not in ds.dims:
        fig, ax = plt.subplots(figsize=(6.4, 4.2), layout="constrained")
        vals = np.array(
            [[float(_by_level(ds, lv)["intensity"].sel(detector=d)) for lv in levels] for d in dets]
        )
        _bars(ax, [_angle_label(ds, d) for d in dets], levels, vals, _INTENSITY)
        ax.set_title(_title(ds, "Steady-state intensity per detector"))
        ax.grid(alpha=0.3, axis="y")
        return _save(fig, Path(path))
    fig, axes = plt.subplots(
        1, len(dets), figsize=(4.8 * len(dets), 4.2), layout="constrained", squeeze=False
    )
    for ax, d in zip(axes[0], dets, strict=True):
        for k, lv in enumerate(levels):
            sub = _by_level(ds, lv)
            colour = f"C{k}"
            ax.plot(ds["time"], sub["intensity"].sel(detector=d), color=colour, label=f"{lv}: total")
            if "intensity_coherent" in sub:
                ax.plot(ds["time"], sub["intensity_coherent"].sel(detector=d), color=colour, ls="--",
                        label=f"{lv}: coherent part")
        ax.set_title(_angle_label(ds, d))
        ax.set_xlabel(_TIME)
        ax.set_ylabel(_INTENSITY)
        ax.grid(alpha=0.3)
        ax.legend(fontsize="small")
    fig.suptitle(_title(ds, "Far-field intensity per detector"))
    return _save(fig, Path(path))


def plot_geometry(ds: xr.Dataset, path: str | Path) -> Path:
    """The set-up: emitters in three projections (x–y, x–z, y–z), the laser direction and the detectors.

    Arrows start at the cloud's centre; a direction pointing out of (into) a panel is drawn as ⊙ (⊗).
    """
    pos = ds["position"].values
    centre = pos.mean(axis=0)
    extent = float(np.max(np.ptp(pos, axis=0))) or 1.0
    length = 0.45 * extent
    laser = np.asarray(ds.attrs.get("laser", (0, 0, 1)), dtype=float)
    # the laser arrives at the cloud (an arrow ending before the centre); detectors look out from it
    arrows = [("laser", laser, "red", True)]
    colours = ["C0", "C2", "C4", "C1", "C5", "C6", "C8", "C9"]
    arrows += [(f"detector {d}", ds["direction"].sel(detector=d).values, colours[k % len(colours)], False)
               for k, d in enumerate(ds["detector"].values)]
    fig, axes = plt.subplots(1, 3, figsize=(14, 4.8), layout="constrained")
    views = ["x–y projection", "x–z projection", "y–z projection"]
    for ax, (a, b), view in zip(axes, [(0, 1), (0, 2), (1, 2)], views, strict=True):
        depth = 3 - a - b
        ax.scatter(pos[:, a], pos[:, b], s=6, c="0.3", alpha=0.6, label=f"{len(pos)} emitters")
        for name, vec, colour, incoming in arrows:
            u = np.asarray(vec, dtype=float) / np.linalg.norm(vec)
            start = centre - 1.1 * length * u if incoming else centre
            end = centre - 0.15 * length * u if incoming else centre + length * u
            if np.hypot(u[a], u[b]) < 0.05:  # along the viewing axis
                mark = "$\\odot$" if u[depth] > 0 else "$\\otimes$"
                ax.plot(centre[a], centre[b], marker=mark, ms=26 if incoming else 14, color=colour, ls="none",
                        label=f"{name} (out of page)" if u[depth] > 0 else f"{name} (into page)")
            else:
                ax.annotate("", xy=(end[a], end[b]), xytext=(start[a], start[b]),
                            arrowprops=dict(arrowstyle="-|>", color=colour, lw=2, mutation_scale=18))
                ax.plot([], [], color=colour, lw=2, label=name)
        ax.set_xlabel(f"{'xyz'[a]} (λ0)")
        ax.set_ylabel(f"{'xyz'[b]} (λ0)")
        ax.set_aspect("equal", adjustable="datalim")
        ax.set_title(view)
        ax.grid(alpha=0.3)
    axes[-1].legend(loc="upper left", bbox_to_anchor=(1.02, 1.0), fontsize="small")
    dip = ds.attrs.get("dipole")
    dip_txt = ", ".join(f"{complex(c).real:g}" if complex(c).imag == 0 else f"{complex(c):g}" for c in dip) \
        if dip is not None else "?"
    fig.suptitle(_title(ds, f"Set-up: N = {len(pos)}, dipole ê ∝ ({dip_txt})"))
    return _save(fig, Path(path))


def plot_all(ds: xr.Dataset, directory: str | Path) -> list[Path]:
    """Write emission.png, intensity.png and geometry.png into ``directory``; returns their paths."""
    d = Path(directory)
    d.mkdir(parents=True, exist_ok=True)
    return [
        plot_emission(ds, d / "emission.png"),
        plot_intensity(ds, d / "intensity.png"),
        plot_geometry(ds, d / "geometry.png"),
    ]
