"""Warnings a level issues about its own run, recorded for the result's ``warnings`` attribute.

A level calls `warn` instead of `warnings.warn`. The warning is issued as usual, under the caller's filters.
Inside `collecting()`, which `evolve` and `steady` open around the level, its message is also appended to
the list that `collecting` yields. The list lives in a context variable, so concurrent runs in other threads
(a dask worker with several threads) keep their own messages, and the global warning filters are never
touched.
"""

from __future__ import annotations

import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from contextvars import ContextVar

_collected: ContextVar[list[str] | None] = ContextVar("beyondmf_run_warnings", default=None)


def warn(message: str, stacklevel: int = 2) -> None:
    """Issue ``message`` as a UserWarning (``stacklevel`` as for `warnings.warn`, counted from the caller)
    and record it for the current run, once."""
    got = _collected.get()
    if got is not None and message not in got:
        got.append(message)
    warnings.warn(message, UserWarning, stacklevel=stacklevel + 1)


@contextmanager
def collecting() -> Iterator[list[str]]:
    """Collect the messages of `warn` issued inside the block (in this thread or task only)."""
    got: list[str] = []
    token = _collected.set(got)
    try:
        yield got
    finally:
        _collected.reset(token)
