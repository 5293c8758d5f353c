"""Sweeps: a study's grid × levels × realizations as resumable tasks, merged into DIR/results.nc.

The study-file sections of a sweep ([sweep], [compare], [convergence], [quick]) are read by
`beyondmf.study` (`beyondmf.study.sections`); this package turns a read study into tasks
(`build`: seeds, level tables, one task's parameters), runs them through an executor and stacks the task
files into one Dataset (`run`, `merge`), and compares levels on the same draws outside a study file
(`run.compare_levels`).

Every (grid point, level, realization) is one task (`beyondmf.tasks`): a pure function of its parameters,
written to DIR/tasks/<hash>.nc when it finishes, so running the same command again resumes.
"""

from ..study.sections import (
    EXTRA_OBSERVABLES,
    GRID_QUANTITIES,
    MAX_TASKS,
    check_convergence,
    check_plan,
    format_value,
    grid_quantity,
    is_sweep,
    read_study,
    study_from_table,
    to_toml,
)
from .build import build_task, level_table, realization_seeds
from .merge import shared_parameters, stack
from .run import compare_levels, run_sweep, study_tasks

__all__ = [
    "run_sweep", "study_tasks", "compare_levels", "stack", "shared_parameters", "build_task", "level_table",
    "realization_seeds",
    # re-exported from beyondmf.study.sections: what a sweep script also needs
    "read_study", "study_from_table", "to_toml", "is_sweep", "check_plan", "check_convergence",
    "grid_quantity", "format_value", "EXTRA_OBSERVABLES", "GRID_QUANTITIES", "MAX_TASKS",
]
