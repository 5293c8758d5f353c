"""The figure of a correlations result: g2(τ) per detector and of all light, and the spectrum."""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import xarray as xr  # noqa: E402

__all__ = ["plot_correlations"]

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
