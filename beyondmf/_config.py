"""Process-wide settings: JAX in 64-bit mode, set once on import, and whether to show progress.

The package computes in double precision throughout (its tolerances, the exact levels' invariants and the
cancellations in the cumulant estimators need it), so importing beyondmf switches JAX to 64-bit for the whole
process (``jax_enable_x64``). JAX code of the user's own that relies on JAX's 32-bit default should ask for
``float32`` explicitly (``jnp.asarray(x, dtype=jnp.float32)``), or run in a process without beyondmf.
"""

import sys

import jax

jax.config.update("jax_enable_x64", True)

#: set by ``beyondmf --quiet`` (or by a caller): no progress bars, whatever a level's ``progress`` option says
#: when it is "auto".
QUIET = False


def show_progress(option) -> bool:
    """Whether a run shows a progress bar: ``progress = "auto"`` shows one on a terminal unless `QUIET`;
    True or False force it."""
    if option == "auto":
        return (not QUIET) and sys.stderr.isatty()
    return bool(option)
