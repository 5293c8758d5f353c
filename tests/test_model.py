"""Every bad input to the model and the entry points gives an error that says what was wrong."""

import numpy as np
import pytest

import beyondmf as bm


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"positions": [[0, 0, np.nan]]}, "NaN or infinite"),
        ({"positions": [[0, 0, np.inf], [1, 0, 0]]}, "NaN or infinite"),
        ({"positions": np.zeros((3, 2))}, r"\(N, 3\)"),
        ({"positions": [[0, 0, 0]], "dipole": (0, 0, 0)}, "dipole must not be the zero vector"),
        ({"positions": [[0, 0, 0]], "laser": (0, 0, 0)}, "laser must not be the zero vector"),
        ({"positions": [[0, 0, 0]], "rabi": np.nan}, "rabi must be finite"),
        ({"positions": [[0, 0, 0]], "detuning": "large"}, "detuning must be a real number"),
        ({"positions": [[0, 0, 0]], "coupling": "dyadic"}, "unknown coupling"),
        ({"positions": [[0, 0, 0]], "envelope": [(2, 1)]}, "t_on < t_off"),
        ({"positions": [[0, 0, 0]], "envelope": [(3, 8), (0, 5)]}, r"overlap.*one window \(0, 8\)"),
        ({"positions": [[0, 0, 0]], "rabi": [1, 2]}, "rabi must be a .complex. number"),
        ({"positions": [[0, 0, 0]], "detuning": "0"}, "detuning must be a real number"),
        ({"positions": [[0, 0, 1j]]}, "positions must be real"),
        ({"positions": [["a", 0, 0]]}, r"\(N, 3\) array of numbers"),
    ],
)
def test_bad_model_input_is_refused(kwargs, match):
    with pytest.raises(ValueError, match=match):
        bm.Model(**kwargs)


def test_coincident_emitters_are_named_with_their_distance():
    pos = [[0, 0, 0], [1, 0, 0], [1, 0, 1e-4]]
    with pytest.raises(ValueError, match=r"emitters 1 and 2 are 0.0001 λ0 apart"):
        bm.Model(pos)


def test_exactly_coincident_emitters_are_named_as_two_different_ones():
    # the k-d tree returns either point first when two coincide; the message must name both
    for pos in (np.zeros((2, 3)), [[1, 0, 0], [0, 0, 0], [0, 0, 0], [2, 0, 0]]):
        with pytest.raises(ValueError, match=r"emitters (\d+) and (?!\1)\d+ are 0 λ0 apart"):
            bm.Model(pos)


def test_coincident_emitters_allowed_for_all_to_all():
    m = bm.Model(np.zeros((4, 3)), coupling="all-to-all")
    assert m.n == 4 and np.all(m.Gamma == 1)


def test_vectors_are_normalised_and_model_is_immutable():
    m = bm.Model([[0, 0, 0], [0, 0, 0.5]], dipole=(2, 0, 0), laser=(0, 0, 3))
    np.testing.assert_allclose(m.dipole, [1, 0, 0])
    np.testing.assert_allclose(m.laser, [0, 0, 1])
    with pytest.raises(AttributeError):
        m.rabi = 2.0
    with pytest.raises(ValueError):
        m.positions[0, 0] = 1.0  # read-only array


@pytest.mark.parametrize(
    "J, G, match",
    [
        (np.array([[0, 1], [2, 0]]), np.eye(2), "J must be Hermitian"),
        (np.zeros((2, 2)), np.array([[1, 2], [2, 1]]), "positive semi-definite"),
        (np.zeros((2, 2)), 2 * np.eye(2), "unit diagonal"),
        (np.zeros((3, 3)), np.eye(3), r"shape \(2, 2\)"),
        (np.eye(2), np.eye(2), "zero diagonal"),
    ],
)
def test_bad_custom_couplings_are_refused(J, G, match):
    with pytest.raises(ValueError, match=match):
        bm.Model([[0, 0, 0], [0, 0, 1]], coupling=(J, G))


def test_custom_couplings_are_used():
    J = np.array([[0, 0.3], [0.3, 0]])
    G = np.array([[1, 0.5], [0.5, 1]])
    m = bm.Model([[0, 0, 0], [0, 0, 1]], coupling=(J, G))
    assert m.coupling == "custom" and m.J[0, 1] == 0.3


def test_unknown_level_names_the_known_ones():
    with pytest.raises(ValueError, match="unknown level 'mf'; known levels: .*meanfield"):
        bm.evolve(bm.Model([[0, 0, 0]]), "mf", [0, 1])


def test_unknown_option_is_an_error():
    with pytest.raises(ValueError, match="takes no option 'tolerance'; its options: .*rtol"):
        bm.evolve(bm.Model([[0, 0, 0]]), "meanfield", [0, 1], tolerance=1e-3)


@pytest.mark.parametrize(
    "call, match",
    [
        (lambda m: bm.evolve(m, "meanfield", [1, 0]), "strictly increasing"),
        (lambda m: bm.evolve(m, "meanfield", [0, 1], initial="up"), "initial must be"),
        (lambda m: bm.evolve(m, "meanfield", [0, 1], initial=[[0, 0, 2]]), "length 2 > 1"),
        (lambda m: bm.evolve(m, "meanfield", [0, 1], detectors={"a": (0, 0, 0)}), "non-zero"),
        (lambda m: bm.evolve(m, "meanfield", [0, 1], detectors=[(0, 0, 1)]), "map a name"),
        (lambda m: bm.evolve(m, "meanfield", [0, 1], seed=-3), "non-negative integer"),
        (lambda m: bm.evolve(m, "meanfield", [0, 1], initial=["ground", "up"]), "needs 1 of 'ground'"),
        (lambda m: bm.evolve(m, "meanfield", [0, 1], initial=[0, 0, 1j]), "initial must be 'ground'"),
        (lambda m: bm.evolve(m, "meanfield", [0, 1], initial=None), "initial must be 'ground'"),
        (lambda m: bm.evolve(m, "meanfield", [0, 1], detectors={"a": {"angle": 60, "tilt": 3}}),
         "detector 'a': a table takes 'angle'"),
        (lambda m: bm.evolve(m, "meanfield", [0, 1], detectors={"a": {"angle": 200}}), "0 to 180"),
        (lambda m: bm.evolve(m, "meanfield", [0, 1], detectors={"f": "forwrd"}),
         "detector 'f' needs a direction"),
    ],
)
def test_bad_call_arguments_are_refused(call, match):
    with pytest.raises(ValueError, match=match):
        call(bm.Model([[0, 0, 0]], rabi=1.0))


def test_memory_need_is_refused_before_allocating(monkeypatch):
    from beyondmf import memory

    monkeypatch.setattr(memory, "available_bytes", lambda: 10**6)
    with pytest.raises(MemoryError, match=r"about [0-9.]+ [KMGTPE]?i?B(ytes)? needed"):
        bm.Model(bm.geometry.box_cloud(1000, 10, seed=0))


@pytest.mark.parametrize(
    "level, options, match",
    [
        ("meanfield", {"rtol": -1}, "rtol must be a positive number"),
        ("meanfield", {"max_steps": -1}, "max_steps must be a positive integer"),
        ("exact", {"atol": "tiny"}, "atol must be a positive number"),
        ("cumulant2", {"solver": "rk4"}, "solver must be 'auto' or one of Tsit5.*got 'rk4'"),
        # the integrators are diffrax's, spelled as its classes are (common practice: one name per thing)
        ("meanfield", {"solver": "tsit5"},
         "solver 'tsit5' is spelled 'Tsit5' \\(the class name in diffrax\\)"),
        ("twa", {"samples": -10}, "samples must be an integer ≥ 2"),
        ("twa", {"max_failed": "0.1"}, r"max_failed must be a fraction in \[0, 1\)"),
        ("twa", {"window": 0}, "window must be a positive time"),
        ("jumps", {"chunk": 0}, "chunk must be 'auto' or an integer ≥ 1"),
        ("jumps", {"settle_time": -1}, "settle_time must be a positive time"),
    ],
)
def test_bad_option_values_are_refused_before_anything_runs(level, options, match):
    with pytest.raises(ValueError, match=match):
        bm.evolve(bm.Model([[0, 0, 0]], rabi=1.0), level, [0, 1], **options)
    lvl = bm.levels.get_level(level)  # the same check, without a model (study files use it up front)
    with pytest.raises(ValueError, match=match):
        lvl.validate_options({**lvl.options, **options})


def test_times_and_seed_mistakes_are_explained():
    m = bm.Model([[0, 0, 0]], rabi=1.0)
    with pytest.raises(ValueError, match=r"1-D sequence.*linspace\(0, 5"):
        bm.evolve(m, "meanfield", 5.0)
    with pytest.raises(ValueError, match=r"seed must be a non-negative integer below 2\*\*63, got 'a'"):
        bm.evolve(m, "twa", [0, 1], seed="a", samples=4)


def test_detectors_may_be_given_by_angle_from_the_laser_as_in_study_files():
    # the study-file form {angle, azimuth} (degrees from the laser): for a laser along z, angle 90° and
    # azimuth 90° is ŷ (beyondmf.study.detector_direction)
    m = bm.Model([[0, 0, 0], [0.3, 0.1, 0]], rabi=1.0)
    by_angle = bm.evolve(m, "meanfield", [0, 1], detectors={"side": {"angle": 90, "azimuth": 90}})
    by_vector = bm.evolve(m, "meanfield", [0, 1], detectors={"side": (0, 1, 0)})
    np.testing.assert_allclose(by_angle["direction"].values, [[0, 1, 0]], atol=1e-15)
    np.testing.assert_allclose(by_angle["intensity"].values, by_vector["intensity"].values, rtol=1e-12)


def test_initial_state_per_emitter_by_name_and_recorded_in_the_result():
    m = bm.Model([[0, 0, 0], [2.0, 0, 0], [0, 2.0, 0]])
    ds = bm.evolve(m, "meanfield", [0, 0.5], initial=["excited", "ground", "excited"])
    np.testing.assert_array_equal(ds["excited"].values[0], [1, 0, 1])
    np.testing.assert_array_equal(ds["initial_bloch"].values[:, 2], [1, -1, 1])
    assert ds.attrs["initial"].startswith("bloch vectors")
    assert "initial_bloch" not in bm.evolve(m, "meanfield", [0, 0.5], initial="ground")


@pytest.mark.parametrize("level", ["twa", "qsd_product", "jumps"])
def test_a_single_report_time_gives_the_initial_state_at_every_level(level):
    # as the deterministic levels do: the state at times[0] is the initial one
    ds = bm.evolve(bm.Model([[0, 0, 0]], rabi=1.0), level, [0.5], initial="excited", samples=8, seed=1)
    assert ds["excited"].shape == (1, 1) and float(ds["excited"][0, 0]) == 1.0
