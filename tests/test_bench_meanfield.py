"""The mean-field benchmark suite: its plain NumPy + SciPy reference, and the `beyondmf bench` output."""

from __future__ import annotations

import json

import numpy as np
import pytest

import beyondmf
from beyondmf import bench, cli
from beyondmf.bench import Machine, Row
from beyondmf.bench.meanfield import cloud_model, reference_meanfield


def test_scipy_reference_and_beyondmf_give_the_same_emission_rate():
    """Independent reference: the same equations in NumPy, integrated by scipy's RK45 (solve_ivp)."""
    model = cloud_model(40, width=0.6, min_distance=0.1)
    times = np.linspace(0.0, 6.0, 31)
    ref = reference_meanfield(model, times, rtol=1e-9, atol=1e-11)
    ds = beyondmf.evolve(model, "meanfield", times, rtol=1e-9, atol=1e-11)
    p = ds["emission_rate"].values
    assert np.max(np.abs(p - ref)) / np.max(ref) < 1e-6
    assert np.max(ref) > 5.0  # a driven, collectively coupled cloud: the comparison is not trivial


def test_benchmark_cloud_is_refused_before_allocating_when_memory_is_short(monkeypatch):
    monkeypatch.setattr(beyondmf.memory, "available_bytes", lambda: 2**30)
    with pytest.raises(MemoryError,
                       match="mean-field benchmark with 20000 emitters: about [0-9.]+ GiB needed"):
        cloud_model(20_000)


def test_bench_writes_a_table_and_json_rows(tmp_path, capsys, monkeypatch):
    machine = Machine(matmul_flops=1e10, read_bandwidth=2e10, triad_bandwidth=1e10, backend="cpu")
    monkeypatch.setattr(bench, "measure", lambda: machine)  # the real probe streams 512 MiB: not needed here

    @bench.suite("tiny-test-suite")
    def _tiny(full, m):
        return [Row("tiny-test-suite", "case", "ratio", 0.5 if full else 0.25, "1", "note")]

    out = tmp_path / "rows.json"
    assert cli.main(["bench", "--suite", "tiny-test-suite", "--full", "--out", str(out)]) == 0
    table = capsys.readouterr().out
    assert "tiny-test-suite" in table and "read bandwidth" in table
    rows = json.loads(out.read_text())
    assert {r["suite"] for r in rows} == {"machine", "tiny-test-suite"}
    assert rows[-1] == {"suite": "tiny-test-suite", "case": "case", "metric": "ratio", "value": 0.5,
                        "unit": "1", "note": "note"}
