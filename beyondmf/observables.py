"""Every observable of the data contract, built once from the `Moments` any level reports.

    I(n̂)      = (3/8π)(1 − |ê·n̂|²) ⟨E†E⟩,          E = Σ_j e^{−i2π n̂·r_j} σ_j⁻
    coherent  = (3/8π)(1 − |ê·n̂|²) |Σ_j e^{−i2π n̂·r_j} ⟨σ_j⁻⟩|²,   incoherent = I − coherent
                (sampling levels: the unbiased estimate of the squared mean, levels._sampling)
    g2(n̂)     = ⟨E†E†EE⟩ / ⟨E†E⟩²,   g2_total = Σ Γ_ij Γ_kl ⟨σ_i⁺σ_k⁺σ_l⁻σ_j⁻⟩ / P²,   P = Σ Γ_ij ⟨σ_i⁺σ_j⁻⟩

Standard errors of the ratios follow from the delta method with the covariances a sampling level reports.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import xarray as xr

from .beam import transmission, transmission_factor
from .levels.base import Moments, Probes
from .model import Model

__all__ = ["assemble", "detector_prefactor", "stderr_attrs"]

_UNITS = {
    "excited": ("probability", "excited population ⟨σ_i⁺σ_i⁻⟩"),
    "coherence": ("1", "coherence ⟨σ_i⁻⟩"),
    "emission_rate": ("photons per 1/Γ0", "total emission rate P = Σ Γ_ij ⟨σ_i⁺σ_j⁻⟩"),
    "intensity": ("photons per 1/Γ0 per steradian", "far-field intensity I(n̂)"),
    "intensity_coherent": ("photons per 1/Γ0 per steradian", "coherent part of I(n̂)"),
    "intensity_incoherent": ("photons per 1/Γ0 per steradian", "incoherent part of I(n̂)"),
    "g2": ("1", "second-order coherence at zero delay, per detector"),
    "g2_total": ("1", "second-order coherence of all emitted light"),
    "transmission": ("1", "coherent amplitude t transmitted into the probe beam's mode"),
    "transmission_power": ("1", "power transmission |t|² of the probe beam's mode"),
    "optical_depth": ("1", "optical depth −ln|t|² of the probe beam's mode"),
    "lens_power": ("photons per 1/Γ0", "power emitted into the lens's cone"),
    "lens_power_coherent": ("photons per 1/Γ0", "coherent part of the power into the lens's cone"),
    "lens_power_incoherent": ("photons per 1/Γ0", "incoherent part of the power into the lens's cone"),
}


def stderr_attrs(attrs: dict) -> dict:
    """The attributes of ``<name>_stderr`` from those of ``<name>``: the same units, the long name of a
    sampling error."""
    return {**attrs, "long_name": f"standard error (sampling) of the {attrs.get('long_name', 'value')}"}


def detector_prefactor(model: Model, probes: Probes) -> np.ndarray:
    """(3/8π)(1 − |ê·n̂|²) for each detector."""
    proj = np.abs(probes.directions @ model.dipole) ** 2
    return 3 / (8 * np.pi) * (1 - proj)


def _ratio_stderr(a, b, sa, sb, cab):
    """Delta-method standard error of a/b² from the errors and covariance of the means a, b."""
    with np.errstate(divide="ignore", invalid="ignore"):
        var = sa**2 / b**4 + 4 * a**2 * sb**2 / b**6 - 4 * a * cab / b**5
    return np.sqrt(np.maximum(var, 0))


def _transmission(model: Model, coherence: np.ndarray, times, mode_cov=None) -> dict:
    """t, |t|² and −ln|t|² of the probe's mode (docs/transmission.md), from the coherences alone, so the
    same at every level; NaN where the probe is off.

    ``mode_cov`` (T, 3): at a sampling level, the covariance (V_rr, V_ii, V_ri) of the mean projection
    A = Σ_j u_j*⟨σ_j⁻⟩ (`levels._sampling.mode_covariance`). Then t = 1 + zA is linear in A, so its
    covariance is C = M V Mᵀ with M the real 2 × 2 form of z; |t|² is reported without the bias tr C
    of the squared mean (as the coherent intensity is, `levels._sampling`), with the standard errors
    of t (√tr C), of |t|² (√(4 μᵀCμ + 2 tr C²), the moments of a Gaussian quadratic form) and of −ln|t|²
    (that over |t|²)."""
    if times is None or model.envelope.constant:
        env = np.ones(len(coherence))
    else:
        env = np.asarray(model.envelope(np.asarray(times, dtype=float)), dtype=float).reshape(-1)
    t = transmission(model.beam, model, coherence, env)
    with np.errstate(divide="ignore", invalid="ignore"):
        power = np.abs(t) ** 2
        out = {"transmission": (("time",), t)}
        if mode_cov is not None:
            z = transmission_factor(model.beam, model, env)  # t = 1 + z·A
            zr, zi = z.real, z.imag
            v_rr, v_ii, v_ri = (np.asarray(mode_cov)[..., k] for k in range(3))
            c_rr = zr * zr * v_rr - 2 * zr * zi * v_ri + zi * zi * v_ii
            c_ii = zi * zi * v_rr + 2 * zr * zi * v_ri + zr * zr * v_ii
            c_ri = zr * zi * (v_rr - v_ii) + (zr * zr - zi * zi) * v_ri
            x, y = t.real, t.imag
            power = power - (c_rr + c_ii)
            se_power = np.sqrt(np.maximum(4 * (x * x * c_rr + y * y * c_ii + 2 * x * y * c_ri)
                                          + 2 * (c_rr**2 + c_ii**2 + 2 * c_ri**2), 0.0))
            out["transmission_stderr"] = (("time",), np.sqrt(np.maximum(c_rr + c_ii, 0.0)), {
                "units": "1", "long_name": "standard error (sampling) of the coherent amplitude t transmitted"
                                           " into the probe beam's mode, √(Var Re t + Var Im t)"})
            out["transmission_power_stderr"] = (("time",), se_power)
            out["optical_depth_stderr"] = (("time",), se_power / power)
        out["transmission_power"] = (("time",), power)
        out["optical_depth"] = (("time",), -np.log(power))
    return out


def _lens_power(probes: Probes, intensity, coherent, m: Moments, pref) -> dict:
    """Power into each lens (`beyondmf.lens`): the quadrature of the intensity over its cone, and of its
    coherent and incoherent parts. At a sampling level the standard error is bounded from above by the
    weighted sum of the nodes' errors (their errors are correlated: the same samples), said in its name."""
    if not probes.lenses:
        return {}
    total = np.stack([intensity[..., s] @ w for s, w in zip(probes.lens_nodes, probes.lens_weights,
                                                             strict=True)], axis=-1)
    coh = np.stack([coherent[..., s] @ w for s, w in zip(probes.lens_nodes, probes.lens_weights,
                                                          strict=True)], axis=-1)
    out = {"lens_power": (("time", "lens"), total), "lens_power_coherent": (("time", "lens"), coh),
           "lens_power_incoherent": (("time", "lens"), total - coh)}
    if m.stderr and "field2" in m.stderr:
        bound = np.stack([(pref[s] * m.stderr["field2"][..., s]) @ w
                          for s, w in zip(probes.lens_nodes, probes.lens_weights, strict=True)], axis=-1)
        out["lens_power_stderr"] = (("time", "lens"), bound, {
            "units": "photons per 1/Γ0",
            "long_name": "upper bound of the standard error (sampling) of the power into the lens "
                         "(the weighted sum of its quadrature nodes' errors)"})
    return out


def assemble(
    model: Model,
    level: str,
    moments: Moments,
    probes: Probes,
    times: np.ndarray | None,
    attrs: dict[str, Any],
) -> xr.Dataset:
    """The results Dataset of conventions.md; ``times=None`` drops the time axis (a steady state)."""
    m = moments.to_numpy()
    pref = detector_prefactor(model, probes)
    with np.errstate(divide="ignore", invalid="ignore"):
        g2 = m.field4 / m.field2**2
        g2_total = m.rate4 / m.rate**2
    if m.coherent_field is None:
        coherent = pref * np.abs(m.coherence @ probes.weights.T) ** 2
    else:  # a sampling level's unbiased estimate (levels._sampling)
        coherent = pref * m.coherent_field
    intensity = pref * m.field2
    nd = len(probes.names)  # the detectors; the lenses' quadrature nodes follow them
    lenses = _lens_power(probes, intensity, coherent, m, pref)
    m.field2, m.field4, intensity, coherent, g2 = (a[..., :nd] for a in (m.field2, m.field4, intensity,
                                                                          coherent, g2))
    if m.coherent_field is not None:
        m.coherent_field = m.coherent_field[..., :nd]
    for key in ("field2", "field4", "coherent_field"):
        if key in m.stderr:
            m.stderr[key] = m.stderr[key][..., :nd]
    for key in ("field", "field2,coherent"):
        if np.ndim(m.cov.get(key, 0.0)) >= 1:
            m.cov[key] = m.cov[key][..., :nd]
    pref = pref[:nd]
    data = {
        "excited": (("time", "emitter"), m.excited),
        "coherence": (("time", "emitter"), m.coherence),
        "emission_rate": (("time",), m.rate),
        "intensity": (("time", "detector"), intensity),
        "intensity_coherent": (("time", "detector"), coherent),
        "intensity_incoherent": (("time", "detector"), intensity - coherent),
        "g2": (("time", "detector"), g2),
        "g2_total": (("time",), g2_total),
    }
    if m.stderr:
        se = m.stderr
        data["excited_stderr"] = (("time", "emitter"), se["excited"])
        data["coherence_stderr"] = (("time", "emitter"), se["coherence"])
        data["emission_rate_stderr"] = (("time",), se["rate"])
        data["intensity_stderr"] = (("time", "detector"), pref * se["field2"])
        if "coherent_field" in se:
            sc = se["coherent_field"]
            data["intensity_coherent_stderr"] = (("time", "detector"), pref * sc)
            var = se["field2"] ** 2 + sc**2 - 2 * m.cov["field2,coherent"]
            data["intensity_incoherent_stderr"] = (("time", "detector"), pref * np.sqrt(np.maximum(var, 0)))
        data["g2_stderr"] = (
            ("time", "detector"),
            _ratio_stderr(m.field4, m.field2, se["field4"], se["field2"], m.cov.get("field", 0.0)),
        )
        data["g2_total_stderr"] = (
            ("time",),
            _ratio_stderr(m.rate4, m.rate, se["rate4"], se["rate"], m.cov.get("rate", 0.0)),
        )
    for name, (dims, arr, *described) in m.diagnostics.items():
        data[name] = (dims, arr, *described)
    if model.beam is not None:
        data.update(_transmission(model, m.coherence, times, m.cov.get("mode")))
    data.update(lenses)

    coords = {
        "emitter": np.arange(model.n),
        "detector": list(probes.names),
        "axis": ["x", "y", "z"],
        "position": (("emitter", "axis"), model.positions),
        "direction": (("detector", "axis"), probes.directions[: len(probes.names)]),
    }
    if times is not None:
        coords["time"] = np.asarray(times, dtype=float)
    if probes.lenses:
        coords["lens"] = [lens.name for lens in probes.lenses]
        coords["lens_axis"] = (("lens", "axis"), np.array([lens.axis for lens in probes.lenses]))
        coords["lens_na"] = (("lens",), np.array([lens.na for lens in probes.lenses]))
        coords["lens_half_angle"] = (("lens",), np.degrees([lens.half_angle for lens in probes.lenses]))
    ds = xr.Dataset(data, coords=coords)
    if times is None:
        ds = ds.isel(time=0, drop=True) if "time" in ds.dims else ds
    for name, (unit, long) in _UNITS.items():
        if name in ds:
            ds[name].attrs.update(units=unit, long_name=long)
        if f"{name}_stderr" in ds and "long_name" not in ds[f"{name}_stderr"].attrs:
            ds[f"{name}_stderr"].attrs.update(stderr_attrs({"units": unit, "long_name": long}))
    if times is not None:
        ds["time"].attrs.update(units="1/Γ0", long_name="time")
    ds["position"].attrs.update(units="λ0", long_name="emitter positions")
    ds["direction"].attrs.update(units="1", long_name="detector directions (unit vectors)")
    if probes.lenses:
        ds["lens_axis"].attrs.update(units="1", long_name="lens axes (unit vectors)")
        ds["lens_na"].attrs.update(units="1", long_name="numerical aperture of the lens (sin of half_angle, "
                                                       "1 beyond 90°)")
        ds["lens_half_angle"].attrs.update(units="degree", long_name="half angle of the collection cone")
        ds.attrs["lens_nodes"] = [len(w) for w in probes.lens_weights]
    ds.attrs.update(attrs)
    ds.attrs.update(m.attrs)
    return ds
