"""Figures of a sweep or comparison (`beyondmf.sweep.run_sweep`): values and corrections per level.

The figure follows the shape of the grid: no grid → the observables per level (against time for a
dynamics study); one grid dimension → lines against it; two → correction maps, one panel per level,
with each cell marked ✓ (baseline holds), ✗ (fails) or ? (undecided) by the comparison's verdict.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import xarray as xr  # noqa: E402
from matplotlib.ticker import NullFormatter  # noqa: E402

from ..compare import summarize  # noqa: E402
from ..study.sections import format_value, grid_quantity  # noqa: E402
from .runs import study_title  # noqa: E402

__all__ = ["plot_sweep"]

_MARK = {"holds": "✓", "fails": "✗", "undecided": "?", "undefined": "–", "baseline": ""}
# observable → (quantity, unit): the unit goes on the value panels only, never on a relative correction
_QUANTITY = {"emission_rate": ("emission rate P", "Γ0"), "g2_total": ("g2 of all light", ""),
             "g2": ("g2", ""),
             "intensity": ("intensity", "Γ0/sr"), "emission_rate_peak": ("peak rate", "Γ0"),
             "peak_time": ("time of the peak", "1/Γ0"), "emitted": ("photons emitted", ""),
             "optical_depth": ("optical depth −ln|t|²", ""), "transmission_power": ("transmission |t|²", ""),
             "lens_power": ("power into the lens", "Γ0"),
             "lens_power_coherent": ("coherent power into the lens", "Γ0"),
             "lens_power_incoherent": ("incoherent power into the lens", "Γ0")}
_CLIP = 1.5  # relative corrections are drawn within ±150 %: beyond that the baseline has plainly failed
_COLUMNS = 3  # panels per row


def _axis_label(s: xr.Dataset, dim: str) -> str:
    """A grid dimension's axis label: the quantity with its unit where known, else the study path."""
    return grid_quantity(s[dim].attrs.get("parameter", dim))[2]


def _log_axis(x: np.ndarray) -> bool:
    """A positive numeric grid spanning a decade or more is drawn on a logarithmic axis."""
    return bool(np.issubdtype(x.dtype, np.number) and np.all(x > 0) and x.max() / x.min() >= 10)


def _grid_axis(ax, s: xr.Dataset, dim: str) -> np.ndarray:
    """Label the x axis with grid dimension ``dim`` (logarithmic for a grid spanning a decade), ticks at
    the grid points only (minor tick labels of a log axis would run into each other); its values."""
    x = s[dim].values
    ax.set_xlabel(_axis_label(s, dim))
    if _log_axis(x):
        ax.set_xscale("log")
        ax.xaxis.set_minor_formatter(NullFormatter())
        ax.set_xticks(x, [format_value(v) for v in x])
    return x


def _subplots(n: int):
    """``n`` panels in rows of at most `_COLUMNS`; the axes in reading order, surplus ones hidden."""
    cols = min(n, _COLUMNS)
    rows = -(-n // cols)
    fig, axes = plt.subplots(rows, cols, figsize=(3.6 * cols, 3.2 * rows), squeeze=False)
    flat = list(axes.flat)
    for ax in flat[n:]:
        ax.set_visible(False)
    return fig, flat[:n]


def _summary(ds: xr.Dataset) -> xr.Dataset:
    """A comparison as it is (whatever observables it compared); per-realization results summarized
    against their first level."""
    if any(name.endswith("_verdict") for name in ds.data_vars):
        return ds
    return summarize(ds, baseline=str(ds["level"].values[0]))


def _grid_dims(s: xr.Dataset) -> list[str]:
    """The grid dimensions: those of a compared observable other than level, time, detector and lens."""
    first = next(name.removesuffix("_verdict") for name in s.data_vars if name.endswith("_verdict"))
    return [d for d in s[first].dims if d not in ("level", "time", *_PER)]


# Dimensions an observable is drawn once per entry of: one panel per detector, one per lens.
_PER = ("detector", "lens")


def _panels(s: xr.Dataset) -> list[tuple[str, tuple[str, str] | None]]:
    """(observable, (dimension, entry) or None) pairs to draw: every compared observable, per detector or
    per lens where it has one."""
    out = []
    for name in s.data_vars:
        if name.endswith("_verdict"):
            obs = name.removesuffix("_verdict")
            per = next((d for d in _PER if d in s[obs].dims), None)
            out += [(obs, (per, str(e))) for e in s[per].values] if per else [(obs, None)]
    return out


def _color(s: xr.Dataset, level) -> str:
    """One colour per level, the same in every figure of a study."""
    return f"C{list(s['level'].values).index(level) % 10}"


def _name(s: xr.Dataset, level) -> str:
    """The level's legend name, marked when some of its runs warned about themselves."""
    if "warned_realizations" not in s:
        return str(level)
    k = int(s["warned_realizations"].sel(level=level).sum())
    return f"{level} ({k} run{'s' if k != 1 else ''} warned)" if k else str(level)


def _pick(s: xr.Dataset, name: str, det: tuple[str, str] | None, level) -> tuple[xr.DataArray, xr.DataArray]:
    v, u = s[name].sel(level=level), s[f"{name}_stderr"].sel(level=level)
    if det is not None:
        v, u = v.sel(dict([det])), u.sel(dict([det]))
    return v, u


def _title(name: str, det: tuple[str, str] | None, unit: bool = True) -> str:
    """A panel's title: the quantity, its unit unless ``unit`` is False (a relative correction has none),
    and the detector or lens."""
    quantity, u = _QUANTITY.get(name, (name, ""))
    return quantity + (f" ({u})" if u and unit else "") + (f", {det[1]}" if det else "")


def _save(fig, path: Path) -> Path:
    # a legend below the panels (fig.legend_room: the fraction of the height it needs) stays clear of them
    fig.tight_layout(rect=(0, getattr(fig, "legend_room", 0.0), 1, 1))
    fig.savefig(path, dpi=90)
    plt.close(fig)
    return path


def _slices(s: xr.Dataset, dims: list[str]) -> list[tuple[dict, str]]:
    """Every combination of the values of ``dims``, with a legend tag (one line each)."""
    if not dims:
        return [({}, "")]
    combos = np.array(np.meshgrid(*[s[d].values for d in dims], indexing="ij")).reshape(len(dims), -1).T
    out = []
    for c in combos:
        pairs = list(zip(dims, c, strict=True))
        out.append((dict(pairs), ", " + ", ".join(f"{d}={format_value(v)}" for d, v in pairs)))
    return out


# Line styles of the grid points in a time panel (the colour is the level's), and of the levels in a
# panel against a grid axis, with their markers.
_STYLES = ("-", "--", ":", "-.")
_MARKERS = ("o", "s", "^", "D", "v", "P")


def _legends(axes, time_panels: list, tags: list[str], level_legend: dict) -> None:
    """The level legend on the first panel and, for a grid drawn over time, the legend of the grid points'
    line styles (grey: it names no level) on the first time panel other than the first; on the first
    panel itself when it is the only time panel, the two legends then in opposite corners."""
    shared = False
    if tags and time_panels:
        ax = next((a for a in time_panels if a is not axes[0]), time_panels[0])
        shared = ax is axes[0]
        handles = [plt.Line2D([], [], color="0.4", ls=_STYLES[j % len(_STYLES)], label=tag)
                   for j, tag in enumerate(tags)]
        ax.add_artist(ax.legend(handles=handles, fontsize=7, title="line style", title_fontsize=7,
                                loc="upper right" if shared else "best"))
    axes[0].legend(**level_legend, loc="upper left" if shared else "best")


def _values_figure(s: xr.Dataset, path: Path) -> Path:
    panels = _panels(s)
    grid = _grid_dims(s)
    fig, axes = _subplots(len(panels))
    time_panels, outside = [], False
    for ax, (name, det) in zip(axes, panels, strict=True):
        for k, lv in enumerate(s["level"].values):
            v, u = _pick(s, name, det, lv)
            if "time" in v.dims:
                t = s["time"].values
                for j, (sel, _tag) in enumerate(_slices(s, grid)):
                    vv, uu = v.sel(sel).transpose("time"), u.sel(sel).transpose("time")
                    ls = _STYLES[j % len(_STYLES)]
                    ax.plot(t, vv, color=_color(s, lv), ls=ls, label=_name(s, lv) if j == 0 else None)
                    ax.fill_between(t, vv - uu, vv + uu, alpha=0.2, color=_color(s, lv))
                ax.set_xlabel("time (1/Γ0)")
                if k == 0:
                    time_panels.append(ax)
            elif grid:
                x = _grid_axis(ax, s, grid[0])
                # a marker and line style per level (later levels hollow, so a level drawn over another
                # that agrees with it leaves both visible), a colour per level, or per further grid point
                for j, (sel, tag) in enumerate(_slices(s, grid[1:])):
                    ax.errorbar(x, v.sel(sel).transpose(grid[0]), yerr=u.sel(sel).transpose(grid[0]),
                                marker=_MARKERS[k % len(_MARKERS)], ls=_STYLES[k % len(_STYLES)],
                                fillstyle="full" if k == 0 else "none", markersize=6 if k == 0 else 8,
                                capsize=3, label=f"{_name(s, lv)}{tag}",
                                color=f"C{j % 10}" if tag else _color(s, lv))
                outside = True
            else:
                ax.bar(k, float(v), yerr=float(u), capsize=4, label=_name(s, lv), color=_color(s, lv))
                ax.set_xticks([])
        ax.set_title(_title(name, det), fontsize=9)
        ax.set_ylabel(_title(name, None), fontsize=8)
        # g2 spanning orders of magnitude on a log axis, but only if every value is positive: a sampled
        # g2 can be negative (noise, or a level's failure), and a log axis would silently drop it
        vals = s[name].values[np.isfinite(s[name].values)]
        if name.startswith("g2") and vals.size and vals.min() > 0 and vals.max() / vals.min() > 100:
            ax.set_yscale("log")
    fig.suptitle(study_title(s), fontsize=10)
    if outside and not time_panels:  # values against a grid axis: the legend below the panels
        handles, labels = axes[0].get_legend_handles_labels()
        rows = -(-len(handles) // 2)
        fig.legend(handles, labels, loc="lower center", ncol=2, fontsize=8, title="level",
                   title_fontsize=8, frameon=False)
        fig.legend_room = min(0.5, (0.35 + 0.2 * rows) / fig.get_size_inches()[1])  # read by _save
        return _save(fig, path)
    tags = [tag.removeprefix(", ") for _sel, tag in _slices(s, grid)] if grid else []
    _legends(axes, time_panels, tags, {"fontsize": 8, "title": "level", "title_fontsize": 8})
    return _save(fig, path)


def _correction_lines(s: xr.Dataset, path: Path) -> Path:
    panels = _panels(s)
    grid = _grid_dims(s)
    tol, base = s.attrs["tolerance"], s.attrs["baseline"]
    others = [lv for lv in s["level"].values if str(lv) != base]
    fig, axes = _subplots(len(panels))
    time_panels, tags = [], []
    for ax, (name, det) in zip(axes, panels, strict=True):
        top = tol  # the y-range: the drawn corrections and intervals, at least the tolerance, at most ±_CLIP
        for k, lv in enumerate(others):
            sel = {"level": lv} | (dict([det]) if det else {})
            c = s[f"{name}_correction"].sel(sel)
            lo, hi = s[f"{name}_correction_low"].sel(sel), s[f"{name}_correction_high"].sel(sel)
            # no relative correction where the baseline is zero (e.g. t = 0 from the ground state): not drawn
            defined = s[f"{name}_verdict"].sel(sel) != "undefined"
            c, lo, hi = (a.where(defined) for a in (c, lo, hi))
            col = _color(s, lv)
            if "time" in c.dims:
                # one curve per grid point, in the level's colour, one line style per grid point
                x = s["time"].values
                ax.set_xlabel("time (1/Γ0)")
                curves = []
                for j, (point, tag) in enumerate(_slices(s, grid)):
                    label = _name(s, lv) if j == 0 else None
                    style = _STYLES[j % len(_STYLES)]
                    curves.append(tuple(a.sel(point).transpose("time").values for a in (c, lo, hi))
                                  + (style, label, tag.removeprefix(", ")))
            else:
                if grid:
                    x = _grid_axis(ax, s, grid[0])
                else:
                    x = np.array([k])
                    ax.set_xticks(range(len(others)), [str(o) for o in others])
                curves = [(c.values, lo.values, hi.values, "-", _name(s, lv), "")]
            for cc, ll, hh, style, label, _tag in curves:
                marker = None if "time" in c.dims else "o"
                ax.plot(x, np.clip(np.atleast_1d(cc), -_CLIP, _CLIP), marker=marker, ls=style, label=label,
                        color=col)
                lo_c, hi_c = (np.clip(np.atleast_1d(a), -_CLIP, _CLIP) for a in (ll, hh))
                ax.fill_between(x, lo_c, hi_c, alpha=0.2, color=col)
                drawn = np.abs(np.concatenate([np.atleast_1d(a).ravel() for a in (cc, ll, hh)]))
                drawn = drawn[np.isfinite(drawn)]
                top = max(top, float(drawn.max()) if drawn.size else 0.0)
            if "time" in c.dims and k == 0:
                time_panels.append(ax)
                tags = [tag for *_rest, tag in curves] if grid else []
        for y in (-tol, tol):
            ax.axhline(y, color="k", ls=":", lw=1)
        ax.axhline(0, color="k", lw=0.5)
        lim = min(top, _CLIP) * 1.1
        ax.set_ylim(-lim, lim)
        ax.set_title(f"correction of {_title(name, det, unit=False)}", fontsize=9)
        ax.set_ylabel("relative correction", fontsize=8)
    if others:
        _legends(axes, time_panels, tags, {"fontsize": 8, "title": f"vs {base}", "title_fontsize": 8})
    fig.suptitle(f"relative corrections (X − X_{base})/X_{base}, {s.attrs['confidence']:.0%} intervals, "
                 f"tolerance ±{tol:g} (dotted), drawn within ±{_CLIP:g}",
                 fontsize=10)
    return _save(fig, path)


def _correction_maps(s: xr.Dataset, path: Path) -> Path:
    gx, gy = _grid_dims(s)[:2]
    base, tol = s.attrs["baseline"], s.attrs["tolerance"]
    others = [lv for lv in s["level"].values if str(lv) != base]
    panels = _panels(s)
    fig, axes = plt.subplots(len(panels), max(len(others), 1), figsize=(3.8 * max(len(others), 1),
                             3.2 * len(panels)), squeeze=False)
    for i, (name, det) in enumerate(panels):
        for j, lv in enumerate(others):
            ax = axes[i][j]
            sel = {"level": lv} | (dict([det]) if det else {})
            c, verdict = s[f"{name}_correction"].sel(sel), s[f"{name}_verdict"].sel(sel)
            rest = {d: -1 for d in c.dims if d not in (gx, gy)}  # time (the last), further grid dims
            c, verdict = c.isel(rest).transpose(gy, gx), verdict.isel(rest).transpose(gy, gx).values
            top = float(np.nanmax(np.abs(c.values))) if np.isfinite(c.values).any() else tol
            lim = min(max(top, tol), _CLIP)
            im = ax.imshow(c.values, origin="lower", cmap="RdBu_r", vmin=-lim, vmax=lim, aspect="auto")
            warned = np.zeros(verdict.shape, dtype=bool)
            if "warned_realizations" in s:
                w = s["warned_realizations"].sel(level=lv)
                w = w.isel({d: -1 for d in w.dims if d not in (gx, gy)})
                warned = w.transpose(gy, gx).values > 0
            for (yi, xi), v in np.ndenumerate(verdict):
                mark = _MARK.get(str(v), "") + ("!" if warned[yi, xi] else "")
                ax.text(xi, yi, mark, ha="center", va="center", fontsize=11)
            ax.set_xticks(range(s.sizes[gx]), [format_value(v) for v in s[gx].values], fontsize=7)
            ax.set_yticks(range(s.sizes[gy]), [format_value(v) for v in s[gy].values], fontsize=7)
            ax.set_xlabel(_axis_label(s, gx))
            ax.set_ylabel(_axis_label(s, gy))
            at = " at the last time" if "time" in rest else ""
            ax.set_title(f"{_name(s, lv)}: correction of {_title(name, det, unit=False)}{at}", fontsize=8)
            fig.colorbar(im, ax=ax, shrink=0.8)
    flag = (", ! runs warned" if "warned_realizations" in s
            and int(s["warned_realizations"].sum()) else "")
    fig.suptitle(f"against {base}: ✓ holds within ±{tol:g}, ✗ fails, ? undecided "
                 f"({s.attrs['confidence']:.0%} intervals){flag}", fontsize=9)
    return _save(fig, path)


def plot_sweep(ds: xr.Dataset, directory: str | Path) -> list[Path]:
    """Write values.png and, with several levels, corrections.png (correction_map.png for a 2-D grid); for
    a sweep of calculation = 'correlations', correlations_g2.png and correlations_spectrum.png."""
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    if ds.attrs.get("calculation") == "correlations":  # curves over delay and frequency, per grid point
        from .correlations import plot_correlation_sweep

        return plot_correlation_sweep(ds, directory)
    s = _summary(ds)
    paths = [_values_figure(s, directory / "values.png")]
    if s.sizes["level"] > 1:
        if len(_grid_dims(s)) >= 2:
            paths.append(_correction_maps(s, directory / "correction_map.png"))
        else:
            paths.append(_correction_lines(s, directory / "corrections.png"))
    return paths
