"""Benchmarks (`beyondmf bench`): one module per suite, each registering itself with `suite`.

A suite is a function ``fn(full: bool, machine: Machine) -> list[Row]``. Speed targets are ratios to the
machine's own float64 matrix-product peak or streaming bandwidth, measured in the same run
(`machine.measure`), so a noisy shared machine still gives meaningful numbers.
"""

from __future__ import annotations

from collections.abc import Callable

from ._core import SUITES, Row, suite
from .machine import Machine, measure, median_time

__all__ = ["Row", "suite", "suites", "run_suites", "Machine", "measure", "median_time"]


def suites() -> dict[str, Callable]:
    from . import _all  # noqa: F401  (imports every suite module)

    return dict(SUITES)


def run_suites(names: list[str] | None, full: bool, machine: Machine | None = None) -> list[Row]:
    known = suites()
    names = names or list(known)
    unknown = [n for n in names if n not in known]
    if unknown:
        raise ValueError(f"unknown benchmark suite(s) {', '.join(unknown)}; known: {', '.join(known)}")
    machine = machine or measure()
    rows = machine.rows()
    for name in names:
        rows.extend(known[name](full, machine))
    return rows
