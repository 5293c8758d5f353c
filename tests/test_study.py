"""Study-file validation: every check runs when the file is read, before any level or task is computed.

Parse-only (no level runs) except where a test says otherwise.
"""

from __future__ import annotations

import re
import textwrap
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from beyondmf import cli
from beyondmf import study as study_mod
from beyondmf.study import StudyError, detector_direction, parse_study
from beyondmf.sweep import EXTRA_OBSERVABLES, read_study, realization_seeds, study_tasks
from beyondmf.tasks import task_key

ROOT = Path(__file__).resolve().parents[1]

BASE = """
[geometry]
kind = "ellipsoid"
n = 4
semi_axes = [1.0, 1.0, 0.2]
min_distance = 0.08
[drive]
rabi = 1.0
[run]
t_end = 2.0
points = 3
[levels.meanfield]
[levels.cumulant2]
"""

NO_LEVELS = BASE.split("[levels.meanfield]")[0]
STEADY = BASE.replace("[run]\nt_end = 2.0\npoints = 3", '[run]\ncalculation = "steady"')


def _read(tmp_path, text, quick=False):
    path = tmp_path / "study.toml"
    path.write_text(textwrap.dedent(text))
    return read_study(path, quick=quick)


def _refused(tmp_path, text, key, quick=False):
    """The study is refused when read, with a message that starts with ``key``."""
    with pytest.raises(StudyError) as info:
        _read(tmp_path, text, quick=quick)
    assert str(info.value).startswith(f"{key}:"), str(info.value)
    return str(info.value)


def _cli(tmp_path, text, capsys):
    path = tmp_path / "study.toml"
    path.write_text(textwrap.dedent(text))
    code = cli.main(["run", str(path), "--out", str(tmp_path / "out"), "--no-plots"])
    return code, capsys.readouterr().err


# --- 1. checks that used to fire only after every task was computed -----------------------------------


def test_compare_baseline_that_is_not_a_level_is_refused_when_read(tmp_path):
    msg = _refused(tmp_path, BASE + '[compare]\nbaseline = "exact"\n', "compare.baseline")
    assert "'exact' is not among the study's levels (meanfield, cumulant2)" in msg
    # the default baseline, meanfield, must be a level of the study too
    text = BASE.replace("[levels.meanfield]\n", "[levels.exact]\n") + "[compare]\ntolerance = 0.1\n"
    assert "(the default)" in _refused(tmp_path, text, "compare.baseline")
    study = _read(tmp_path, BASE + '[compare]\nbaseline = "cumulant2"\n')
    assert study.extra["compare"].baseline == "cumulant2"


def test_bad_baseline_stops_the_command_before_any_task(tmp_path, capsys):
    code, err = _cli(tmp_path, BASE + '[compare]\nbaseline = "exact"\n', capsys)
    assert code == cli.EXIT_USAGE
    assert err.strip().splitlines() == [err.strip()] and "error: compare.baseline:" in err
    assert not (tmp_path / "out" / "tasks").exists() and not (tmp_path / "out" / "results.nc").exists()


GRID = '[sweep]\n[sweep.grid]\n"levels.cumulant2.rtol" = [1e-4, 1e-6]\n'


@pytest.mark.parametrize(
    "convergence, key, fragment",
    [
        ('dimension = "samples"\nlevel = "cumulant2"', "convergence.dimension",
         "'samples' is not a grid dimension of the sweep; name one of its dimensions: rtol"),
        ('dimension = "rtol"\nlevel = "twa"', "convergence.level",
         "'twa' is not among the study's levels (meanfield, cumulant2)"),
        ('dimension = "rtol"\nlevel = "cumulant2"\nobservables = ["brightness"]', "convergence.observables",
         "brightness not in the results"),
    ],
)
def test_convergence_names_that_do_not_exist_are_refused_when_read(tmp_path, convergence, key, fragment):
    msg = _refused(tmp_path, BASE + GRID + "[convergence]\n" + convergence + "\n", key)
    assert fragment in msg


@pytest.mark.parametrize(
    "values, fragment",
    [
        ("[1e-4, 1e-6, 1e-5]", "must run from coarse to fine, strictly increasing or decreasing"),
        ("[1e-6, 1e-4]", "list the values of 'rtol' from coarse to fine, decreasing"),
    ],
)
def test_convergence_refuses_a_refinement_listed_out_of_order(tmp_path, values, fragment):
    # the criterion judges the last step of the list (beyondmf.convergence), so it must be a refinement
    grid = GRID.replace("[1e-4, 1e-6]", values)
    msg = _refused(tmp_path, BASE + grid + '[convergence]\ndimension = "rtol"\nlevel = "cumulant2"\n',
                   "convergence.dimension")
    assert fragment in msg


def test_refinement_order_follows_the_option_also_under_a_full_path_name(tmp_path):
    # two grid paths that end alike name their dimensions by the whole path
    grid = ('[sweep]\n[sweep.grid]\n"levels.cumulant2.rtol" = [1e-6, 1e-4]\n'
            '"levels.meanfield.rtol" = [1e-4, 1e-6]\n')
    conv = '[convergence]\ndimension = "{}"\nlevel = "{}"\n'
    msg = _refused(tmp_path, BASE + grid + conv.format("levels_cumulant2_rtol", "cumulant2"),
                   "convergence.dimension")
    assert "list the values of 'levels_cumulant2_rtol' from coarse to fine, decreasing" in msg
    _read(tmp_path, BASE + grid + conv.format("levels_meanfield_rtol", "meanfield"))


def test_a_refinement_with_a_non_numeric_value_is_read(tmp_path):
    # dt = "auto" has no order; the convergence table skips such a parameter's order too
    text = (BASE + "[levels.twa]\nsamples = 20\n"
            + '[sweep]\n[sweep.grid]\n"levels.twa.dt" = ["auto", 0.01]\n'
            + '[convergence]\ndimension = "dt"\nlevel = "twa"\n')
    assert _read(tmp_path, text).extra["convergence"].dim == "dt"


def test_convergence_without_a_grid_is_refused(tmp_path):
    msg = _refused(tmp_path, BASE + '[convergence]\ndimension = "rtol"\nlevel = "cumulant2"\n',
                   "convergence.dimension")
    assert "no [sweep.grid]" in msg


def test_convergence_observables_follow_compare_and_the_time_axis(tmp_path):
    ok = _read(tmp_path, BASE + GRID + '[convergence]\ndimension = "rtol"\nlevel = "cumulant2"\n'
               'observables = ["emission_rate_peak", "excited_mean", "intensity_coherent"]\n')
    assert ok.extra["convergence"].observables == ("emission_rate_peak", "excited_mean", "intensity_coherent")
    # with [compare], only its observables are in the results
    text = BASE + GRID + ('[compare]\nobservables = ["g2"]\n'
                          '[convergence]\ndimension = "rtol"\nlevel = "cumulant2"\n')
    assert "emission_rate, g2_total not in the results" in _refused(tmp_path, text, "convergence.observables")
    # a late-time sweep has no peak
    text = BASE + GRID.replace("[sweep]\n", '[sweep]\nkeep = "last_time"\n') + (
        '[convergence]\ndimension = "rtol"\nlevel = "cumulant2"\nobservables = ["peak_time"]\n')
    _refused(tmp_path, text, "convergence.observables")


@pytest.mark.parametrize("obs", ["emission_rate_peak", "peak_time", "emitted"])
def test_time_observables_are_refused_without_a_time_axis(tmp_path, obs):
    compare = f'[compare]\nobservables = ["{obs}", "emission_rate"]\n'
    assert "this study is steady" in _refused(tmp_path, STEADY + compare, "compare.observables")
    late = BASE + '[sweep]\nkeep = "last_time"\n' + compare
    assert "keep = 'all'" in _refused(tmp_path, late, "compare.observables")
    assert obs in _read(tmp_path, BASE + compare).extra["compare"].observables  # a dynamics run has them


# Each: (level, option = value) → the message's key and what it must say.
_VACUUM_CHOICES = ("'auto' (as many control samples as the run, at least 64), 0 (off) or a number of control "
                   "samples ≥ 2")
BAD_OPTIONS = [
    ("twa", "samples = -10", "an integer ≥ 2"),
    ("twa", "samples = 1", "an integer ≥ 2"),
    ("jumps", "samples = 1", "an integer ≥ 2"),
    ("twa", "dt = -1", "'auto' or a positive time step"),
    ("twa", "dt = 0", "'auto' or a positive time step"),
    ("twa", 'dt = "fast"', "'auto' or a positive time step"),
    ("jumps", "dt = -0.5", "'auto' or a positive time step"),
    ("twa", "chunk = 0", "'auto' or an integer ≥ 1"),
    ("jumps", "chunk = 2.5", "'auto' or an integer ≥ 1"),
    ("twa", "max_failed = 1", "a fraction in [0, 1)"),
    ("twa", "max_failed = -0.1", "a fraction in [0, 1)"),
    ("twa", "window = 0", "a positive time"),
    ("twa", "settle_time = -1", "a time ≥ 0"),
    ("jumps", "settle_time = 0", "a positive time"),
    ("twa", "window_points = 0", "an integer ≥ 1"),
    ("twa", "vacuum_check = 1", _VACUUM_CHOICES),
    ("twa", "vacuum_check = -2", _VACUUM_CHOICES),
    ("meanfield", "rtol = 0", "a positive number"),
    ("cumulant2", "atol = -0.001", "a positive number"),
    ("exact", "max_steps = 0", "a positive integer"),
    ("dicke", "dtmin = -1", "a positive number"),
    ("meanfield", 'solver = "rk4"', "'auto' or one of Tsit5"),
    ("meanfield", 'progress = "yes"', "'auto', true or false"),
]


@pytest.mark.parametrize("level, setting, what", BAD_OPTIONS)
def test_level_option_values_are_range_checked_when_read(tmp_path, level, setting, what):
    first = "" if level == "meanfield" else "[levels.meanfield]\n"  # a level before it, as in a study
    text = NO_LEVELS + first + f"[levels.{level}]\n{setting}\n"
    option, value = (p.strip() for p in setting.split("="))
    msg = _refused(tmp_path, text, f"levels.{level}.{option}")
    assert f"{option}: {option} must be {what}" in msg and msg.endswith(f"got {value}".replace('"', "'")), msg


def test_a_bad_option_of_a_later_level_stops_the_run_before_the_first_level(tmp_path, capsys):
    text = BASE.replace("[levels.cumulant2]\n", "[levels.twa]\nsamples = -10\n")
    code, err = _cli(tmp_path, text, capsys)
    assert code == cli.EXIT_USAGE
    assert err.strip() == "beyondmf run: error: levels.twa.samples: samples must be an integer ≥ 2, got -10"
    assert "level meanfield" not in err and not (tmp_path / "out" / "results.nc").exists()


def test_grid_values_of_a_level_option_are_checked_when_read(tmp_path):
    text = BASE.replace("[levels.cumulant2]\n", "[levels.twa]\n") + (
        '[sweep]\n[sweep.grid]\n"levels.twa.samples" = [100, 1]\n')
    msg = _refused(tmp_path, text, "levels.twa.samples")
    assert "(at the grid point levels.twa.samples = 1)" in msg


def test_the_levels_own_option_check_is_called_and_named(tmp_path, monkeypatch):
    """A level's model-free `validate_options`, where it has one, runs when the file is read; an
    `OptionError` is reported at the option's key, any other refusal at the level's table."""
    from beyondmf.levels.base import OptionError
    from beyondmf.levels.meanfield import MeanField

    def validate(self, options):
        if options["max_steps"] == 7:
            raise OptionError("max_steps", "must not be 7 for this test; use any other number")
        if options["max_steps"] == 9:
            raise ValueError("nine steps and this rtol do not go together")

    monkeypatch.setattr(MeanField, "validate_options", validate, raising=False)
    msg = _refused(tmp_path, BASE.replace("[levels.meanfield]\n", "[levels.meanfield]\nmax_steps = 7\n"),
                   "levels.meanfield.max_steps")
    assert msg.endswith("levels.meanfield.max_steps: max_steps must not be 7 for this test; use any other "
                        "number")
    msg = _refused(tmp_path, BASE.replace("[levels.meanfield]\n", "[levels.meanfield]\nmax_steps = 9\n"),
                   "levels.meanfield")
    assert msg.endswith("levels.meanfield: nine steps and this rtol do not go together")
    _read(tmp_path, BASE.replace("[levels.meanfield]\n", "[levels.meanfield]\nmax_steps = 8\n"))


# --- 2. "auto" or a number ------------------------------------------------------------------------------


@pytest.mark.parametrize("level", ["twa", "jumps"])
@pytest.mark.parametrize("setting, value", [("dt = 0.01", 0.01), ("dt = 1", 1), ('dt = "auto"', "auto"),
                                            ("chunk = 5", 5), ('chunk = "auto"', "auto")])
def test_auto_options_take_auto_or_a_number(tmp_path, level, setting, value):
    text = BASE.replace("[levels.cumulant2]\n", f"[levels.{level}]\nsamples = 10\n{setting}\n")
    study = _read(tmp_path, text)
    assert study.levels[level][setting.split(" =")[0]] == value


def test_a_third_party_auto_option_takes_a_number():
    """Options of levels without rules are judged by their default; a default "auto" takes a number."""
    check, what = study_mod.schema._option_check("auto")
    assert check(0.5) and check(3) and check("auto") and check(True) and not check([1])
    assert "a number" in what


# --- 3. seeds of a sweep --------------------------------------------------------------------------------


RANDOM_SWEEP = BASE + "[sweep]\nrealizations = 2\nseed = 3\n"


def test_geometry_seed_in_a_sweep_is_refused(tmp_path):
    text = RANDOM_SWEEP.replace("min_distance = 0.08", "min_distance = 0.08\nseed = 4")
    assert "set seed in [sweep]" in _refused(tmp_path, text, "geometry.seed")
    # a [compare] study runs as tasks as well
    text = BASE.replace("min_distance = 0.08", "min_distance = 0.08\nseed = 4") + "[compare]\n"
    _refused(tmp_path, text, "geometry.seed")


def test_run_seed_in_a_sweep_is_refused(tmp_path):
    text = RANDOM_SWEEP.replace("points = 3", "points = 3\nseed = 12345")
    assert "SeedSequence([sweep.seed, k, 1])" in _refused(tmp_path, text, "run.seed")


@pytest.mark.parametrize("path", ["geometry.seed", "run.seed"])
def test_seeds_cannot_be_swept(tmp_path, path):
    _refused(tmp_path, RANDOM_SWEEP + f'[sweep.grid]\n"{path}" = [1, 2]\n', f"sweep.grid.{path}")


def test_sweep_seed_is_what_draws_the_clouds(tmp_path):
    a, b = (_read(tmp_path, RANDOM_SWEEP.replace("seed = 3", f"seed = {s}")) for s in (3, 4))
    ka, kb = ({task_key(t) for t in study_tasks(s)[0].values()} for s in (a, b))
    assert ka.isdisjoint(kb)
    pos = study_tasks(a)[0][("meanfield", 1)]["positions"]
    geo = a.geometry
    expect = type(geo)(geo.kind, {**geo.params, "seed": realization_seeds(3, 1)[0]}).positions()
    np.testing.assert_array_equal(pos, expect)


def test_a_plain_study_run_as_tasks_keeps_its_own_cloud_and_seed(tmp_path):
    """Without [sweep]/[compare] (e.g. with --workers), the study's geometry.seed and run.seed are used."""
    text = BASE.replace("min_distance = 0.08", "min_distance = 0.08\nseed = 5").replace(
        "points = 3", "points = 3\nseed = 77").replace("[levels.cumulant2]", "[levels.twa]\nsamples = 10")
    study = _read(tmp_path, text)
    index = study_tasks(study)[0]
    np.testing.assert_array_equal(index[("meanfield", 0)]["positions"], study.geometry.positions())
    assert index[("twa", 0)]["seed"] == 77 and "seed" not in index[("meanfield", 0)]


def test_shipped_twa_convergence_study_draws_from_sweep_seed():
    for quick in (False, True):
        study = read_study(ROOT / "studies" / "twa_convergence.toml", quick=quick)
        assert "seed" not in study.extra["raw"]["geometry"] and study.extra["sweep"].seed == 0


# --- 4. a grid path must name a level of the study -------------------------------------------------------


def test_grid_over_an_option_of_a_level_not_in_the_study_is_refused(tmp_path):
    msg = _refused(tmp_path, BASE + '[sweep]\n[sweep.grid]\n"levels.twa.samples" = [10, 20]\n',
                   "sweep.grid.levels.twa.samples")
    assert "level 'twa' is not in the study (meanfield, cumulant2)" in msg
    _refused(tmp_path, BASE + '[sweep]\n[sweep.grid]\n"levels.cumulant2" = [1, 2]\n',
             "sweep.grid.levels.cumulant2")


def test_quick_cannot_add_a_level(tmp_path):
    msg = _refused(tmp_path, BASE + "[quick]\nlevels = { twa = { samples = 10 } }\n", "quick.levels.twa")
    assert "cannot add one" in msg


def test_quick_sets_options_of_levels_given_as_a_list(tmp_path):
    text = 'levels = ["meanfield", "twa"]\n' + BASE.split("[levels.meanfield]")[0] + (
        "[quick]\nlevels = { twa = { samples = 10 } }\n")
    study = _read(tmp_path, text, quick=True)
    assert study.levels == {"meanfield": {}, "twa": {"samples": 10}}


# --- 5. keep = "last_time" needs a time axis --------------------------------------------------------------


def test_last_time_on_a_steady_study_is_refused(tmp_path):
    assert "steady study has no time axis" in _refused(tmp_path, STEADY + '[sweep]\nkeep = "last_time"\n',
                                                       "sweep.keep")
    assert _read(tmp_path, STEADY + '[sweep]\nkeep = "all"\n').extra["sweep"].keep == "all"


# --- 6. errors of [quick] name it --------------------------------------------------------------------------


@pytest.mark.parametrize("quick", [True, False])
@pytest.mark.parametrize(
    "table, key",
    [
        ("geometry = { nn = 3 }", "quick.geometry.nn"),
        ('geometry = { n = "3" }', "quick.geometry.n"),
        ("geometri = { n = 3 }", "quick.geometri"),
        ("levels = { cumulant2 = { rtol = -1 } }", "quick.levels.cumulant2.rtol"),
        ('sweep = { grid = { "levels.cumulant2.rtol" = [1e-6, -1] } }',
         "quick.sweep.grid.levels.cumulant2.rtol"),
        ('compare = { baseline = "exact" }', "quick.compare.baseline"),
    ],
)
def test_errors_in_quick_are_named_with_its_prefix(tmp_path, table, key, quick):
    _refused(tmp_path, BASE + "[quick]\n" + table + "\n", key, quick=quick)


def test_an_error_the_quick_overrides_cause_elsewhere_names_quick(tmp_path):
    # the override changes the kind; the study's semi_axes then do not fit it
    msg = _refused(tmp_path, BASE + '[quick]\ngeometry = { kind = "line" }\n', "quick")
    assert msg.startswith("quick: with the [quick] overrides applied, geometry.")


# --- 7. documentation: detectors, observables, results attributes ---------------------------------------


def test_azimuth_is_measured_as_documented():
    cases = {  # laser → (azimuth 0, azimuth 90) at 90° from it (docs/study-files.md, [detectors])
        (0, 0, 1): ([1, 0, 0], [0, 1, 0]),
        (1, 0, 0): ([0, 1, 0], [0, 0, 1]),
        (0, 1, 0): ([1, 0, 0], [0, 0, -1]),
    }
    for laser, (a0, a90) in cases.items():
        np.testing.assert_allclose(detector_direction(laser, 90, 0), a0, atol=1e-12)
        np.testing.assert_allclose(detector_direction(laser, 90, 90), a90, atol=1e-12)
    doc = (ROOT / "docs" / "study-files.md").read_text()
    assert "l̂ × x̂" not in doc and "ẑ for a laser along x" in doc


def test_docs_list_every_observable_compare_and_convergence_accept():
    from beyondmf.compare import OBSERVABLES
    from beyondmf.tasks import SCALAR_VARIABLES

    doc = (ROOT / "docs" / "study-files.md").read_text()
    compare = re.search(r"`\[compare\]`:\n(.*?)\n\n", doc, re.S).group(1)
    convergence = re.search(r"`\[convergence\]` \(needs a `\[sweep.grid\]`\):\n(.*?)\n\n", doc, re.S).group(1)
    for name in (*OBSERVABLES, *EXTRA_OBSERVABLES):
        assert f'"{name}"' in compare, name
    for name in (*SCALAR_VARIABLES, "excited_mean", "emission_rate_peak", "peak_time", "emitted"):
        assert f'"{name}"' in convergence, name
    assert '["emission_rate", "g2_total"]' in convergence  # the default


def test_results_attributes_are_those_every_level_shares(monkeypatch):
    """run_study keeps at the top only attributes all levels have alike; the rest live in `levels`."""
    made = []

    def fake_evolve(model, name, times, initial, detectors, seed, **options):
        attrs = {"level": name, "rabi": 1.0, "calculation": "evolve", "options": dict(options)}
        if name == "twa":
            attrs.update(samples=10, dt=0.01)
        made.append(name)
        return xr.Dataset({"emission_rate": (("time",), np.ones(len(times)))}, coords={"time": times},
                          attrs=attrs)

    monkeypatch.setattr(study_mod.single, "evolve", fake_evolve)
    text = BASE.replace("[levels.cumulant2]\n", "[levels.twa]\nsamples = 10\n")
    ds = study_mod.run_study(parse_study(text))
    assert made == ["meanfield", "twa"]
    assert ds.attrs["rabi"] == 1.0 and ds.attrs["calculation"] == "evolve"
    for name in ("samples", "dt", "options", "level"):
        assert name not in ds.attrs, name
    assert ds.attrs["levels"]["twa"]["samples"] == 10 and ds.attrs["levels"]["twa"]["dt"] == 0.01


def test_a_study_without_a_seed_records_the_one_it_drew_and_reruns_with_it(tmp_path):
    # conventions.md, "data contract": the file says how to reproduce the run; one drawn seed serves every
    # sampled level, and a deterministic level records none
    from beyondmf.study import run_study

    text = NO_LEVELS + "[levels.meanfield]\n[levels.twa]\nsamples = 20\n"
    first = run_study(_read_single(tmp_path, text))
    seed = first.attrs["run_seed"]
    assert seed >= 0 and first.attrs["levels"]["twa"]["seed"] == seed
    assert first.attrs["levels"]["meanfield"]["seed"] == -1
    again = run_study(_read_single(tmp_path, text.replace("[run]\n", f"[run]\nseed = {seed}\n")))
    np.testing.assert_array_equal(again["emission_rate"].values, first["emission_rate"].values)


def _read_single(tmp_path, text):
    path = tmp_path / "single.toml"
    path.write_text(textwrap.dedent(text))
    return study_mod.read_study(path)
