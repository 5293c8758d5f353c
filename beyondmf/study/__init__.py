"""Study files: a cloud, a drive, detectors, a calculation and the levels to run it at, in TOML (the schema
is ours, docs/study-files.md).

- `schema`: the sections every study has, parsed into a `Study`; problems are a `StudyError` whose message
  starts with the key at fault.
- `sections`: the sections of a sweep ([sweep], [compare], [convergence], [quick]), the checks across
  sections, the planning limits, and `read_study`, the one reader of study files (also
  ``beyondmf.read_study``).
- `single`: `run_study`, a study of one model at every level it lists.

Sweeps of a study run in `beyondmf.sweep`.
"""

from ..geometry import detector_direction
from .schema import (
    Study,
    StudyError,
    emitter_count,
    parse_study,
    parse_table,
    section,
    study_check,
    study_text,
)
from .sections import (
    MAX_TASKS,
    CompareSpec,
    ConvergenceSpec,
    SweepSpec,
    check_convergence,
    check_plan,
    is_sweep,
    plan_estimate,
    read_study,
    study_from_table,
    to_toml,
)
from .single import check_run_size, run_study

__all__ = [
    "Study", "StudyError", "read_study", "parse_study", "parse_table", "study_from_table", "to_toml",
    "run_study", "check_run_size", "is_sweep", "check_plan", "plan_estimate", "check_convergence",
    "SweepSpec", "CompareSpec", "ConvergenceSpec", "MAX_TASKS", "section", "study_check", "study_text",
    "emitter_count", "detector_direction",
]
