"""Memory estimates, checked before anything large is allocated."""

from __future__ import annotations

import os

__all__ = ["available_bytes", "require"]


def available_bytes() -> int:
    """Memory the machine can still give (MemAvailable on Linux; physical memory elsewhere)."""
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")


def require(nbytes: float, what: str, fraction: float = 0.9) -> None:
    """Raise MemoryError, before allocating, when ``what`` needs more than ``fraction`` of free memory."""
    have = available_bytes()
    if nbytes > fraction * have:
        raise MemoryError(
            f"{what}: about {nbytes / 2**30:.1f} GiB needed, but this machine has {have / 2**30:.1f} GiB "
            "free; "
            "use fewer emitters (for a sampling level, a smaller chunk of samples), or a larger machine"
        )
