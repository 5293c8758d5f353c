"""Approximate levels against exact steady states of small clusters: the tables of docs/calibration.md,
docs/twa.md §9 and docs/qsd_product.md §4.

    python docs/calibration/calibrate.py GRID [--levels meanfield cumulant2 ...] > table.md

GRID names a set of clusters (below). Each cluster is a uniform ball of 6 emitters at density n·λ0³ (seed
given, minimum distance 0.08 λ0), optionally with emitter 1 moved to 0.078 λ0 from emitter 0 (a close pair),
x-polarised dipoles, a resonant laser along z at Ω = 0.3, 1 and 3. The grid ``detuned``, drawn after the
rules were set, has balls of 4 and 7 emitters at n·λ0³ = 0.1, 1 and 10 (seed 31, each with and without the
close pair) under detuned drives (Ω, Δ) = (0.3, 1), (1, −1) and (5, 2).
Each level's steady state (seed 5 for the
sampled levels, their defaults otherwise) is compared with level "exact"; a run is *wrong* when the emission
rate or an intensity (forward, side) is off by more than 5 % or a g2 (forward, all light) by more than 10 %,
and *warned* when the level issued any warning about it. It prints one markdown table per level and the
counts of silent/warned and right/wrong runs. Cost on a quiet 2-core machine: about 10 s per exact steady
state, 20–40 s per sampled one.

With ``--dynamics`` the same clusters are run from t = 0 to 10 (41 report times) instead, from the ground
state at Ω = 1 and 3 and from the fully inverted state at Ω = 0 (free decay, the superradiant burst of the
cluster) and Ω = 1. Errors are then max_t |X − X_exact| / max_t |X_exact| for the emission rate and the
intensities, and the largest pointwise relative error of g2 over the times where the exact emission rate is
at least 5 % of its maximum (g2 of nearly dark light is not judged, as in `beyondmf.physicality`).
"""

from __future__ import annotations

import argparse
import warnings

import numpy as np

import beyondmf as bm
from beyondmf.integrate import SolveError
from beyondmf.levels._regimes import strongest_pair, strongest_triad

GRIDS = {
    # (density, seeds, with a close-pair variant)
    "twa-calibration": [(2.0, (11, 12), False), (8.0, (11, 12), False)],
    "twa-second": [(4.0, (21, 22), False), (8.0, (21, 22), False)],
    "meanfield-calibration": [(0.5, (11,), True), (2.0, (11, 12), True), (8.0, (11, 12), True)],
    "meanfield-second": [(0.5, (21,), True), (4.0, (21, 22), True), (8.0, (21, 22), True)],
    "qsd-clusters": [(0.5, (11, 21), False), (2.0, (11, 12), False), (8.0, (11, 21), False)],
}
# A third set, drawn after the rules were set: 4 and 7 emitters, n·λ0³ from 0.1 to 10, detuned drives
# (DETUNED_CASES) from weak to strong; (N, density, seeds, with a close-pair variant).
DETUNED = {"detuned": [(n, d, (31,), True) for n in (4, 7) for d in (0.1, 1.0, 10.0)]}
DETUNED_CASES = (("steady", 0.3, 1.0), ("steady", 1.0, -1.0), ("steady", 5.0, 2.0))  # (start, Ω, Δ)
# Rings of N = 3–6 emitters in the xy plane, dipoles along z, nearest-neighbour distance d (λ0), the laser
# along x in the plane (the forward detector along it, the side one along y): every emitter has two equally
# strong partners, the three-emitter correlations a close pair alone does not have.
RINGS = {"rings": [(d, n) for d in (0.1, 0.2) for n in (3, 4, 5, 6)]}
RABI = (0.3, 1.0, 3.0)
DYNAMICS = (("ground", 1.0), ("ground", 3.0), ("excited", 0.0), ("excited", 1.0))
TIMES = np.linspace(0.0, 10.0, 41)
DETECTORS = ("forward", "side")  # along the laser, along y
RATE_TOL, G2_TOL = 0.05, 0.10


def ring(n: int, d: float) -> np.ndarray:
    radius = d / (2 * np.sin(np.pi / n))
    phi = 2 * np.pi * np.arange(n) / n
    return np.stack([radius * np.cos(phi), radius * np.sin(phi), np.zeros(n)], axis=1)


def clusters(grid: str):
    """(label, seed, close pair, positions, dipole, laser) of each cluster of ``grid``; the forward
    detector looks along the laser, the side detector along y."""
    if grid in RINGS:
        for d, n in RINGS[grid]:
            yield f"ring N={n} d={d:g}", "—", False, ring(n, d), (0, 0, 1), (1, 0, 0)
        return
    sets = DETUNED[grid] if grid in DETUNED else [(6, *entry) for entry in GRIDS[grid]]
    for n, density, seeds, close in sets:
        radius = (n / (4 / 3 * np.pi * density)) ** (1 / 3)
        for seed in seeds:
            for with_pair in (False, True) if close else (False,):
                pos = bm.geometry.ellipsoid_cloud(n, radius, seed=seed, min_distance=0.08)
                if with_pair:
                    pos[1] = pos[0] + np.array([0.06, 0.05, 0.0])
                label = f"{density:g}" if grid not in DETUNED else f"N={n} {density:g}"
                yield label, seed, with_pair, pos, (1, 0, 0), (0, 0, 1)


def errors(ds, ex) -> dict[str, float]:
    out = {k: float(ds[k].values) / float(ex[k].values) - 1 for k in ("emission_rate", "g2_total")}
    for d in DETECTORS:
        out[f"intensity {d}"] = float(ds.intensity.sel(detector=d)) / float(ex.intensity.sel(detector=d)) - 1
    out["g2 forward"] = float(ds.g2.sel(detector="forward")) / float(ex.g2.sel(detector="forward")) - 1
    return out


def dynamic_errors(ds, ex) -> dict[str, float]:
    def peak_rel(a, b):
        return float(np.max(np.abs(a - b)) / np.max(np.abs(b)))

    lit = ex.emission_rate.values >= 0.05 * ex.emission_rate.values.max()

    def g2_rel(a, b):
        return float(np.max(np.abs(a[lit] / b[lit] - 1)))

    out = {"emission_rate": peak_rel(ds.emission_rate.values, ex.emission_rate.values),
           "g2_total": g2_rel(ds.g2_total.values, ex.g2_total.values)}
    for d in DETECTORS:
        out[f"intensity {d}"] = peak_rel(ds.intensity.sel(detector=d).values,
                                         ex.intensity.sel(detector=d).values)
    out["g2 forward"] = g2_rel(ds.g2.sel(detector="forward").values, ex.g2.sel(detector="forward").values)
    return out


def wrong(err: dict[str, float]) -> bool:
    return any(abs(v) > (G2_TOL if k.startswith("g2") else RATE_TOL) for k, v in err.items())


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("grid", choices=sorted(GRIDS) + sorted(RINGS) + sorted(DETUNED))
    p.add_argument("--levels", nargs="+", default=["meanfield", "cumulant2", "twa", "qsd_product"])
    p.add_argument("--dynamics", action="store_true", help="dynamics from the ground and the inverted state")
    a = p.parse_args()
    if a.dynamics:
        cases = tuple((start, r, 0.0) for start, r in DYNAMICS)
    elif a.grid in DETUNED:
        cases = DETUNED_CASES
    else:
        cases = tuple(("steady", r, 0.0) for r in RABI)
    rows = {lv: [] for lv in a.levels}
    counts = {lv: {} for lv in a.levels}
    for density, seed, pair, pos, dipole, laser in clusters(a.grid):
        detectors = {"forward": laser, "side": (0, 1, 0)}
        for start, rabi, detuning in cases:
            model = bm.Model(pos, dipole=dipole, rabi=rabi, detuning=detuning, laser=laser)

            def run(level, model=model, start=start, detectors=detectors):
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    if start == "steady":
                        return bm.steady(model, level, detectors=detectors, seed=5)
                    return bm.evolve(model, level, TIMES, initial=start, detectors=detectors, seed=5)

            ex = run("exact")
            for lv in a.levels:
                try:
                    ds = run(lv)
                except SolveError as fail:  # no steady state found where exact has one: wrong, not silent
                    print(f"<!-- {lv} {density} {seed} {pair} {start} {rabi:g} {detuning:g}: {fail} -->")
                    counts[lv][("raised", "wrong")] = counts[lv].get(("raised", "wrong"), 0) + 1
                    rows[lv].append(f"| {density} | {seed} | {'yes' if pair else 'no'} | "
                                    f"{model.coupling_norm():.2f} | {strongest_pair(model):.2f} | "
                                    f"{strongest_triad(model):.2f} | {start} | {rabi:g} | {detuning:g} | "
                                    f"no steady state found (SolveError) | wrong | raised |")
                    continue
                err = errors(ds, ex) if start == "steady" else dynamic_errors(ds, ex)
                verdict = "wrong" if wrong(err) else "right"
                said = "warned" if ds.attrs["warnings"] else "silent"
                if ds.attrs["warnings"]:
                    print(f"<!-- {lv} {density} {seed} {pair} {start} {rabi:g} {detuning:g}: "
                          f"{ds.attrs['warnings']} -->")
                counts[lv][(said, verdict)] = counts[lv].get((said, verdict), 0) + 1
                cells = " | ".join(f"{100 * v:+.1f}".replace("-", "−") for v in err.values())
                rows[lv].append(f"| {density} | {seed} | {'yes' if pair else 'no'} | "
                                f"{model.coupling_norm():.2f} | {strongest_pair(model):.2f} | "
                                f"{strongest_triad(model):.2f} | {start} | {rabi:g} | {detuning:g} | "
                                f"{cells} | "
                                f"{verdict} | {said} |")
    head = ("| n·λ0³ | seed | close pair | ‖iJ + ½Γ‖ (Γ0) | strongest pair (Γ0) | second partner (Γ0) "
            "| from | Ω | Δ | " + " | ".join(f"{k} %" for k in err)
            + " | verdict | warnings |")
    for lv in a.levels:
        print(f"\n### {lv} ({a.grid})\n\n{head}\n|{' --- |' * (head.count('|') - 1)}")
        print("\n".join(rows[lv]))
        c = counts[lv]
        print(f"\nsilent and wrong {c.get(('silent', 'wrong'), 0)}, warned and wrong "
              f"{c.get(('warned', 'wrong'), 0)}, warned and right {c.get(('warned', 'right'), 0)}, "
              f"silent and right {c.get(('silent', 'right'), 0)}"
              + (f", raised (no steady state) {c[('raised', 'wrong')]}" if ("raised", "wrong") in c else ""))


if __name__ == "__main__":
    main()
