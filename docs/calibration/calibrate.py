"""Approximate levels against exact steady states of small clusters: the tables of docs/calibration.md,
docs/twa.md §9 and docs/qsd_product.md §4.

    python docs/calibration/calibrate.py GRID [--levels meanfield cumulant2 ...] > table.md

GRID names a set of clusters (below). Each cluster is a uniform ball of 6 emitters at density n·λ0³ (seed
given, minimum distance 0.08 λ0), optionally with emitter 1 moved to 0.078 λ0 from emitter 0 (a close pair),
x-polarised dipoles, a resonant laser along z at Ω = 0.3, 1 and 3. Each level's steady state (seed 5 for the
sampled levels, their defaults otherwise) is compared with level "exact"; a run is *wrong* when the emission
rate or an intensity (forward, side) is off by more than 5 % or a g2 (forward, all light) by more than 10 %,
and *warned* when the level issued any warning about it. It prints one markdown table per level and the
counts of silent/warned and right/wrong runs. Cost on a quiet 2-core machine: about 10 s per exact steady
state, 20–40 s per sampled one.
"""

from __future__ import annotations

import argparse
import warnings

import numpy as np

import beyondmf as bm

GRIDS = {
    # (density, seeds, with a close-pair variant)
    "twa-calibration": [(2.0, (11, 12), False), (8.0, (11, 12), False)],
    "twa-second": [(4.0, (21, 22), False), (8.0, (21, 22), False)],
    "meanfield-calibration": [(0.5, (11,), True), (2.0, (11, 12), True), (8.0, (11, 12), True)],
    "meanfield-second": [(0.5, (21,), True), (4.0, (21, 22), True), (8.0, (21, 22), True)],
    "qsd-clusters": [(0.5, (11, 21), False), (2.0, (11, 12), False), (8.0, (11, 21), False)],
}
RABI = (0.3, 1.0, 3.0)
DETECTORS = {"forward": (0, 0, 1), "side": (0, 1, 0)}
RATE_TOL, G2_TOL = 0.05, 0.10


def clusters(grid: str):
    for density, seeds, close in GRIDS[grid]:
        radius = (6 / (4 / 3 * np.pi * density)) ** (1 / 3)
        for seed in seeds:
            for with_pair in (False, True) if close else (False,):
                pos = bm.geometry.ellipsoid_cloud(6, radius, seed=seed, min_distance=0.08)
                if with_pair:
                    pos[1] = pos[0] + np.array([0.06, 0.05, 0.0])
                yield density, seed, with_pair, pos


def errors(ds, ex) -> dict[str, float]:
    out = {k: float(ds[k].values) / float(ex[k].values) - 1 for k in ("emission_rate", "g2_total")}
    for d in DETECTORS:
        out[f"intensity {d}"] = float(ds.intensity.sel(detector=d)) / float(ex.intensity.sel(detector=d)) - 1
    out["g2 forward"] = float(ds.g2.sel(detector="forward")) / float(ex.g2.sel(detector="forward")) - 1
    return out


def wrong(err: dict[str, float]) -> bool:
    return any(abs(v) > (G2_TOL if k.startswith("g2") else RATE_TOL) for k, v in err.items())


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("grid", choices=sorted(GRIDS))
    p.add_argument("--levels", nargs="+", default=["meanfield", "cumulant2", "twa", "qsd_product"])
    a = p.parse_args()
    rows = {lv: [] for lv in a.levels}
    counts = {lv: {} for lv in a.levels}
    for density, seed, pair, pos in clusters(a.grid):
        for rabi in RABI:
            model = bm.Model(pos, dipole=(1, 0, 0), rabi=rabi, detuning=0.0, laser=(0, 0, 1))
            ex = bm.steady(model, "exact", detectors=DETECTORS)
            for lv in a.levels:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    ds = bm.steady(model, lv, detectors=DETECTORS, seed=5)
                err = errors(ds, ex)
                verdict = "wrong" if wrong(err) else "right"
                said = "warned" if ds.attrs["warnings"] else "silent"
                counts[lv][(said, verdict)] = counts[lv].get((said, verdict), 0) + 1
                cells = " | ".join(f"{100 * v:+.1f}".replace("-", "−") for v in err.values())
                rows[lv].append(f"| {density:g} | {seed} | {'yes' if pair else 'no'} | "
                                f"{model.coupling_norm():.2f} | {rabi:g} | {cells} | {verdict} | {said} |")
    head = ("| n·λ0³ | seed | close pair | ‖iJ + ½Γ‖ (Γ0) | Ω | " + " | ".join(f"{k} %" for k in err)
            + " | verdict | warnings |")
    for lv in a.levels:
        print(f"\n### {lv} ({a.grid})\n\n{head}\n|{' --- |' * (head.count('|') - 1)}")
        print("\n".join(rows[lv]))
        c = counts[lv]
        print(f"\nsilent and wrong {c.get(('silent', 'wrong'), 0)}, warned and wrong "
              f"{c.get(('warned', 'wrong'), 0)}, warned and right {c.get(('warned', 'right'), 0)}, "
              f"silent and right {c.get(('silent', 'right'), 0)}")


if __name__ == "__main__":
    main()
