"""Product-state moment sums against brute-force operator algebra on 2^N-dimensional states
(direct construction; common practice)."""

import numpy as np
import pytest

from beyondmf.estimators import product_field_moments, product_rate_moments
from tests.helpers_ops import lowering, product_density


def brute(rho, G, sm):
    sp = [s.conj().T for s in sm]
    n = len(sm)
    two = sum(G[i, j] * np.trace(rho @ sp[i] @ sm[j]) for i in range(n) for j in range(n))
    four = sum(
        G[i, j] * G[k, l] * np.trace(rho @ sp[i] @ sp[k] @ sm[l] @ sm[j])
        for i in range(n) for j in range(n) for k in range(n) for l in range(n)
    )
    return two.real, four.real


def moments_of(bloch):
    beta = (bloch[:, 0] - 1j * bloch[:, 1]) / 2
    n = (1 + bloch[:, 2]) / 2
    return beta, n


@pytest.mark.parametrize("n_emit", [1, 2, 3, 4])
def test_four_body_sums_match_operator_algebra(n_emit, rng):
    v = rng.normal(size=(n_emit, 3))
    bloch = v / np.linalg.norm(v, axis=1, keepdims=True) * rng.uniform(0.3, 1.0, size=(n_emit, 1))
    rho = product_density(bloch)
    sm = lowering(n_emit)
    beta, n = moments_of(bloch)
    A = rng.normal(size=(n_emit, n_emit)) + 1j * rng.normal(size=(n_emit, n_emit))
    G = A @ A.conj().T  # Hermitian positive semi-definite, complex
    two, four = product_rate_moments(beta, n, G)
    b2, b4 = brute(rho, G, sm)
    assert float(two) == pytest.approx(b2, rel=1e-12, abs=1e-12)
    assert float(four) == pytest.approx(b4, rel=1e-10, abs=1e-12)

    w = np.exp(-2j * np.pi * rng.uniform(size=(2, n_emit)))
    f2, f4 = product_field_moments(beta, n, w)
    for d in range(2):
        Gd = np.outer(w[d].conj(), w[d])
        b2, b4 = brute(rho, Gd, sm)
        assert float(f2[d]) == pytest.approx(b2, rel=1e-12, abs=1e-12)
        assert float(f4[d]) == pytest.approx(b4, rel=1e-10, abs=1e-12)


def test_single_emitter_is_antibunched():
    # g2(0) = 0 for one emitter: H. J. Kimble, M. Dagenais, L. Mandel, Phys. Rev. Lett. 39, 691 (1977)
    beta, n = np.array([0.2 - 0.1j]), np.array([0.3])
    _, four = product_rate_moments(beta, n, np.ones((1, 1)))
    assert abs(float(four)) < 1e-15


def test_inverted_emitters_give_dicke_g2():
    # fully inverted N emitters, all-to-all: g2_total = 2(1 − 1/N) (references.md, derived from the
    # ladder matrix elements of R. H. Dicke, Phys. Rev. 93, 99 (1954))
    for N in (2, 5, 40):
        two, four = product_rate_moments(np.zeros(N, complex), np.ones(N), np.ones((N, N)))
        assert float(four) / float(two) ** 2 == pytest.approx(2 * (1 - 1 / N), rel=1e-12)


def _coherent_repetitions(rng, mu, S, reps):
    """Ĉ, its quoted error, and the quoted error of f̄ − Ĉ over ``reps`` independent sets of S samples of a
    complex amplitude A (correlated real and imaginary parts) and a per-sample ⟨E†E⟩ f = |A|² + noise."""
    from beyondmf.levels._sampling import amplitude_sums, coherent_statistics

    L = np.array([[1.0, 0.0], [0.6, 0.8]])  # Cov(Re A, Im A) = L Lᵀ, unit variances
    z = rng.normal(size=(reps, S, 2)) @ L.T
    amp = mu + z[..., 0] + 1j * z[..., 1]
    f2 = np.abs(amp) ** 2 + rng.normal(size=(reps, S))
    out = []
    for a, f in zip(amp, f2, strict=True):
        sums = amplitude_sums(a[:, None], f[:, None], lambda v: v.sum(axis=0))
        c, e, cv = coherent_statistics(sums, f.sum(axis=0, keepdims=True), S)
        se_f2 = f.std(ddof=1) / np.sqrt(S)
        incoh_err = np.sqrt(se_f2**2 + e[0] ** 2 - 2 * cv[0])
        out.append((abs(a.mean()) ** 2, c[0], e[0], f.mean() - c[0], incoh_err))
    return np.array(out).T


def test_sampled_coherent_part_is_unbiased(rng):
    """levels._sampling: for S samples of an amplitude A with mean μ, E|mean A|² = |μ|² + Var(mean A), while
    Ĉ = |mean A|² − (V̂_rr + V̂_ii)/S has expectation |μ|² exactly (common practice). 4000 repetitions of
    S = 50 with |μ|² = 0.02, below the variance of the mean (0.04): the squared mean is biased by 200 %."""
    naive, est, *_ = _coherent_repetitions(rng, 0.1 + 0.1j, 50, 4000)
    target = 0.02
    assert abs(est.mean() - target) < 4 * est.std(ddof=1) / np.sqrt(len(est))
    assert naive.mean() - target == pytest.approx(2.0 / 50, rel=0.1)  # the bias Ĉ removes: (V_rr + V_ii)/S


def test_sampled_coherent_and_incoherent_errors_are_honest(rng):
    """The quoted standard errors of Ĉ and of the incoherent part f̄ − Ĉ (delta method for a Gaussian
    quadratic form; common practice) against the spread over 3000 repetitions of S = 200 samples with
    |μ|² = 0.34, well above the variance of the mean (0.01), where the first-order covariance applies."""
    _, est, err, incoh, incoh_err = _coherent_repetitions(rng, 0.5 + 0.3j, 200, 3000)
    assert np.median(err) == pytest.approx(est.std(ddof=1), rel=0.1)
    assert np.median(incoh_err) == pytest.approx(incoh.std(ddof=1), rel=0.1)
