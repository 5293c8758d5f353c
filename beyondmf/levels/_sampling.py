"""The coherent part of the far field from samples, without the bias of a squared mean.

The coherent intensity is a product of means, C_d = |μ_d|² with μ_d = Σ_j w_dj ⟨σ_j⁻⟩. A sampling level has
one amplitude A_d = Σ_j w_dj s_j⁻ per sample (s_j⁻ the sample's symbol of σ_j⁻: β_j for twa, ⟨ψ|σ_j⁻|ψ⟩
for a quantum-jump trajectory) and the mean m_d of S of them. |m_d|² over-estimates C_d by the variance of
the mean, E|m_d|² = C_d + (V_rr + V_ii)/S, with V_rr, V_ii the variances of Re A and Im A over samples. At
weak drive that bias can exceed the incoherent part I − C itself (V ≈ ½ per emitter for twa's vacuum
fluctuations, against an incoherent intensity of order |β|⁴), so we report the unbiased estimator

    Ĉ_d = |m_d|² − (V̂_rr + V̂_ii)/S          (sample variances with S − 1; E Ĉ_d = C_d exactly)

and its standard error from the normal approximation of m_d (mean μ, covariance V/S):

    Var Ĉ_d ≈ 4 μᵀ(V/S)μ + 2 tr((V/S)²),      Cov(f̂2_d, Ĉ_d) ≈ 2 (a·c_fr + b·c_fi)/S,

with μ = (a, b) = (Re m_d, Im m_d) and c_fr, c_fi the sample covariances of the per-sample ⟨E_d†E_d⟩ with
Re A_d, Im A_d; the incoherent part I − C then has Var f̂2 + Var Ĉ − 2 Cov. Both formulas are the
textbook moments of a quadratic form of a Gaussian vector (common practice).
"""

from __future__ import annotations

import numpy as np

__all__ = ["amplitude_sums", "coherent_statistics", "mode_sums", "mode_covariance", "UNSETTLED_SIGMAS"]

# A sampled steady state whose settling check moved by more than this many standard errors had not
# settled: the level warns (twa, qsd_product, jumps).
UNSETTLED_SIGMAS = 4.0


def amplitude_sums(amp, field2, wsum) -> dict:
    """Sums over samples of the amplitude and the products the statistics need.

    ``amp`` (S, …, D) complex per-sample amplitudes, ``field2`` (S, …, D) per-sample ⟨E†E⟩, ``wsum`` a
    function that sums an array over its leading (sample) axis, with the level's masking.
    """
    re, im = amp.real, amp.imag
    return {
        "amp": wsum(amp),
        "amp_rr": wsum(re * re),
        "amp_ii": wsum(im * im),
        "amp_ri": wsum(re * im),
        "amp_fr": wsum(field2 * re),
        "amp_fi": wsum(field2 * im),
    }


def coherent_statistics(sums: dict, field2_sum, count: int):
    """(Ĉ, its standard error, Cov(f̂2, Ĉ)) from the sums of `amplitude_sums` over ``count`` samples.

    Everything is per detector (and per time), without the detector prefactor (3/8π)(1 − |ê·n̂|²).
    """
    s = float(count)
    m = np.asarray(sums["amp"]) / s
    a, b = m.real, m.imag
    f = np.asarray(field2_sum) / s
    d = max(s - 1.0, 1.0)
    v_rr = (np.asarray(sums["amp_rr"]) - s * a * a) / d
    v_ii = (np.asarray(sums["amp_ii"]) - s * b * b) / d
    v_ri = (np.asarray(sums["amp_ri"]) - s * a * b) / d
    c_fr = (np.asarray(sums["amp_fr"]) - s * f * a) / d
    c_fi = (np.asarray(sums["amp_fi"]) - s * f * b) / d
    coherent = a * a + b * b - (v_rr + v_ii) / s
    var = (4 * (a * a * v_rr + b * b * v_ii + 2 * a * b * v_ri) / s
           + 2 * (v_rr**2 + v_ii**2 + 2 * v_ri**2) / s**2)
    cov = 2 * (a * c_fr + b * c_fi) / s
    return coherent, np.sqrt(np.maximum(var, 0.0)), cov


def mode_sums(amp, wsum) -> dict:
    """Sums over samples of the per-sample projection A = Σ_j u_j* s_j⁻ onto the probe beam's mode and of
    its second moments (``amp`` (S, …) complex): the sampling error of the transmission."""
    re, im = amp.real, amp.imag
    return {"mode_r": wsum(re), "mode_i": wsum(im), "mode_rr": wsum(re * re), "mode_ii": wsum(im * im),
            "mode_ri": wsum(re * im)}


def mode_covariance(sums: dict, count: int) -> np.ndarray:
    """(…, 3): the covariance (V_rr, V_ii, V_ri) of the mean projection onto the mode, Re and Im parts,
    over ``count`` samples (sample covariances with S − 1, divided by S)."""
    s = float(count)
    a, b = np.asarray(sums["mode_r"]) / s, np.asarray(sums["mode_i"]) / s
    d = max(s - 1.0, 1.0)
    v_rr = (np.asarray(sums["mode_rr"]) - s * a * a) / d
    v_ii = (np.asarray(sums["mode_ii"]) - s * b * b) / d
    v_ri = (np.asarray(sums["mode_ri"]) - s * a * b) / d
    return np.stack([v_rr, v_ii, v_ri], axis=-1) / s
