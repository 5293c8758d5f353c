"""Warnings a level issues about its own run, recorded for the result's ``warnings`` attribute.

A level calls `warn` instead of `warnings.warn`. The warning is issued as usual, under the caller's filters,
and it points at the first line outside this package (the user's script or notebook cell, whether the run
came through `evolve`, a sweep or `compare_levels`).
Inside `collecting()`, which `evolve` and `steady` open around the level, its message is also appended to
the list that `collecting` yields. The list lives in a context variable, so concurrent runs in other threads
(a dask worker with several threads) keep their own messages, and the global warning filters are never
touched.
"""

from __future__ import annotations

import sys
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from contextvars import ContextVar

_collected: ContextVar[list[str] | None] = ContextVar("beyondmf_run_warnings", default=None)
_silent: ContextVar[bool] = ContextVar("beyondmf_record_only", default=False)


def warn(message: str) -> None:
    """Issue ``message`` as a UserWarning located at the first caller outside this package, and record it
    for the current run, once (inside `recording_only`: record it only)."""
    got = _collected.get()
    if got is not None and message not in got:
        got.append(message)
    if not _silent.get():
        warnings.warn(message, UserWarning, stacklevel=_outside_package())


@contextmanager
def recording_only() -> Iterator[None]:
    """Inside the block the levels' warnings are recorded in their results but not printed: for a dask
    worker, whose output would cut into the progress bar of the command that waits for it (that command
    reports the recorded warnings itself)."""
    token = _silent.set(True)
    try:
        yield
    finally:
        _silent.reset(token)


def _outside_package() -> int:
    """The `warnings.warn` stacklevel, counted from `warn`, of the innermost frame outside this package."""
    frame = sys._getframe(2)  # the caller of `warn`; stacklevel 2 counted from `warn`
    level = 2
    # by module name, not file path: a package imported through a symbolic link keeps the link's path
    while frame is not None and frame.f_globals.get("__name__", "").partition(".")[0] == "beyondmf":
        frame = frame.f_back
        level += 1
    return level


@contextmanager
def collecting() -> Iterator[list[str]]:
    """Collect the messages of `warn` issued inside the block (in this thread or task only)."""
    got: list[str] = []
    token = _collected.set(got)
    try:
        yield got
    finally:
        _collected.reset(token)
