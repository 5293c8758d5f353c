"""Memory estimates, checked before anything large is allocated.

Estimates may be Python integers of any size (a density matrix of 4^N entries at N = 600): `require` and
`size_text` never turn them into a float that overflows, so a refusal is the same `MemoryError` at any N.
"""

from __future__ import annotations

import math
import os

__all__ = ["available_bytes", "require", "size_text", "as_memory_error", "release_compiled_code",
           "results_bytes"]

_DEFAULT_HINT = ("use fewer emitters (for a sampling level, a smaller chunk of samples), or a larger "
                 "machine")


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
    '0.977 GiB', '3.2 GiB', '3,072 EiB'; beyond a million EiB as a power of ten ('10^331 bytes'),
    also for integers too large for a float."""
    units = ("bytes", "KiB", "MiB", "GiB", "TiB", "PiB", "EiB")
    if isinstance(nbytes, float) and math.isinf(nbytes):
        return "more than 10^308 bytes"
    if nbytes >= 10**6 * 1024**6:  # compared exactly, also for integers beyond the range of a float
        return f"10^{math.floor(math.log10(nbytes))} bytes"
    k = 0
    while k < len(units) - 1 and nbytes >= 1000 * 1024**k:
        k += 1
    value = float(nbytes) / 1024**k
    return f"{value:.3g} {units[k]}" if value < 1000 else f"{value:,.0f} {units[k]}"


def as_memory_error(err: BaseException) -> MemoryError | None:
    """``err`` as a MemoryError when it is one or an allocation that JAX/XLA could not make
    (RESOURCE_EXHAUSTED), None for anything else."""
    if isinstance(err, MemoryError):
        return err
    names = {c.__name__ for c in type(err).__mro__}
    if names & {"XlaRuntimeError", "JaxRuntimeError"} and "RESOURCE_EXHAUSTED" in str(err):
        first = str(err).strip().splitlines()[0] if str(err).strip() else "RESOURCE_EXHAUSTED"
        return MemoryError(f"out of memory while computing ({first}); use fewer emitters, report times or "
                           "samples, or a larger machine")
    return None


def require(nbytes: float, what: str, fraction: float = 0.9, hint: str = _DEFAULT_HINT) -> None:
    """Raise MemoryError, before allocating, when ``what`` needs more than ``fraction`` of free memory.

    ``nbytes`` may be an integer of any size; ``hint`` says what to do instead (the end of the message).
    """
    have = available_bytes()
    if nbytes > fraction * have:  # int against float: exact in Python, no overflow
        raise MemoryError(
            f"{what}: about {size_text(nbytes)} needed, but this machine has {size_text(have)} free; {hint}"
        )


def _mapping_counts() -> tuple[int, int] | None:
    """(memory mappings this process holds, the kernel's limit vm.max_map_count), or None off Linux."""
    try:
        with open("/proc/sys/vm/max_map_count") as fh:
            limit = int(fh.read().split()[0])
        with open("/proc/self/maps", "rb") as fh:
            held = sum(1 for _ in fh)
    except (OSError, ValueError, IndexError):
        return None
    return held, limit


def release_compiled_code(fraction: float = 0.5) -> bool:
    """Drop JAX's compiled functions once this process holds more than ``fraction`` of the memory
    mappings the kernel allows; True when it did.

    Every function XLA compiles for the CPU keeps a few memory mappings of its machine code (about 3.4
    per compiled function, measured with jaxlib 0.4/0.5 on Linux). A process that compiles many
    different functions — many system sizes in one sweep, or a long test run — reaches Linux's limit
    (vm.max_map_count, 65,530 by default) after roughly 19,000 of them, and then the next mapping fails
    inside the compiler and the process dies of a segmentation fault, with no Python error. Called
    between tasks, this keeps a run well below that limit; what is dropped is compiled again when next
    needed (seconds), the results are unchanged. Off Linux it does nothing.
    """
    counts = _mapping_counts()
    if counts is None or counts[0] <= fraction * counts[1]:
        return False
    import gc

    import jax

    jax.clear_caches()
    gc.collect()
    return True


def results_bytes(n: int, points: int, detectors: int, levels: int, stochastic: bool, copies: int = 3) -> int:
    """An estimate of the memory of the results of ``levels`` runs of ``n`` emitters at ``points`` report
    times: per time, the per-emitter excited and coherence (3N numbers), about 12 numbers per detector and
    16 more (rates, g2, diagnostics), twice as many with the standard errors of a sampled level; times
    ``copies`` (a level's output, its Dataset, the merged one). An exact integer (no overflow)."""
    per_time = 3 * n + 12 * detectors + 16
    return copies * 8 * int(points) * per_time * (2 if stochastic else 1) * int(levels)
