"""Study files: one model, its detectors, a calculation and the levels to run it at, in TOML: the schema
of the sections every study has.

The schema is ours and documented in docs/study-files.md. `beyondmf.study.read_study` parses and validates
a file into a `Study`; any problem is a `StudyError` whose one-line message starts with the key at fault, e.g.
``geometry.widths: expected 3 positive numbers, got [1, -2, 3]``. `beyondmf.study.single.run_study` runs
a study of one model at every level it lists and returns one Dataset with a ``level`` dimension.

Each top-level table is parsed by one function registered with `section`; a new section (a parameter
sweep, a comparison) is one more registered function, and its parsed value lands in ``Study.extra``.
Checks that need several sections at once (a comparison's baseline must be one of the levels) are
registered with `study_check` and run on the parsed study, so that they too stop a run before anything
is computed.
"""

from __future__ import annotations

import tomllib
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .. import geometry as geo
from ..couplings import KINDS as COUPLING_KINDS
from ..levels.base import available_levels, detector_direction, get_level
from ..model import Model

__all__ = [
    "StudyError",
    "Study",
    "parse_study",
    "parse_table",
    "emitter_count",
    "study_text",
    "section",
    "study_check",
    "detector_direction",
]


class StudyError(ValueError):
    """A study file that cannot be run; the message names the key at fault."""


# ---------------------------------------------------------------------------------------------------
# Value checks: each returns the cleaned value or raises StudyError naming ``key``.


def _fail(key: str, expected: str, value: Any) -> StudyError:
    return StudyError(f"{key}: expected {expected}, got {value!r}")


def _is_number(v) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool) and np.isfinite(v)


def _number(v, key: str, low: float | None = None, strict: bool = False, what: str = "a number") -> float:
    if not _is_number(v) or (low is not None and (v <= low if strict else v < low)):
        raise _fail(key, what, v)
    return float(v)


def _integer(v, key: str, low: int, what: str) -> int:
    if isinstance(v, bool) or not isinstance(v, int) or v < low:
        raise _fail(key, what, v)
    return v


def _choice(v, key: str, choices) -> str:
    if not isinstance(v, str) or v not in choices:
        raise _fail(key, "one of " + ", ".join(repr(c) for c in choices), v)
    return v


def _vector(v, key: str, nonzero: bool = True) -> tuple[float, float, float]:
    what = "3 numbers, not all zero" if nonzero else "3 numbers"
    if not isinstance(v, list) or len(v) != 3 or not all(_is_number(c) for c in v):
        raise _fail(key, what, v)
    if nonzero and not any(v):
        raise _fail(key, what, v)
    return tuple(float(c) for c in v)


def _lengths(v, key: str) -> tuple[float, float, float]:
    """Three positive lengths; one number stands for three equal ones."""
    if _is_number(v) and v > 0:
        return (float(v),) * 3
    if not isinstance(v, list) or len(v) != 3 or not all(_is_number(c) and c > 0 for c in v):
        raise _fail(key, "3 positive numbers", v)
    return tuple(float(c) for c in v)


def _table(v, key: str) -> dict:
    if not isinstance(v, dict):
        raise _fail(key, "a table", v)
    return v


def _keys(table: Mapping, allowed, where: str, required=()) -> None:
    for k in table:
        if k not in allowed:
            raise StudyError(f"{where}.{k}: unknown key; {where} takes {', '.join(allowed)}")
    for k in required:
        if k not in table:
            raise StudyError(f"{where}.{k}: missing (required)")


# ---------------------------------------------------------------------------------------------------
# The sections


@dataclass(frozen=True)
class Geometry:
    """Where the emitters are: ``kind`` and the keyword arguments of its `beyondmf.geometry` function."""

    kind: str
    params: dict[str, Any]

    def positions(self) -> np.ndarray:
        if self.kind == "points":
            return np.array(self.params["positions"], dtype=float)
        fn = _GEOMETRY[self.kind][0]
        return fn(**self.params)


def _points(v, key: str) -> list:
    if not isinstance(v, list) or not v or not all(
        isinstance(p, list) and len(p) == 3 and all(_is_number(c) for c in p) for p in v
    ):
        raise _fail(key, "a non-empty list of [x, y, z] positions (λ0)", v)
    return v


def _count(v, key: str) -> int:
    return _integer(v, key, 1, "a positive integer")


def _spacing(v, key: str) -> float:
    return _number(v, key, 0, strict=True, what="a positive number (λ0)")


def _axis(v, key: str) -> str:
    return _choice(v, key, ("x", "y", "z"))


# Random clouds: the seed defaults to 0 so that a study file always draws the same cloud.
_CLOUD = {
    "seed": (lambda v, k: _integer(v, k, 0, "a non-negative integer"), 0),
    "min_distance": (lambda v, k: _number(v, k, 0, what="a non-negative number (λ0)"), 0.0),
}
# kind → (function, {key: check} of its required parameters, {key: (check, default)} of optional ones)
_GEOMETRY: dict[str, tuple[Callable | None, dict, dict]] = {
    "gaussian": (geo.gaussian_cloud, {"n": _count, "widths": _lengths}, _CLOUD),
    "ellipsoid": (geo.ellipsoid_cloud, {"n": _count, "semi_axes": _lengths}, _CLOUD),
    "box": (geo.box_cloud, {"n": _count, "sides": _lengths}, _CLOUD),
    "line": (geo.line_array, {"n": _count, "spacing": _spacing}, {"axis": (_axis, "x")}),
    "plane": (geo.plane_array, {"nx": _count, "ny": _count, "spacing": _spacing}, {}),
    "block": (geo.block_array, {"nx": _count, "ny": _count, "nz": _count, "spacing": _spacing}, {}),
    "points": (None, {"positions": _points}, {}),
}


def _parse_geometry(table: dict, where: str) -> Geometry:
    if "kind" not in table:
        raise StudyError(f"{where}.kind: missing (required); one of {', '.join(_GEOMETRY)}")
    kind = _choice(table["kind"], f"{where}.kind", tuple(_GEOMETRY))
    _, required, optional = _GEOMETRY[kind]
    _keys(table, ("kind", *required, *optional), where, required)
    params = {k: check(table[k], f"{where}.{k}") for k, check in required.items()}
    for k, (check, default) in optional.items():
        params[k] = check(table[k], f"{where}.{k}") if k in table else default
    return Geometry(kind, params)


@dataclass(frozen=True)
class Emitters:
    """The transition dipole ê = dipole + i·dipole_imag (normalised by `Model`) and the coupling kind."""

    dipole: tuple[complex, complex, complex] = (1, 0, 0)
    coupling: str = "vector"


def _parse_model(table: dict, where: str) -> Emitters:
    _keys(table, ("dipole", "dipole_imag", "coupling"), where)
    re = _vector(table.get("dipole", [1, 0, 0]), f"{where}.dipole", nonzero=False)
    im = _vector(table.get("dipole_imag", [0, 0, 0]), f"{where}.dipole_imag", nonzero=False)
    dip = tuple(complex(a, b) for a, b in zip(re, im, strict=True))
    if not any(dip):
        raise _fail(f"{where}.dipole", "a non-zero dipole vector", table.get("dipole"))
    coupling = _choice(table.get("coupling", "vector"), f"{where}.coupling", COUPLING_KINDS)
    return Emitters(dip, coupling)


BROADENINGS = ("none", "gaussian", "lorentzian")
# Lorentzian draws beyond this many half widths are drawn again (a truncated Lorentzian, 1.3 % of the weight
# excluded): one emitter detuned by 10⁴ Γ0 would force every explicit step of the solve to 1/10⁴.
LORENTZ_CUT = 50.0


@dataclass(frozen=True)
class Drive:
    """Rabi frequency Ω and detuning Δ (Γ0), laser direction l̂, optional on/off windows (1/Γ0), an optional
    Gaussian beam (waist and focus, λ0), and the inhomogeneous broadening drawn per realization."""

    rabi: float = 0.0
    detuning: float = 0.0
    laser: tuple[float, float, float] = (0.0, 0.0, 1.0)
    windows: tuple[tuple[float, float], ...] | None = None
    beam_waist: float | None = None
    beam_focus: tuple[float, float, float] = (0.0, 0.0, 0.0)
    broadening: str = "none"
    broadening_width: float = 0.0

    def beam(self) -> dict | None:
        if self.beam_waist is None:
            return None
        return {"waist": self.beam_waist, "focus": list(self.beam_focus)}

    def detunings(self, n: int, seed: int):
        """Δ_i = Δ − δ_i with static shifts δ_i drawn from ``seed`` (the realization's position seed, in a
        stream of its own): a Gaussian of r.m.s. width ``broadening_width`` (Doppler), a Lorentzian of half
        width ``broadening_width`` truncated at LORENTZ_CUT half widths, or none (Δ itself)."""
        if self.broadening == "none" or self.broadening_width == 0:
            return self.detuning
        rng = np.random.default_rng([int(seed), 0xB40AD])
        if self.broadening == "gaussian":
            shift = rng.normal(0.0, self.broadening_width, n)
        else:
            shift = rng.standard_cauchy(n)
            while np.any(bad := np.abs(shift) > LORENTZ_CUT):
                shift[bad] = rng.standard_cauchy(int(bad.sum()))
            shift = self.broadening_width * shift
        return [float(self.detuning - d) for d in shift]


_DRIVE_KEYS = ("rabi", "detuning", "laser", "windows", "beam_waist", "beam_focus", "broadening",
               "broadening_width")


def _parse_drive(table: dict, where: str) -> Drive:
    _keys(table, _DRIVE_KEYS, where, ("rabi",))
    rabi = _number(table["rabi"], f"{where}.rabi", 0, what="a non-negative number (Γ0)")
    det = _number(table.get("detuning", 0.0), f"{where}.detuning", what="a number (Γ0)")
    laser = _vector(table.get("laser", [0, 0, 1]), f"{where}.laser")
    windows = None
    if "windows" in table:
        w = table["windows"]
        what = "a list of [t_on, t_off] pairs with t_on < t_off"
        if not isinstance(w, list) or not w or not all(
            isinstance(p, list) and len(p) == 2 and all(_is_number(c) for c in p) and p[0] < p[1] for p in w
        ):
            raise _fail(f"{where}.windows", what, w)
        windows = tuple((float(a), float(b)) for a, b in w)
    waist = None
    if "beam_waist" in table:
        waist = _number(table["beam_waist"], f"{where}.beam_waist", 1.0,
                        what="a waist of at least 1 λ0 (the paraxial beam needs k·w0 ≫ 1)")
    elif "beam_focus" in table:
        raise StudyError(f"{where}.beam_focus: give drive.beam_waist too (without a waist the drive is a "
                         "plane wave, which has no focus)")
    focus = _vector(table.get("beam_focus", [0, 0, 0]), f"{where}.beam_focus", nonzero=False)
    broadening = _choice(table.get("broadening", "none"), f"{where}.broadening", BROADENINGS)
    width = _number(table.get("broadening_width", 0.0), f"{where}.broadening_width", 0,
                    what="a non-negative width (Γ0): r.m.s. for 'gaussian', half width for 'lorentzian'")
    if broadening == "none" and "broadening_width" in table and width > 0:
        raise StudyError(f"{where}.broadening_width: set drive.broadening = 'gaussian' or 'lorentzian' too "
                         "(it is 'none')")
    return Drive(rabi, det, laser, windows, waist, focus, broadening, width)


@dataclass(frozen=True)
class Detector:
    """A direction of observation: a vector, or an angle (and azimuth) from the laser, in degrees."""

    vector: tuple[float, float, float] | None = None
    angle: float | None = None
    azimuth: float = 0.0

    def direction(self, laser) -> np.ndarray:
        if self.vector is not None:
            v = np.asarray(self.vector, dtype=float)
            return v / np.linalg.norm(v)
        return detector_direction(laser, self.angle, self.azimuth)


def _parse_detectors(table: dict, where: str) -> dict[str, Detector]:
    if not table:
        raise StudyError(f"{where}: expected at least one detector, e.g. forward = [0, 0, 1]")
    out = {}
    for name, spec in table.items():
        key = f"{where}.{name}"
        if isinstance(spec, dict):
            _keys(spec, ("angle", "azimuth"), key, ("angle",))
            angle = _number(spec["angle"], f"{key}.angle", what="an angle in degrees from the laser")
            if not 0 <= angle <= 180:
                raise _fail(f"{key}.angle", "an angle between 0 and 180 degrees", spec["angle"])
            out[name] = Detector(angle=angle, azimuth=_number(spec.get("azimuth", 0.0), f"{key}.azimuth"))
        else:
            if not isinstance(spec, list):
                raise _fail(key, "a direction [x, y, z] or a table {angle = ..., azimuth = ...}", spec)
            out[name] = Detector(vector=_vector(spec, key))
    return out


def _parse_lenses(table: dict, where: str) -> dict[str, dict[str, Any]]:
    """[lenses.NAME] tables (`beyondmf.lens.lenses_of`), checked with the default laser here and with the
    study's own laser once the drive is known (`_lenses_fit`)."""
    from ..lens import lenses_of

    if not table:
        raise StudyError(f"{where}: expected at least one lens, e.g. [lenses.front] angle = 0, na = 0.5")
    out = {}
    for name, spec in table.items():
        if not isinstance(spec, dict):
            raise _fail(f"{where}.{name}", "a table, e.g. {angle = 90, na = 0.4}", spec)
        try:
            lenses_of({name: spec}, (0.0, 0.0, 1.0))
        except ValueError as err:
            raise StudyError(f"{where}.{name}: {str(err).split(': ', 1)[-1]}") from None
        out[str(name)] = {k: (list(v) if isinstance(v, list) else v) for k, v in spec.items()}
    return out


@dataclass(frozen=True)
class Run:
    """What to compute: ``calculation`` "evolve" (times t_start..t_end, ``points`` of them), "steady", or
    "correlations" (two-time functions of the steady state: delays 0..delay_end, ``delay_points`` of them,
    and the spectrum at ``frequency_points`` frequencies in ``frequency_range`` when that is given)."""

    calculation: str = "evolve"
    t_start: float = 0.0
    t_end: float = 10.0
    points: int = 201
    initial: str | tuple[float, float, float] = "ground"
    seed: int | None = None
    delay_end: float = 10.0
    delay_points: int = 101
    frequency_range: tuple[float, float] | None = None
    frequency_points: int = 401

    def times(self) -> np.ndarray:
        return np.linspace(self.t_start, self.t_end, self.points)

    def delays(self) -> np.ndarray:
        return np.linspace(0.0, self.delay_end, self.delay_points)

    def frequencies(self) -> np.ndarray | None:
        if self.frequency_range is None:
            return None
        return np.linspace(*self.frequency_range, self.frequency_points)


_EVOLVE_KEYS = ("t_start", "t_end", "points", "initial")
_CORRELATION_KEYS = ("delay_end", "delay_points", "frequency_range", "frequency_points")


def _parse_correlations(table: dict, where: str, seed) -> Run:
    for k in _EVOLVE_KEYS:
        if k in table:
            raise StudyError(f"{where}.{k}: not used by calculation = 'correlations' (the steady state); "
                             "remove it")
    end = _number(table.get("delay_end", 10.0), f"{where}.delay_end", low=0.0, strict=True,
                  what="a delay (1/Γ0) > 0")
    points = _integer(table.get("delay_points", 101), f"{where}.delay_points", 1, "an integer ≥ 1")
    rng = table.get("frequency_range")
    if rng is not None:
        if not (isinstance(rng, list) and len(rng) == 2 and all(_is_number(v) for v in rng)
                and rng[0] < rng[1]):
            raise _fail(f"{where}.frequency_range", "[lowest, highest] frequencies ν = ω − ω_laser (Γ0)", rng)
        rng = (float(rng[0]), float(rng[1]))
    elif "frequency_points" in table:
        raise StudyError(f"{where}.frequency_points: needs frequency_range = [lowest, highest] (Γ0)")
    fpoints = _integer(table.get("frequency_points", 401), f"{where}.frequency_points", 2, "an integer ≥ 2")
    return Run(calculation="correlations", seed=seed, delay_end=end, delay_points=points,
               frequency_range=rng, frequency_points=fpoints)


def _parse_run(table: dict, where: str) -> Run:
    _keys(table, ("calculation", *_EVOLVE_KEYS, *_CORRELATION_KEYS, "seed"), where)
    calc = _choice(table.get("calculation", "evolve"), f"{where}.calculation",
                   ("evolve", "steady", "correlations"))
    seed = table.get("seed")
    if seed is not None:
        seed = _integer(seed, f"{where}.seed", 0, "a non-negative integer")
    if calc == "correlations":
        return _parse_correlations(table, where, seed)
    for k in _CORRELATION_KEYS:
        if k in table:
            raise StudyError(f"{where}.{k}: used only by calculation = 'correlations'; remove it")
    if calc == "steady":
        for k in _EVOLVE_KEYS:
            if k in table:
                raise StudyError(f"{where}.{k}: not used by calculation = 'steady'; remove it")
        return Run(calculation=calc, seed=seed)
    if "t_end" not in table:
        raise StudyError(f"{where}.t_end: missing (required for calculation = 'evolve')")
    t0 = _number(table.get("t_start", 0.0), f"{where}.t_start", what="a time (1/Γ0)")
    t1 = _number(table["t_end"], f"{where}.t_end", what="a time (1/Γ0)")
    if t1 <= t0:
        raise _fail(f"{where}.t_end", f"a time after t_start = {t0:g}", table["t_end"])
    points = _integer(table.get("points", 201), f"{where}.points", 2, "an integer ≥ 2")
    initial = table.get("initial", "ground")
    if isinstance(initial, list):
        initial = _vector(initial, f"{where}.initial", nonzero=False)
        if np.linalg.norm(initial) > 1 + 1e-12:
            raise _fail(f"{where}.initial", "a Bloch vector of length ≤ 1", table["initial"])
    else:
        initial = _choice(initial, f"{where}.initial", ("ground", "excited"))
    return Run(calc, t0, t1, points, initial, seed)


def _option_check(default) -> tuple[Callable[[Any], bool], str]:
    """What an option value must be, judged from the type of its default; the ranges are the level's own
    `validate_options` (`_check_level_options`), which runs next."""
    if isinstance(default, bool):
        return (lambda v: isinstance(v, bool)), "true or false"
    if isinstance(default, int):
        return (lambda v: isinstance(v, int) and not isinstance(v, bool)), "an integer"
    if isinstance(default, float):
        return _is_number, "a number"
    if isinstance(default, str):  # "auto" often stands for a number chosen by the level (dt, chunk)
        return (lambda v: isinstance(v, str | bool) or _is_number(v)), "a string, true, false or a number"
    return (lambda v: True), "a value"


def _check_level_options(level, opts: dict[str, Any], key: str) -> None:
    """The level's own model-free check of its options, if it has one; an `OptionError` names the option
    (its key in the study file), any other refusal is reported against the level's table."""
    validate = getattr(level, "validate_options", None)
    if not callable(validate):
        return
    try:
        validate({**level.options, **opts})
    except (ValueError, TypeError) as err:
        msg = " ".join(str(err).split())
        opt = getattr(err, "option", None)
        raise StudyError(f"{key}.{opt}: {msg}" if opt else f"{key}: {msg}") from None


def _parse_levels(value, where: str) -> dict[str, dict[str, Any]]:
    """``levels = ["meanfield", ...]`` or one table per level with its options."""
    if isinstance(value, list):
        if not all(isinstance(v, str) for v in value):
            raise _fail(where, "a list of level names or a table per level", value)
        value = {name: {} for name in value}
    value = _table(value, where)
    if not value:
        raise StudyError(f"{where}: expected at least one level, e.g. [levels.meanfield]")
    known = available_levels()
    out = {}
    for name, opts in value.items():
        key = f"{where}.{name}"
        if name not in known:
            raise StudyError(f"{key}: unknown level; known levels: {', '.join(known)}")
        opts = _table(opts, key)
        level = get_level(name)
        defaults = level.options
        for opt, v in opts.items():
            if opt not in defaults:
                allowed = ", ".join(defaults) or "none"
                raise StudyError(f"{key}.{opt}: unknown option of level {name!r}; its options: {allowed}")
            ok, what = _option_check(defaults[opt])
            if not ok(v):
                raise _fail(f"{key}.{opt}", what, v)
        _check_level_options(level, opts, key)
        out[name] = dict(opts)
    return out


@dataclass(frozen=True)
class _Section:
    parse: Callable[[Any, str], Any]
    required: bool
    field: str | None  # the Study field it fills; None: Study.extra[name]


_SECTIONS: dict[str, _Section] = {}
_TOP_KEYS = ("title", "description")


def section(name: str, required: bool = False, field: str | None = None):
    """Register ``fn(value, where) -> parsed`` as the parser of the top-level key ``name``.

    Sections registered from outside this module (``field=None``) are stored in ``Study.extra[name]``.
    """

    def deco(fn):
        _SECTIONS[name] = _Section(fn, required, field)
        return fn

    return deco


_CHECKS: list[Callable[[Any, dict[str, Any]], None]] = []


def study_check(fn):
    """Register ``fn(study, raw)``, run on every parsed `Study` with its decoded table ``raw``.

    It raises StudyError naming the key at fault when sections do not fit together.
    """
    _CHECKS.append(fn)
    return fn


section("geometry", required=True, field="geometry")(lambda v, w: _parse_geometry(_table(v, w), w))
section("model", field="emitters")(lambda v, w: _parse_model(_table(v, w), w))
section("drive", required=True, field="drive")(lambda v, w: _parse_drive(_table(v, w), w))
section("detectors", field="detectors")(lambda v, w: _parse_detectors(_table(v, w), w))
section("lenses", field="lenses")(lambda v, w: _parse_lenses(_table(v, w), w))
section("run", required=True, field="run")(lambda v, w: _parse_run(_table(v, w), w))
section("levels", required=True, field="levels")(_parse_levels)


@dataclass(frozen=True)
class Study:
    """A parsed, validated study file (docs/study-files.md)."""

    geometry: Geometry
    drive: Drive
    run: Run
    levels: dict[str, dict[str, Any]]
    emitters: Emitters = Emitters()
    detectors: dict[str, Detector] | None = None
    lenses: dict[str, dict[str, Any]] | None = None
    title: str = ""
    description: str = ""
    source: str = ""
    path: Path | None = None
    extra: dict[str, Any] = field(default_factory=dict)

    def build_model(self, positions: np.ndarray | None = None, seed: int | None = None) -> Model:
        """The `Model` of the study; geometry problems come back as StudyError naming the section. The
        broadening is drawn from ``seed`` (default: the geometry's seed, 0 for a lattice)."""
        try:
            pos = self.geometry.positions() if positions is None else positions
        except ValueError as err:
            # the draws refuse only a cloud too small for its n emitters at their min_distance
            raise StudyError(f"geometry.min_distance: {err}") from None
        try:
            return Model(
                pos,
                dipole=self.emitters.dipole,
                coupling=self.emitters.coupling,
                rabi=self.drive.rabi,
                detuning=self.drive.detunings(len(pos), self.geometry.params.get("seed", 0) if seed is None
                                              else seed),
                laser=self.drive.laser,
                envelope=self.drive.windows,
                beam=self.drive.beam(),
            )
        except ValueError as err:
            raise StudyError(f"{self._model_key(getattr(err, 'param', None))}: {err}") from None

    def _model_key(self, param: str | None) -> str:
        """The study key a refusal of `Model` about argument ``param`` is about."""
        if param == "envelope":
            return "drive.windows"
        if param == "positions":  # two emitters too close
            if self.geometry.kind == "points":
                return "geometry.positions"
            return "geometry.spacing" if "spacing" in self.geometry.params else "geometry.min_distance"
        return "model"

    def detector_directions(self) -> dict[str, np.ndarray]:
        """Name → unit vector; the default is one detector, "forward", along the laser."""
        if self.detectors is None:
            return {"forward": np.asarray(self.drive.laser) / np.linalg.norm(self.drive.laser)}
        return {name: d.direction(self.drive.laser) for name, d in self.detectors.items()}


def parse_study(text: str, path: Path | None = None) -> Study:
    """Parse the TOML text of a study; raises StudyError naming the key at fault."""
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise StudyError(f"not valid TOML: {err}") from None
    return parse_table(raw, text, path)


def parse_table(raw: dict[str, Any], text: str = "", path: Path | None = None) -> Study:
    """Validate an already-decoded study table (e.g. one with overrides applied) into a `Study`."""
    known = (*_TOP_KEYS, *_SECTIONS)
    for k in raw:
        if k not in known:
            raise StudyError(f"{k}: unknown key; a study file takes {', '.join(known)}")
    fields: dict[str, Any] = {}
    for k in _TOP_KEYS:
        if k in raw:
            if not isinstance(raw[k], str):
                raise _fail(k, "a string", raw[k])
            fields[k] = raw[k]
    extra = {}
    for name, sec in _SECTIONS.items():
        if name not in raw:
            if sec.required:
                raise StudyError(f"{name}: missing section (required)")
            continue
        parsed = sec.parse(raw[name], name)
        if sec.field is None:
            extra[name] = parsed
        else:
            fields[sec.field] = parsed
    if fields["run"].calculation in ("steady", "correlations") and fields["drive"].windows is not None:
        raise StudyError("drive.windows: a steady state needs a constant drive; remove the windows")
    if fields["run"].calculation == "correlations":
        for name in ("compare", "convergence"):
            if name in raw:
                raise StudyError(f"{name}: calculation = 'correlations' gives curves over the delay and the "
                                 f"frequency, which [{name}] does not judge; remove [{name}] (a [sweep] "
                                 "runs), or compare the equal-time observables in a 'steady' study")
        if "lenses" in raw:
            raise StudyError("lenses: calculation = 'correlations' has no lenses (its two-time functions "
                             "are per detector); remove [lenses], or collect with a lens in a 'steady' study")
    study = Study(**fields, source=text, path=path, extra=extra)
    for check in _CHECKS:
        check(study, raw)
    return study


def study_text(p: Path) -> str:
    """The text of the study file ``p``, or a `StudyError` that says why it cannot be read."""
    if p.is_dir():
        raise StudyError(f"{p} is a directory; give the path of a study file (.toml)")
    if not p.is_file():
        raise StudyError(f"{p}: no such study file")
    try:
        return p.read_text(encoding="utf-8")
    except UnicodeDecodeError as err:
        raise StudyError(f"{p}: not a text file in UTF-8 (byte {err.start}); a study file is TOML "
                         "text") from None
    except OSError as err:
        raise StudyError(f"{p}: cannot read the study file ({err.strerror or err})") from None


def emitter_count(geometry: Geometry) -> int:
    """The number of emitters of a geometry, without drawing it."""
    p = geometry.params
    if geometry.kind == "points":
        return len(p["positions"])
    if "n" in p:
        return int(p["n"])
    return int(np.prod([p[k] for k in ("nx", "ny", "nz") if k in p], dtype=object))
