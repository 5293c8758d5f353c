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
from matplotlib.patches import Patch  # noqa: E402

__all__ = ["plot_emission", "plot_intensity", "plot_g2", "plot_geometry", "plot_all", "study_title"]

_RATE = "emission rate P (photons per 1/Γ0)"
_INTENSITY = "intensity I (photons per 1/Γ0 per sr)"
_TIME = "time t (1/Γ0)"
_INTENSITIES = ("intensity", "intensity_incoherent")


def _levels(ds: xr.Dataset) -> list[str]:
    return [str(v) for v in ds["level"].values] if "level" in ds.dims else [str(ds.attrs.get("level", ""))]


def _by_level(ds: xr.Dataset, level: str) -> xr.Dataset:
    return ds.sel(level=level) if "level" in ds.dims else ds


def study_title(ds: xr.Dataset) -> str:
    """The study's title, and "(quick mode)" for a run with the study's [quick] overrides."""
    return (ds.attrs.get("title") or "") + (" (quick mode)" if ds.attrs.get("quick") else "")


def _title(ds: xr.Dataset, what: str) -> str:
    """The figure's title: what it shows, then the study's title (and whether it ran with --quick)."""
    title = study_title(ds).strip()
    return f"{what}\n{title}" if title else what


def _stderr(sub: xr.Dataset, name: str) -> xr.DataArray | None:
    """The standard error a sampling level reports for ``name``; None for deterministic levels."""
    err = sub.get(f"{name}_stderr")
    return None if err is None or not bool((err > 0).any()) else err


_BAND = "shaded: ±1 standard error of the sampling levels"


def _level_attrs(ds: xr.Dataset, level: str) -> dict:
    """The attributes of one level's run: per level in a study's result, the Dataset's own otherwise."""
    return ds.attrs.get("levels", {}).get(level, ds.attrs)


def _mark_unphysical(ax, ds: xr.Dataset, levels: list[str], names: tuple[str, ...]) -> None:
    """Shade the region below zero and name, in the panel, each level whose ``names`` left the physical
    bounds (`beyondmf.physicality`), so that a figure never shows such values without saying so."""
    bad = [(lv, [n for n in _level_attrs(ds, lv).get("unphysical", []) if n in names]) for lv in levels]
    bad = [(lv, ns) for lv, ns in bad if ns]
    if not bad:
        return
    lo, hi = ax.get_ylim()
    if lo < 0:
        ax.axhspan(lo, 0, color="red", alpha=0.08, lw=0, zorder=0)
        ax.set_ylim(lo, hi)
    # in the legend, which matplotlib places off the data
    old = ax.get_legend()
    title = old.get_title().get_text() if old is not None else None
    handles, labels = ax.get_legend_handles_labels()
    for lv, ns in bad:
        handles.append(Patch(facecolor="red", alpha=0.25, edgecolor="darkred"))
        labels.append(f"{lv}: {', '.join(ns)} out of physical bounds\n(see its warnings)")
    ax.legend(handles, labels, title=title, fontsize="small", title_fontsize="small", loc="upper left",
              bbox_to_anchor=(0.0, -0.16))  # below the panel: never over the data


def _save(fig, path: Path) -> Path:
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def _bars(ax, labels: list[str], groups: list[str], values: np.ndarray, ylabel: str,
          errors: np.ndarray | None = None) -> None:
    """Grouped bar chart: one group per label, one bar per entry of ``groups`` (values[label, group]);
    ``errors`` (same shape, NaN where a level reports none) are drawn as error bars."""
    width = 0.8 / len(groups)
    x = np.arange(len(labels))
    for k, g in enumerate(groups):
        err = None if errors is None or np.all(np.isnan(errors[:, k])) else np.nan_to_num(errors[:, k])
        ax.bar(x + (k - (len(groups) - 1) / 2) * width, values[:, k], width, label=g, yerr=err, capsize=4)
    ax.set_xticks(x, labels)
    ax.set_ylabel(ylabel)
    ax.legend(title="level")


def plot_emission(ds: xr.Dataset, path: str | Path) -> Path:
    """Total emission rate P against time, one line per level (a bar per level for a steady state)."""
    levels = _levels(ds)
    fig, ax = plt.subplots(figsize=(6.4, 4.2), layout="constrained")
    if "time" in ds.dims:
        banded = False
        for k, lv in enumerate(levels):
            sub = _by_level(ds, lv)
            p = sub["emission_rate"]
            ax.plot(ds["time"], p, label=lv, color=f"C{k}")
            err = _stderr(sub, "emission_rate")
            if err is not None:
                ax.fill_between(ds["time"], p - err, p + err, color=f"C{k}", alpha=0.25, lw=0)
                banded = True
        ax.set_xlabel(_TIME)
        ax.set_ylabel(_RATE)
        ax.legend(title="level" + (f"\n({_BAND})" if banded else ""), title_fontsize="small")
    else:
        vals = np.array([[float(_by_level(ds, lv)["emission_rate"]) for lv in levels]])
        errs = np.array([[_scalar_err(_by_level(ds, lv), "emission_rate") for lv in levels]])
        _bars(ax, ["steady state"], levels, vals, _RATE, errs)
    ax.set_title(_title(ds, f"Total emission, N = {ds.sizes['emitter']}"))
    ax.grid(alpha=0.3)
    _mark_unphysical(ax, ds, levels, ("emission_rate",))
    return _save(fig, Path(path))


def _scalar_err(sub: xr.Dataset, name: str, detector: str | None = None) -> float:
    """A steady state's standard error of ``name`` (at ``detector``), NaN for a deterministic level."""
    err = _stderr(sub, name)
    if err is None:
        return float("nan")
    return float(err.sel(detector=detector) if detector is not None else err)


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
        errs = np.array([[_scalar_err(_by_level(ds, lv), "intensity", d) for lv in levels] for d in dets])
        _bars(ax, [_angle_label(ds, d) for d in dets], levels, vals, _INTENSITY, errs)
        ax.set_title(_title(ds, "Steady-state intensity per detector"))
        ax.grid(alpha=0.3, axis="y")
        _mark_unphysical(ax, ds, levels, _INTENSITIES)
        return _save(fig, Path(path))
    fig, axes = plt.subplots(
        1, len(dets), figsize=(4.8 * len(dets), 4.2), layout="constrained", squeeze=False
    )
    for ax, d in zip(axes[0], dets, strict=True):
        for k, lv in enumerate(levels):
            sub = _by_level(ds, lv)
            colour = f"C{k}"
            total = sub["intensity"].sel(detector=d)
            ax.plot(ds["time"], total, color=colour, label=f"{lv}: total")
            err = _stderr(sub, "intensity")
            if err is not None:
                err = err.sel(detector=d)
                ax.fill_between(ds["time"], total - err, total + err, color=colour, alpha=0.25, lw=0,
                                label=f"{lv}: ±1 standard error")
            if "intensity_coherent" in sub:
                ax.plot(ds["time"], sub["intensity_coherent"].sel(detector=d), color=colour, ls="--",
                        label=f"{lv}: coherent part")
        ax.set_title(_angle_label(ds, d))
        ax.set_xlabel(_TIME)
        ax.set_ylabel(_INTENSITY)
        ax.grid(alpha=0.3)
        ax.legend(fontsize="small")
        _mark_unphysical(ax, ds, levels, _INTENSITIES)
    fig.suptitle(_title(ds, "Far-field intensity per detector"))
    return _save(fig, Path(path))


def plot_g2(ds: xr.Dataset, path: str | Path) -> Path:
    """g2 at zero delay: one panel per detector and one for all emitted light, against time (bars for a
    steady state), every level, with the sampling levels' standard errors. The dotted line g2 = 1 is
    coherent light; values below 0 are impossible and shaded (`beyondmf.physicality`)."""
    levels = _levels(ds)
    dets = [str(d) for d in ds["detector"].values]
    panels = [(_angle_label(ds, d), "g2", d) for d in dets] + [("all emitted light", "g2_total", None)]
    if "time" not in ds.dims:
        fig, ax = plt.subplots(figsize=(6.4, 4.2), layout="constrained")
        vals = np.array([[float(_pick(_by_level(ds, lv), name, d)) for lv in levels]
                         for _, name, d in panels])
        errs = np.array([[_scalar_err(_by_level(ds, lv), name, d) for lv in levels] for _, name, d in panels])
        _bars(ax, [label for label, _, _ in panels], levels, vals, "g2(0)", errs)
        ax.axhline(1.0, color="0.4", ls=":", lw=1)
        ax.set_title(_title(ds, "Steady-state g2 at zero delay"))
        ax.grid(alpha=0.3, axis="y")
        _mark_unphysical(ax, ds, levels, ("g2", "g2_total"))
        return _save(fig, Path(path))
    fig, axes = plt.subplots(1, len(panels), figsize=(4.8 * len(panels), 4.2), layout="constrained",
                             squeeze=False)
    for ax, (label, name, d) in zip(axes[0], panels, strict=True):
        for k, lv in enumerate(levels):
            sub = _by_level(ds, lv)
            g = _pick(sub, name, d)
            ax.plot(ds["time"], g, color=f"C{k}", label=lv)
            err = _stderr(sub, name)
            if err is not None:
                err = _pick(sub, f"{name}_stderr", d)
                ax.fill_between(ds["time"], g - err, g + err, color=f"C{k}", alpha=0.25, lw=0)
        ax.axhline(1.0, color="0.4", ls=":", lw=1)
        ax.set_title(label)
        ax.set_xlabel(_TIME)
        ax.set_ylabel("g2(0)")
        ax.grid(alpha=0.3)
        ax.legend(fontsize="small", title="level")
        _mark_unphysical(ax, ds, levels, (name,))
    fig.suptitle(_title(ds, "Second-order coherence at zero delay"))
    return _save(fig, Path(path))


def _pick(sub: xr.Dataset, name: str, detector: str | None) -> xr.DataArray:
    return sub[name].sel(detector=detector) if detector is not None else sub[name]


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
                ax.plot(centre[a], centre[b], marker=mark, ms=22 if incoming else 14, color=colour, ls="none",
                        label=f"{name} (out of page)" if u[depth] > 0 else f"{name} (into page)")
            else:
                ax.annotate("", xy=(end[a], end[b]), xytext=(start[a], start[b]), annotation_clip=False,
                            arrowprops=dict(arrowstyle="-|>", color=colour, lw=2, mutation_scale=18))
                ax.plot([], [], color=colour, lw=2, label=name)
                # arrows do not widen the axes: an invisible segment does, so the head stays in the panel
                ax.plot([start[a], end[a]], [start[b], end[b]], alpha=0)
        ax.set_xlabel(f"{'xyz'[a]} (λ0)")
        ax.set_ylabel(f"{'xyz'[b]} (λ0)")
        ax.set_aspect("equal", adjustable="datalim")
        ax.set_title(view)
        ax.grid(alpha=0.3)
    axes[-1].legend(loc="upper left", bbox_to_anchor=(1.02, 1.0), fontsize="small", markerscale=0.6,
                    labelspacing=1.0)
    dip = ds.attrs.get("dipole")
    dip_txt = ", ".join(f"{complex(c).real:g}" if complex(c).imag == 0 else f"{complex(c):g}" for c in dip) \
        if dip is not None else "?"
    fig.suptitle(_title(ds, f"Set-up: N = {len(pos)}, dipole ê ∝ ({dip_txt})"))
    return _save(fig, Path(path))


def plot_all(ds: xr.Dataset, directory: str | Path) -> list[Path]:
    """Write emission.png, intensity.png, g2.png and geometry.png into ``directory``; returns their paths."""
    d = Path(directory)
    d.mkdir(parents=True, exist_ok=True)
    if ds.attrs.get("calculation") == "correlations":  # two-time statistics (beyondmf.correlations)
        from .correlations import plot_correlations

        return [plot_correlations(ds, d / "correlations.png", study_title(ds)),
                plot_geometry(ds, d / "geometry.png")]
    return [
        plot_emission(ds, d / "emission.png"),
        plot_intensity(ds, d / "intensity.png"),
        plot_g2(ds, d / "g2.png"),
        plot_geometry(ds, d / "geometry.png"),
    ]
