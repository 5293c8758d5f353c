"""Process-wide numerical settings: JAX in 64-bit mode, set once on import."""

import jax

jax.config.update("jax_enable_x64", True)
