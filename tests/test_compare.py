"""Comparison of levels: statistics of the corrections and the verdicts, on cases with known answers."""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
from scipy import stats

import beyondmf as bm
from beyondmf.compare import summarize, verdict_table
from beyondmf.sweep import compare_levels


def _per_realization(values: dict[str, np.ndarray], stderr: dict | None = None) -> xr.Dataset:
    levels = list(values)
    data = {"emission_rate": (("level", "realization"), np.array([values[lv] for lv in levels]))}
    if stderr:
        data["emission_rate_stderr"] = (("level", "realization"), np.array([stderr[lv] for lv in levels]))
    return xr.Dataset(data, coords={"level": levels, "realization": np.arange(len(values[levels[0]]))})


def test_paired_interval_is_the_t_interval_when_the_baseline_does_not_vary():
    # With a constant baseline X_b the correction is d̄/X_b and its interval the paired Student-t
    # interval t_{K-1} s(d)/√K / X_b (handbook formula: e.g. scipy.stats.t.interval).
    rng = np.random.default_rng(5)
    d = rng.normal(0.03, 0.02, size=6)
    ds = _per_realization({"base": np.full(6, 2.0), "other": 2.0 + d})
    s = summarize(ds, baseline="base", tolerance=0.1, observables=["emission_rate"])
    lo, hi = stats.t.interval(0.95, 5, loc=d.mean(), scale=d.std(ddof=1) / np.sqrt(6))
    assert float(s["emission_rate_correction"].sel(level="other")) == pytest.approx(d.mean() / 2, rel=1e-12)
    assert float(s["emission_rate_correction_low"].sel(level="other")) == pytest.approx(lo / 2, rel=1e-10)
    assert float(s["emission_rate_correction_high"].sel(level="other")) == pytest.approx(hi / 2, rel=1e-10)


def test_verdicts_on_constructed_cases():
    base = np.array([1.0, 2.0, 3.0, 4.0])  # the draws differ a lot; the paired differences do not
    ds = _per_realization({
        "meanfield": base,
        "close": base * 1.01,            # 1 % everywhere: holds within 5 %
        "far": base * 1.30,              # 30 %: fails
        "straddling": base * np.array([1.0, 1.10, 0.98, 1.12]),  # mean ~5 %, wide interval
    })
    s = summarize(ds, baseline="meanfield", tolerance=0.05, observables=["emission_rate"])
    v = dict(zip(s["level"].values, s["emission_rate_verdict"].values, strict=True))
    assert v == {"meanfield": "baseline", "close": "holds", "far": "fails", "straddling": "undecided"}
    assert float(s["emission_rate_correction"].sel(level="far")) == pytest.approx(0.30, rel=1e-12)
    # the draw-to-draw spread sets the uncertainty of the mean, not the width of the paired interval
    assert float(s["emission_rate_stderr"].sel(level="close")) == pytest.approx(
        1.01 * base.std(ddof=1) / 2, rel=1e-12)
    assert float(s["emission_rate_correction_high"].sel(level="close")) == pytest.approx(0.01, abs=1e-12)
    assert s.attrs["tolerance"] == 0.05 and "Student-t" in s.attrs["interval"]


def test_sampling_error_of_a_stochastic_level_enters_in_quadrature():
    # one realization: only the sampling error is left; u = σ and the interval is ±1.96 σ / X_b (normal)
    ds = _per_realization({"meanfield": np.array([2.0]), "sampled": np.array([2.1])},
                          {"meanfield": np.array([0.0]), "sampled": np.array([0.05])})
    s = summarize(ds, baseline="meanfield", tolerance=0.2, observables=["emission_rate"])
    assert float(s["emission_rate_stderr"].sel(level="sampled")) == pytest.approx(0.05)
    half = float(s["emission_rate_correction_high"].sel(level="sampled")) - 0.05
    assert half == pytest.approx(stats.norm.ppf(0.975) * 0.05 / 2.0, rel=1e-10)
    assert str(s["emission_rate_verdict"].sel(level="sampled").values) == "holds"
    # a tolerance inside the interval: undecided
    s = summarize(ds, baseline="meanfield", tolerance=0.06, observables=["emission_rate"])
    assert str(s["emission_rate_verdict"].sel(level="sampled").values) == "undecided"


def test_a_zero_baseline_gives_an_undefined_verdict():
    ds = _per_realization({"meanfield": np.zeros(3), "other": np.array([0.0, 0.1, 0.2])})
    s = summarize(ds, baseline="meanfield", observables=["emission_rate"])
    assert str(s["emission_rate_verdict"].sel(level="other").values) == "undefined"


def test_bad_arguments_are_explained():
    ds = _per_realization({"meanfield": np.ones(2)})
    with pytest.raises(ValueError, match="baseline level 'exact'"):
        summarize(ds, baseline="exact")
    with pytest.raises(ValueError, match="tolerance"):
        summarize(ds, tolerance=-1, observables=["emission_rate"])
    with pytest.raises(ValueError, match="g2"):
        summarize(ds, observables=["g2"])


_PAIR = np.array([[0.0, 0, 0], [0.4, 0, 0]])


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"realizations": 2.5}, "realizations must be a positive integer, got 2.5"),
        ({"seed": 1.5}, "seed must be a non-negative integer"),
        ({"seed": -1}, "seed must be a non-negative integer"),
        ({"positions": [_PAIR, _PAIR[:1]], "realizations": 2}, "different numbers of emitters .1, 2."),
        ({"levels": {"meanfield": {}, "cumulant2": 1e-6}}, r"levels\['cumulant2'\] must be a table"),
        ({"observables": "emission_rate"}, "observables must be a list of names"),
        ({"model": {"rabbi": 1.0}}, "model= got 'rabbi'; it takes the arguments of beyondmf.Model"),
        ({"model": {"positions": _PAIR}}, "model= got 'positions'"),
        ({"detectors": {"a": {"angle": 60, "x": 1}}}, "detector 'a': a table takes 'angle'"),
    ],
)
def test_bad_compare_levels_arguments_are_refused_before_anything_runs(kwargs, match, tmp_path):
    args = {"positions": _PAIR, "levels": ["meanfield"], "model": {"rabi": 0.5}, "out": tmp_path / "out"}
    with pytest.raises(ValueError, match=match):
        compare_levels(**(args | kwargs))
    assert not (tmp_path / "out").exists()


def test_the_mean_population_of_a_sampled_level_carries_its_sampling_error():
    # Two emitters 50 λ0 apart (independent): P = Σ_i ρ_ee,i, so excited_mean = P/2 exactly at every
    # level, and its correction equals the emission rate's. With 50 trajectories its sampling error must
    # widen the interval as it does the rate's (it was taken as exact, giving a firm verdict from noise).
    pos = np.array([[0.0, 0, 0], [50.0, 0, 0]])
    s = compare_levels(pos, {"exact": {}, "jumps": {"samples": 50}}, seed=2, baseline="exact",
                       model={"rabi": 1.0}, tolerance=0.02, observables=["emission_rate", "excited_mean"])
    j = {"level": "jumps"}
    assert float(s["excited_mean_stderr"].sel(j)) > 0
    for name in ("emission_rate", "excited_mean"):
        assert str(s[f"{name}_verdict"].sel(j).values) == "undecided"
    # the mean of the emitters' errors bounds the error of their mean; for independent emitters it is
    # within √2 of the rate's own error, which is exact here
    rate, mean = float(s["emission_rate_stderr"].sel(j)), float(s["excited_mean_stderr"].sel(j))
    assert rate / 2 <= mean + 1e-12 and mean <= rate / 2 * np.sqrt(2) + 1e-12


def test_compare_levels_refuses_an_out_that_is_a_file(tmp_path):
    (tmp_path / "afile").write_text("")
    with pytest.raises(ValueError, match="is a file; give a directory"):
        compare_levels(_PAIR, ["meanfield"], out=tmp_path / "afile")


def _deterministic_levels() -> list[str]:
    return [name for name in bm.available_levels() if not bm.get_level(name).stochastic]


def test_single_emitter_every_deterministic_level_agrees_with_mean_field():
    # One emitter: mean field is exact (conventions.md; the optical Bloch equations), and the steady
    # excited population is (s/2)/(1 + s) with s = 2Ω²/(1 + 4Δ²) (textbook two-level result, e.g.
    # Foot, Atomic Physics (OUP 2005), eq. 7.84, from memory); P = Γ0 · that population.
    rabi, det = 1.3, 0.4
    levels = {name: {} for name in _deterministic_levels()}
    levels["meanfield_tight"] = {"level": "meanfield", "rtol": 1e-10, "atol": 1e-12}
    s = compare_levels(np.zeros((1, 3)), levels, model={"rabi": rabi, "detuning": det}, tolerance=1e-4,
                       detectors={"forward": (0, 0, 1), "side": (0, 1, 0)})
    sat = 2 * rabi**2 / (1 + 4 * det**2)
    np.testing.assert_allclose(s["emission_rate"].values, sat / 2 / (1 + sat), rtol=1e-5)
    table = verdict_table(s)
    for lv in levels:
        if lv != "meanfield":
            assert table[lv]["emission_rate"] == "holds", (lv, table[lv])
            assert table[lv]["intensity"] == "holds", (lv, table[lv])
            # g2 of one emitter is 0 (σ⁺σ⁺ = 0): no relative correction exists
            assert table[lv]["g2"] == "undefined"
    assert s["emission_rate_realizations"].dims == ("level", "realization")


def test_compare_levels_uses_the_same_draws_at_every_level(tmp_path):
    def disc(seed):
        return bm.geometry.ellipsoid_cloud(4, [1.0, 1.0, 0.2], seed=seed, min_distance=0.05)

    levels = {"meanfield": {}, "meanfield_tight": {"level": "meanfield", "rtol": 1e-10, "atol": 1e-12}}
    s = compare_levels(disc, levels, realizations=3, seed=2, model={"rabi": 1.0}, times=np.linspace(0, 2, 5),
                       tolerance=1e-3, out=tmp_path)
    per = s["emission_rate_realizations"]
    # different draws differ, the same draw at two tolerances agrees to the solver tolerance
    assert float(abs(per.sel(level="meanfield", realization=0) - per.sel(level="meanfield", realization=1))
                 .isel(time=-1)) > 1e-3
    np.testing.assert_allclose(per.sel(level="meanfield"), per.sel(level="meanfield_tight"), rtol=1e-4)
    verdict = s["emission_rate_verdict"].sel(level="meanfield_tight").values
    assert verdict[0] == "undefined"  # t = 0 from the ground state: P = 0, no relative correction
    assert set(verdict[1:]) == {"holds"} and verdict_table(s)["meanfield_tight"]["emission_rate"] == "holds"
    assert len(list((tmp_path / "tasks").glob("*.nc"))) == 6

    # the saved comparison alone says what was run (conventions.md, "data contract"): positions of every
    # realization, every model argument, the run, each label's level and options, seed, N, versions
    bm.save(s, tmp_path / "comparison.nc")
    back = bm.load(tmp_path / "comparison.nc")
    np.testing.assert_array_equal(back["positions"].sel(realization=2),
                                  disc(bm.sweep.realization_seeds(2, 2)[0]))
    assert back.attrs["model"] == {"dipole": [1, 0, 0], "coupling": "vector", "rabi": 1, "detuning": 0,
                                   "laser": [0, 0, 1], "envelope": None, "beam": None}
    assert back.attrs["run"]["calculation"] == "evolve" and back.attrs["run"]["times"][-1] == 2
    entry = back.attrs["level_options"]["meanfield_tight"]
    assert {k: entry[k] for k in ("level", "options")} == {"level": "meanfield",
                                                            "options": {"rtol": 1e-10, "atol": 1e-12}}
    # as the level ran: every option, defaults included, and what "auto" chose
    assert entry["as_run"]["rtol"] == 1e-10 and entry["as_run"]["max_steps"] == bm.level_options("meanfield")[
        "max_steps"]
    assert entry["as_run"]["solver_chosen"] in ("Tsit5", "Kvaerno5")
    assert back.attrs["seed"] == 2 and back.attrs["N"] == 4
    assert back.attrs["beyondmf_version"] == bm.__version__


def test_a_levels_own_warnings_reach_the_comparison(tmp_path):
    # In this dense cloud (n·λ0³ ≈ 38, closest pair 0.1 λ0) both levels have something to say: twa's vacuum
    # control (docs/twa.md §7) and mean field's calibrated regime rule (a pair coupled by more than 1 Γ0,
    # docs/calibration.md). The comparison must carry which runs warned and keep each level's messages with
    # that level, not lose them in the task files (common practice: a result that says it is unreliable
    # stays marked as such).
    pos = bm.geometry.ellipsoid_cloud(20, 0.5, seed=3, min_distance=0.1)
    levels = {"meanfield": {"level": "meanfield"},
              "twa": {"level": "twa", "samples": 64, "vacuum_check": 64, "chunk": 64}}
    with pytest.warns(UserWarning, match="vacuum_excitation"):
        s = compare_levels(pos, levels, realizations=1, model={"rabi": 0.3}, times=[0.0, 2.0, 4.0],
                           out=tmp_path)
    warned = s["warned_realizations"]
    assert int(warned.sel(level="twa")) == 1 and int(warned.sel(level="meanfield")) == 1
    msgs = s.attrs["warnings"]
    assert any("vacuum_excitation" in w for w in msgs)
    # every message says which level it is about; twa's vacuum control never lands with mean field
    assert all(w.startswith(("twa", "meanfield")) for w in msgs), msgs
    assert not any("vacuum_excitation" in w for w in msgs if w.startswith("meanfield"))
    # the task files keep each run's own messages
    files = {bm.load(p).attrs["level"]: bm.load(p) for p in (tmp_path / "tasks").glob("*.nc")}
    mf, tw = files["meanfield"].attrs["warnings"], files["twa"].attrs["warnings"]
    assert mf and all("vacuum_excitation" not in w for w in mf)
    assert any("coupled by" in w or "coupling strength" in w for w in mf), mf
    assert any("vacuum_excitation" in w for w in tw)


def test_recorded_warnings_still_obey_the_callers_filters():
    import warnings

    m = bm.Model(positions=np.zeros((1, 3)), rabi=1.0)
    with warnings.catch_warnings():
        warnings.simplefilter("error", UserWarning)
        with pytest.raises(UserWarning, match="had not settled"):
            bm.steady(m, "twa", seed=5, samples=100, settle_time=0.0, window=4.0, window_points=40)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ds = bm.steady(m, "twa", seed=5, samples=100, settle_time=0.0, window=4.0, window_points=40)
    assert any("had not settled" in w for w in ds.attrs["warnings"])


def test_run_warnings_are_kept_apart_between_threads():
    # A dask worker may run several tasks in threads; each run must keep only its own messages
    # (common practice: per-context state, here a contextvars.ContextVar).
    import threading
    import warnings

    from beyondmf._notes import collecting, warn

    barrier, got = threading.Barrier(2), {}

    def run(name):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with collecting() as said:
                barrier.wait()
                warn(f"from {name}")
                barrier.wait()
                warn(f"from {name}")  # the same message twice is recorded once
        got[name] = said

    threads = [threading.Thread(target=run, args=(n,)) for n in ("a", "b")]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert got == {"a": ["from a"], "b": ["from b"]}


def test_samples_that_all_agree_do_not_make_a_verdict_certain():
    """After every trajectory has decayed the sampled rate is 0 with a standard error of exactly 0 while the
    exact rate is small but positive: the zero-width interval [−1, −1] must not read "fails" (a sample that
    shows no event bounds its probability only to ~3/S: the "rule of three", J. A. Hanley, A. Lippman-Hand,
    JAMA 249, 1743 (1983), from memory). Where the samples agree with the baseline (t = 0 from a product
    state) the zero-width interval stands; a deterministic level's explicit zero error is not affected."""
    levels = ["dicke", "jumps", "meanfield"]
    P = np.array([[[1.0, 0.0044]], [[1.0, 0.0]], [[1.0, 0.0040]]])  # (level, realization, time)
    ds = xr.Dataset(
        {"emission_rate": (("level", "realization", "time"), P),
         "emission_rate_stderr": (("level", "realization", "time"), np.zeros_like(P))},
        coords={"level": levels, "realization": [0], "time": [0.0, 3.0]})
    # jumps reports sampling errors elsewhere (a third time point, mid-burst: 2 ± 2 %, holds within 10 %)
    mid = ds.isel(time=[0]).assign_coords(time=[1.0])
    mid["emission_rate"][:] = [[[0.5]], [[0.51]], [[0.53]]]
    mid["emission_rate_stderr"][:] = [[[0.0]], [[0.01]], [[0.0]]]
    ds = xr.concat([ds.isel(time=[0]), mid, ds.isel(time=[1])], dim="time")
    s = summarize(ds, baseline="dicke", tolerance=0.1, observables=["emission_rate"])
    v = s["emission_rate_verdict"]
    assert list(v.sel(level="jumps").values) == ["holds", "holds", "undecided"]
    # meanfield: deterministic, 9 % off at t = 3 with no error of its own: "holds" as before
    assert list(v.sel(level="meanfield").values) == ["holds", "holds", "holds"]


def test_correction_figure_fits_its_corrections_and_labels_the_grid(tmp_path, monkeypatch):
    """The y-range follows the corrections drawn (it was a fixed ±1.5, on which a few % lay flat on
    zero), never narrower than the tolerance; a grid spanning a decade is logarithmic, and a density
    axis says n·λ0³."""
    from beyondmf.figures import sweeps as correction_plots

    density = np.array([0.1, 0.5, 2.0])
    rng = np.random.default_rng(0)
    base = 1.0 + rng.normal(0, 0.001, (3, 4))
    figures = {}

    def keep(fig, path):
        figures[path.name] = fig
        return path

    monkeypatch.setattr(correction_plots, "_save", keep)
    limits = {}
    for largest in (0.03, 0.3):
        other = base * (1 + largest * density[:, None] / 2.0)
        per = xr.Dataset(
            {"emission_rate": (("density", "level", "realization"), np.stack([base, other], axis=1))},
            coords={"density": density, "level": ["exact", "meanfield"], "realization": np.arange(4)})
        per["density"].attrs["parameter"] = "geometry.density"
        s = summarize(per, baseline="exact", tolerance=0.1, observables=["emission_rate"])
        correction_plots.plot_sweep(s, tmp_path)
        ax = figures["corrections.png"].axes[0]
        low, high = ax.get_ylim()
        assert low == -high
        limits[largest] = high
        assert ax.get_xscale() == "log" and ax.get_xlabel() == "density n·λ0³"
        assert figures["values.png"].axes[0].get_xlabel() == "density n·λ0³"
    assert limits[0.03] == pytest.approx(0.11)  # the tolerance lines, ±0.1, with a margin
    assert 0.3 * 1.1 <= limits[0.3] < 0.36  # the largest correction (0.3 and its interval), with a margin


def test_a_log_grid_is_labelled_at_its_points_and_negative_g2_keeps_a_linear_axis(tmp_path, monkeypatch):
    """Minor tick labels of a log axis ran into each other ("3×10⁻¹4×10⁻¹…"); a g2 spanning a factor 100
    was put on a log axis even when some values were negative, which then vanished."""
    from beyondmf.figures import sweeps as correction_plots

    figures = {}
    monkeypatch.setattr(correction_plots, "_save", lambda fig, path: figures.setdefault(path.name, fig))
    density = np.array([0.3, 1.0, 3.0])
    g2 = np.array([[[1.0, 1.1], [0.9, 1.0]], [[1.2, 1.0], [-19.6, -5.8]], [[1.1, 1.0], [0.01, 0.02]]])
    dims = ("density", "level", "realization")
    per = xr.Dataset({"g2_total": (dims, g2), "emission_rate": (dims, np.ones_like(g2))},
                     coords={"density": density, "level": ["exact", "twa"], "realization": [0, 1]})
    per["density"].attrs["parameter"] = "geometry.density"
    s = summarize(per, baseline="exact", tolerance=0.1, observables=["g2_total", "emission_rate"])
    correction_plots.plot_sweep(s, tmp_path)
    for name in ("values.png", "corrections.png"):
        fig = figures[name]
        fig.canvas.draw()
        ax = fig.axes[0]
        assert ax.get_xscale() == "log", name
        assert [t.get_text() for t in ax.get_xticklabels()] == ["0.3", "1", "3"], name
        assert not any(t.get_text() for t in ax.get_xticklabels(minor=True)), name
    assert figures["values.png"].axes[0].get_yscale() == "linear"


def _legend_objects(ax) -> list:
    return ax.findobj(lambda o: o.__class__.__name__ == "Legend")


def _legend_texts(ax) -> list[list[str]]:
    return [[t.get_text() for t in leg.get_texts()] for leg in _legend_objects(ax)]


def _boxes_overlap(fig, ax) -> bool:
    fig.canvas.draw()
    boxes = [leg.get_window_extent() for leg in _legend_objects(ax)]
    return any(a.overlaps(b) for k, a in enumerate(boxes) for b in boxes[k + 1:])


@pytest.mark.parametrize("observables", [["emitted", "emission_rate"], ["emission_rate", "emitted"]])
def test_figures_colour_curves_by_level_and_style_them_by_grid_point(tmp_path, monkeypatch, observables):
    """Time curves of a sweep: one colour per level (as in every other panel and legend), one line style
    per grid point, with a grey legend of the styles, in values.png and corrections.png (which drew the
    grid's first point only before); the style legend and the level legend never cover each other, also
    when the time panel is the first one, which carries the level legend."""
    from beyondmf.figures import sweeps as correction_plots

    figures = {}
    monkeypatch.setattr(correction_plots, "_save", lambda fig, path: figures.setdefault(path.name, fig))
    t = np.linspace(0, 1, 4)
    rate = np.ones((2, 2, 3, 4)) * (1 + t)  # (density, level, realization, time)
    per = xr.Dataset({"emission_rate": (("density", "level", "realization", "time"), rate),
                      "emitted": (("density", "level", "realization"), rate[..., -1])},
                     coords={"density": [3.0, 0.3], "level": ["exact", "qsd_product"],
                             "realization": np.arange(3), "time": t})
    s = summarize(per, baseline="exact", tolerance=0.1, observables=observables)
    correction_plots.plot_sweep(s, tmp_path)
    styles = ["density=3", "density=0.3"]
    for name, levels, colours in (("values.png", ["exact", "qsd_product"], ["C0", "C0", "C1", "C1"]),
                                  ("corrections.png", ["qsd_product"], ["C1", "C1"])):
        fig = figures[name]
        ax = next(a for a in fig.axes if a.get_xlabel() == "time (1/Γ0)")
        curves = [ln for ln in ax.get_lines() if len(ln.get_xdata()) == t.size]
        assert [ln.get_color() for ln in curves] == colours, name
        assert [ln.get_linestyle() for ln in curves] == ["-", "--"] * (len(colours) // 2), name
        assert styles in _legend_texts(ax), name
        assert any(texts[: len(levels)] == levels for texts in _legend_texts(fig.axes[0])), name
        assert not _boxes_overlap(fig, fig.axes[0]), name


def test_compare_levels_takes_flat_position_arrays_and_records_them_as_emitters():
    """Positions given as flat (3N,) arrays run as (N, 3) ones do, and are saved in that shape."""
    flat = [np.array([0.0, 0, 0, 0.4, 0, 0]), np.array([0.0, 0, 0, 0, 0.5, 0])]
    s = compare_levels(flat, ["meanfield"], realizations=2, model={"rabi": 0.5})
    assert s["positions"].shape == (2, 2, 3)
    np.testing.assert_array_equal(s["positions"].sel(realization=1), flat[1].reshape(2, 3))
