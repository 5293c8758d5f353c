"""Size and memory checks: overflow-safe at any N, the usual MemoryError, recorded per task in a sweep;
guards on report times, grid sizes and task counts before anything is allocated or planned."""

from __future__ import annotations

import textwrap

import numpy as np
import pytest

import beyondmf as bm
from beyondmf.memory import require, size_text


def test_size_text_handles_integers_beyond_the_range_of_a_float():
    # 2^1100 bytes: float(2**1100) overflows (IEEE 754 double max ≈ 1.8·10^308, common practice)
    assert size_text(2**1100) == "10^331 bytes"  # log10(2^1100) = 331.1
    assert size_text(float("inf")) == "more than 10^308 bytes"
    assert size_text(3072 * 2**60) == "3,072 EiB" and size_text(512) == "512 bytes"
    with pytest.raises(MemoryError, match=r"about 10\^1206 bytes needed"):  # log10(192) + 2000 log10(4)
        require(16 * 4**2000 * 12, "a test of 2000 emitters")


@pytest.mark.parametrize("level, n", [("exact", 512), ("exact", 600), ("jumps", 1100)])
def test_every_level_refuses_a_model_too_large_with_a_memory_error_not_an_overflow(level, n):
    """exact at N ≥ 512 computed 4.0**N (OverflowError); jumps at N = 1100 overflowed in its message."""
    model = bm.Model(bm.geometry.line_array(n, 0.3), rabi=1.0)
    with pytest.raises(MemoryError, match=rf"of {n} emitters: about 10\^\d+ bytes needed"):
        bm.steady(model, level)


def test_a_sweep_records_a_memory_refusal_for_its_task_instead_of_aborting(tmp_path):
    from beyondmf.sweep import run_sweep, study_from_table

    study = study_from_table({
        "geometry": {"kind": "line", "n": 2, "spacing": 0.3},
        "drive": {"rabi": 1.0}, "run": {"t_end": 0.1, "points": 2}, "levels": ["exact"],
        "sweep": {"grid": {"geometry.n": [2, 512]}},
    })
    ds = run_sweep(study, tmp_path / "out", progress=False)
    rate = ds["emission_rate"].sel(level="exact").isel(realization=0, time=-1)
    assert np.isfinite(rate.sel(n=2)) and np.isnan(rate.sel(n=512))
    (failure,) = ds.attrs["failures"]
    assert "n=512" in failure and "MemoryError" in failure and "10^" in failure, failure
    print(failure)
