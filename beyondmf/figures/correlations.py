"""The figures of a correlations result: g2(τ) per detector and of all light, and the spectrum; for a
sweep of them, one panel per grid point."""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import xarray as xr  # noqa: E402

__all__ = ["plot_correlations", "plot_correlation_sweep"]

_STYLES = ("-", "--", ":", "-.")


def _levels(ds: xr.Dataset) -> list[str]:
    if "level" in ds.dims:
        return [str(v) for v in ds["level"].values]
    return [str(ds.attrs.get("level", ""))]


def _sub(ds: xr.Dataset, level: str) -> xr.Dataset:
    return ds.sel(level=level) if "level" in ds.dims else ds


def plot_correlations(ds: xr.Dataset, path: str | Path, title: str | None = None) -> Path:
    """g2(τ) (left: one colour per level, one line style per detector, black for all light where there is
    more than one detector) and the inelastic spectrum (right, with each level's elastic fraction in the
    legend). Levels without a panel's data (meanfield: only the elastic line) are left out of it."""
    levels = _levels(ds)
    has_spec = "spectrum" in ds
    fig, axes = plt.subplots(1, 2 if has_spec else 1, figsize=(11 if has_spec else 6, 5.6), squeeze=False)
    ax = axes[0, 0]
    colours = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    dets = [str(d) for d in ds["detector"].values]
    drawn = False
    for li, lv in enumerate(levels):
        sub = _sub(ds, lv)
        c = colours[li % len(colours)]
        if "g2" in sub and np.any(np.isfinite(sub["g2"].values)):
            for di, det in enumerate(dets):
                ax.plot(sub["delay"], sub["g2"].sel(detector=det), _STYLES[di % 4], color=c,
                        label=f"{lv}, {det}")
            drawn = True
        if "g2_total" in sub and np.any(np.isfinite(sub["g2_total"].values)) and len(dets) > 1:
            ax.plot(sub["delay"], sub["g2_total"], "-", color=c, lw=2.5, alpha=0.35, label=f"{lv}, all light")
    if drawn:
        ax.axhline(1.0, color="0.5", lw=0.8, ls=":")
        ax.set_xlabel("delay τ (1/Γ0)")
        ax.set_ylabel("g2(τ)")
        ax.legend(fontsize=7)
    else:
        ax.text(0.5, 0.5, "no g2(τ) in this result", ha="center", va="center", transform=ax.transAxes)
    ax.set_title("intensity correlation")
    if has_spec:
        ax = axes[0, 1]
        for li, lv in enumerate(levels):
            sub = _sub(ds, lv)
            c = colours[li % len(colours)]
            if not np.any(np.isfinite(sub["spectrum"].values)):
                continue
            for di, det in enumerate(dets):
                ef = float(sub["elastic_fraction"].sel(detector=det))
                ax.plot(sub["frequency"], sub["spectrum"].sel(detector=det), _STYLES[di % 4], color=c,
                        label=f"{lv}, {det} (elastic {100 * ef:.1f} %)")
        for lv in levels:  # levels with only the elastic line: say so in the legend
            sub = _sub(ds, lv)
            if not np.any(np.isfinite(sub["spectrum"].values)):
                fr = ", ".join(f"{d} {100 * float(sub['elastic_fraction'].sel(detector=d)):.1f} %"
                               for d in dets)
                ax.plot([], [], " ", label=f"{lv}: elastic line only ({fr})")
        ax.set_xlabel("frequency ν = ω − ω_laser (Γ0)")
        ax.set_ylabel("inelastic spectrum (photons Γ0⁻¹ sr⁻¹ per Γ0)")
        ax.set_title("spectrum (elastic line at ν = 0 not drawn)")
        ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(0.0, -0.15), ncol=1, frameon=False)
    fig.suptitle(title or ds.attrs.get("title") or f"two-time statistics, N = {ds.attrs.get('N', '?')}")
    fig.tight_layout()
    path = Path(path)
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


_PANEL_COLUMNS = 3


def _points(ds: xr.Dataset) -> tuple[list[str], list[tuple[dict, str]]]:
    """The grid dimensions of a correlations sweep and every grid point: (selection, title)."""
    from ..study.sections import format_value, grid_quantity

    dims = [d for d in ds["g2_total" if "g2_total" in ds else "emission_rate"].dims
            if d not in ("level", "realization", "delay", "frequency", "detector")]
    if not dims:
        return dims, [({}, "")]
    grids = np.meshgrid(*[np.arange(ds.sizes[d]) for d in dims], indexing="ij")
    out = []
    for idx in np.array(grids).reshape(len(dims), -1).T:
        sel = {d: int(i) for d, i in zip(dims, idx, strict=True)}
        words = []
        for d, i in sel.items():
            symbol = grid_quantity(ds[d].attrs.get("parameter", d))[2].split(" (")[0]
            words.append(f"{symbol} = {format_value(ds[d].values[i])}")
        out.append((sel, ", ".join(words)))
    return dims, out


def _grid_figure(ds: xr.Dataset, path: Path, draw, title: str, legend_rows: int) -> Path:
    dims, points = _points(ds)
    n = len(points)
    cols = min(n, _PANEL_COLUMNS)
    rows = -(-n // cols)
    room = 0.06 + 0.035 * legend_rows
    fig, axes = plt.subplots(rows, cols, figsize=(4.2 * cols, 3.4 * rows / (1 - room)), squeeze=False,
                             sharex=True)
    flat = list(axes.flat)
    for ax in flat[n:]:
        ax.set_visible(False)
    for ax, (sel, words) in zip(flat, points, strict=False):
        # realizations averaged: the mean over the drawn clouds (each cloud is in results.nc)
        draw(ax, ds.isel(sel).mean("realization") if "realization" in ds.dims else ds.isel(sel))
        ax.set_title(words, fontsize=9)
    handles, labels = flat[0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="lower center", ncol=min(len(labels), 3), fontsize=8, frameon=False)
    k = ds.sizes.get("realization", 1)
    fig.suptitle(title + (f" (mean of {k} realizations)" if k > 1 else ""))
    fig.tight_layout(rect=(0, room, 1, 1))
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return path


def plot_correlation_sweep(ds: xr.Dataset, directory: str | Path) -> list[Path]:
    """A sweep of calculation = 'correlations' (`beyondmf.sweep.run_sweep`): correlations_g2.png,
    g2(τ) of all light per level, one panel per grid point; and, with frequencies, correlations_spectrum.png,
    the inelastic spectrum towards each detector (line style) per level (colour). Levels without a panel's
    data (meanfield: only the elastic line) are named in the legend with their elastic fraction."""
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    levels = _levels(ds)
    dets = [str(d) for d in ds["detector"].values]
    base = ds.attrs.get("title") or "two-time statistics"
    paths = []

    def g2_panel(ax, sub):
        for li, lv in enumerate(levels):
            v = sub["g2_total"].sel(level=lv) if "g2_total" in sub else None
            if v is not None and np.any(np.isfinite(v.values)):
                ax.plot(sub["delay"], v, _STYLES[li % 4], color=f"C{li % 10}", label=lv)
            else:
                ax.plot([], [], " ", label=f"{lv}: no g2(τ) (elastic line only)")
        ax.axhline(1.0, color="0.5", lw=0.8, ls=":")
        ax.set_xlabel("delay τ (1/Γ0)")
        ax.set_ylabel("g2(τ) of all light")
        ax.grid(alpha=0.3)

    if "g2_total" in ds:
        paths.append(_grid_figure(ds, directory / "correlations_g2.png", g2_panel,
                                  f"{base}: g2(τ) of all emitted light", 1))

    def spectrum_panel(ax, sub):
        for li, lv in enumerate(levels):
            one = sub.sel(level=lv)
            if not np.any(np.isfinite(one["spectrum"].values)):
                fr = ", ".join(f"{d} {100 * float(one['elastic_fraction'].sel(detector=d)):.1f} %"
                               for d in dets)
                ax.plot([], [], " ", label=f"{lv}: elastic line only ({fr})")
                continue
            for di, det in enumerate(dets):
                ax.plot(sub["frequency"], one["spectrum"].sel(detector=det), _STYLES[di % 4],
                        color=f"C{li % 10}", label=f"{lv}, {det}")
        ax.set_xlabel("ν = ω − ω_laser (Γ0)")
        ax.set_ylabel("inelastic spectrum\n(photons Γ0⁻¹ sr⁻¹ per Γ0)")
        ax.grid(alpha=0.3)

    if "spectrum" in ds:
        paths.append(_grid_figure(ds, directory / "correlations_spectrum.png", spectrum_panel,
                                  f"{base}: inelastic spectrum (elastic line at ν = 0 not drawn)",
                                  -(-len(levels) * len(dets) // 3)))
    return paths
