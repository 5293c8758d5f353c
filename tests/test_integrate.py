"""The shared integration machinery: the stabilised density-matrix equations and the error-control
warning."""

from __future__ import annotations

import jax.numpy as jnp
import numpy as np
import pytest

from beyondmf import _notes
from beyondmf import integrate as ig


def test_stabilized_rhs_damps_what_leaves_the_physical_matrices():
    """dy/dt = f(P(y)) − κ(y − P(y)) (integrate.stabilized): on Hermitian unit-trace ρ it is f itself; an
    anti-Hermitian or trace part e added to ρ comes back as −κe (f(P(y)) is Hermitian and traceless)."""
    rng = np.random.default_rng(0)
    d = 4
    h = rng.normal(size=(d, d)) + 1j * rng.normal(size=(d, d))
    h = h + h.conj().T  # a Hamiltonian: f(ρ) = −i[h, ρ], Hermitian and traceless for Hermitian ρ

    def rhs(t, y, args):
        rho = y[0] + 1j * y[1]
        out = -1j * (h @ rho - rho @ h)
        return jnp.stack([out.real, out.imag])

    a = rng.normal(size=(d, d)) + 1j * rng.normal(size=(d, d))
    rho = a @ a.conj().T
    rho /= np.trace(rho)
    y = np.stack([rho.real, rho.imag])
    e = rng.normal(size=(d, d)) + 1j * rng.normal(size=(d, d))
    e = 0.5 * (e - e.conj().T) + 0.3 * np.eye(d)  # anti-Hermitian plus a trace
    ye = y + np.stack([e.real, e.imag])
    f, _ = ig.stabilized(rhs, ig.hermitian_unit_trace)
    np.testing.assert_allclose(f(0.0, jnp.asarray(y), None), rhs(0.0, y, None), atol=1e-13)
    np.testing.assert_allclose(f(0.0, jnp.asarray(ye), None),
                               np.asarray(rhs(0.0, y, None)) - ig.RELAX_RATE * np.stack([e.real, e.imag]),
                               atol=1e-12)


def test_check_bounds_warns_only_beyond_the_error_control():
    opts = {"rtol": 1e-6, "atol": 1e-8}
    with _notes.collecting() as notes:
        ig.check_bounds("test run", {"n ≤ 1": 1e-6}, opts)
    assert not notes
    with _notes.collecting() as notes, pytest.warns(UserWarning, match=r"n ≤ 1 broken by 0\.01.*rtol"):
        ig.check_bounds("test run", {"n ≤ 1": 1e-2}, opts)
    assert notes
