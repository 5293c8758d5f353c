"""The figures of a single-model study (`beyondmf.figures.runs`): what they draw, checked on the figures.

The datasets here are laid out like `beyondmf.study.run_study` results, with made-up numbers: these tests
check the drawing, not physics.
"""

from __future__ import annotations

import matplotlib.pyplot as plt
import numpy as np
import pytest
import xarray as xr
from matplotlib.collections import PolyCollection
from matplotlib.container import BarContainer

from beyondmf.figures import runs as plotting


@pytest.fixture
def figures(monkeypatch):
    kept = {}

    def keep(fig, path):
        kept[path.name] = fig
        return path

    monkeypatch.setattr(plotting, "_save", keep)
    yield kept
    plt.close("all")


def _results(times: bool, laser=(0.0, 0.0, 1.0), quick=0) -> xr.Dataset:
    """Two levels, one deterministic (no errors) and one sampled, two detectors, three emitters."""
    t = np.linspace(0, 2, 5)
    shape = (2, 5) if times else (2,)
    rate = np.ones(shape) * (1 + (t if times else 0))
    err = np.stack([np.full(shape[1:], np.nan), np.full(shape[1:], 0.1)])
    dims = ("level", "time") if times else ("level",)
    ds = xr.Dataset(
        {"emission_rate": (dims, rate), "emission_rate_stderr": (dims, err),
         "intensity": ((*dims, "detector"), np.stack([rate, rate / 2], -1) / 10),
         "intensity_coherent": ((*dims, "detector"), np.stack([rate, rate / 2], -1) / 20),
         "intensity_stderr": ((*dims, "detector"), np.stack([err, err], -1) / 10),
         "g2": ((*dims, "detector"), np.stack([rate, rate / 2], -1) - 0.5),
         "g2_stderr": ((*dims, "detector"), np.stack([err, err], -1)),
         "g2_total": (dims, rate - 0.2), "g2_total_stderr": (dims, err)},
        coords={"level": ["meanfield", "twa"], "detector": ["forward", "side"], "emitter": np.arange(3),
                "axis": ["x", "y", "z"],
                "position": (("emitter", "axis"), [[0, 0, 0], [0.3, 0, 0], [0, 0.3, 0.1]]),
                "direction": (("detector", "axis"), [list(laser), [0, 1, 0]])}
        | ({"time": t} if times else {}),
        attrs={"laser": list(laser), "dipole": [1.0, 0.0, 0.0], "title": "a test cloud", "quick": quick})
    return ds


def test_sampled_levels_are_drawn_with_their_standard_errors_and_quick_runs_say_so(figures, tmp_path):
    plotting.plot_all(_results(times=True, quick=1), tmp_path)
    ax = figures["emission.png"].axes[0]
    bands = [c for c in ax.collections if isinstance(c, PolyCollection)]
    assert len(bands) == 1  # twa only: meanfield reports no error
    ys = np.concatenate([p.vertices[:, 1] for p in bands[0].get_paths()])
    assert ys.max() == pytest.approx(3.1) and ys.min() == pytest.approx(0.9)  # P ± 0.1 at t = 2 and 0
    assert "(quick mode)" in ax.get_title()
    for panel in figures["intensity.png"].axes:
        assert sum(isinstance(c, PolyCollection) for c in panel.collections) == 1
    assert "(quick mode)" in figures["intensity.png"].get_suptitle()


def test_steady_state_bars_carry_error_bars_for_sampled_levels(figures, tmp_path):
    plotting.plot_all(_results(times=False), tmp_path)
    for name in ("emission.png", "intensity.png"):
        ax = figures[name].axes[0]
        bars = [c for c in ax.containers if isinstance(c, BarContainer)]
        assert [b.errorbar is not None for b in bars] == [False, True], name
        assert "quick" not in ax.get_title()


@pytest.mark.parametrize("laser", [(1.0, 0.0, 0.0), (0.0, 0.0, 1.0), (0.6, 0.0, 0.8)])
def test_every_arrow_of_the_set_up_lies_inside_its_panel(figures, tmp_path, laser):
    """An arrow's head beyond the points' extent was clipped away (the forward detector of a laser along
    x); every arrow end now lies inside the axes limits."""
    plotting.plot_geometry(_results(times=False, laser=laser), tmp_path / "geometry.png")
    fig = figures["geometry.png"]
    fig.canvas.draw()
    for ax in fig.axes[:3]:
        arrows = [c for c in ax.get_children() if c.__class__.__name__ == "Annotation"]
        assert arrows
        (x0, x1), (y0, y1) = ax.get_xlim(), ax.get_ylim()
        for a in arrows:
            for x, y in (a.xy, a.xyann):
                assert x0 <= x <= x1 and y0 <= y <= y1, (ax.get_title(), (x, y))


@pytest.mark.parametrize("times", [True, False])
def test_g2_figure_draws_every_detector_and_all_light(figures, tmp_path, times):
    plotting.plot_all(_results(times=times), tmp_path)
    fig = figures["g2.png"]
    if times:
        assert [ax.get_title() for ax in fig.axes] == ["forward (0° from laser)", "side (90° from laser)",
                                                         "all emitted light"]
        assert all(ax.get_ylabel() == "g2(0)" for ax in fig.axes)
    else:
        ax = fig.axes[0]
        assert [t.get_text() for t in ax.get_xticklabels()] == ["forward (0° from laser)",
                                                               "side (90° from laser)", "all emitted light"]


def test_values_out_of_physical_bounds_are_marked_in_the_figures(figures, tmp_path):
    """A level whose run was flagged (attrs['unphysical'] of its own run, beyondmf.physicality) is named in
    each panel that shows the flagged observable, and the region below zero is shaded."""
    ds = _results(times=True)
    ds["g2"][1, 2:, 1] = -0.4
    ds.attrs["levels"] = {"meanfield": {"unphysical": []}, "twa": {"unphysical": ["g2"]}}
    plotting.plot_all(ds, tmp_path)
    def notes(ax):
        return [t.get_text() for t in ax.get_legend().get_texts() if "physical bounds" in t.get_text()]

    by_title = {ax.get_title(): notes(ax) for ax in figures["g2.png"].axes}
    assert by_title["side (90° from laser)"] == ["twa: g2 out of physical bounds\n(see its warnings)"]
    assert by_title["all emitted light"] == []  # g2_total was not flagged
    assert all(not notes(ax) for ax in figures["emission.png"].axes)
