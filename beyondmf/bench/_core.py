"""The registry of benchmark suites and the row every suite reports (imported by the suites and by the
package; it imports none of them)."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import asdict, dataclass
from typing import Any

__all__ = ["Row", "suite", "SUITES"]


@dataclass
class Row:
    """One measured figure."""

    suite: str
    case: str
    metric: str
    value: float
    unit: str
    note: str = ""

    def as_dict(self) -> dict:
        return asdict(self)


SUITES: dict[str, Callable[[bool, Any], list[Row]]] = {}  # name → fn(full, machine)


def suite(name: str):
    """Decorator: register a benchmark suite under ``name``."""

    def deco(fn):
        SUITES[name] = fn
        return fn

    return deco
