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


def size_text(nbytes: float) -> str:
    """A memory size for a message, in the largest binary unit it reaches 1000 of: '512 bytes', '16.8 MiB',
    '0.977 GiB', '3.2 GiB', '3,072 EiB'."""
    units = ("bytes", "KiB", "MiB", "GiB", "TiB", "PiB", "EiB")
    k = 0
    while k < len(units) - 1 and nbytes >= 1000 * 1024**k:
        k += 1
    value = nbytes / 1024**k
    return f"{value:.3g} {units[k]}" if value < 1000 else f"{value:,.0f} {units[k]}"


def require(nbytes: float, what: str, fraction: float = 0.9) -> None:
    """Raise MemoryError, before allocating, when ``what`` needs more than ``fraction`` of free memory."""
    have = available_bytes()
    if nbytes > fraction * have:
        raise MemoryError(
            f"{what}: about {size_text(nbytes)} needed, but this machine has {size_text(have)} free; "
            "use fewer emitters (for a sampling level, a smaller chunk of samples), or a larger machine"
        )
