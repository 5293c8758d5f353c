"""Size and memory checks: overflow-safe at any N, the usual MemoryError, recorded per task in a sweep;
guards on report times, grid sizes and task counts before anything is allocated or planned."""

from __future__ import annotations

import sys
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
    """The refusal of exact at N = 512 is the failed task's result (the other tasks of a sweep go on, as
    for any failed task: tests/test_task_failures.py), not an exception that ends the run."""
    from beyondmf.executors import execute
    from beyondmf.sweep import build_task
    from beyondmf.tasks import MACHINE

    task = build_task(bm.geometry.line_array(512, 0.3), {"rabi": 1.0}, {"calculation": "steady"}, None,
                      {"level": "exact", "options": {}}, seed=0, realization=0)
    (ds,) = execute([task], tmp_path, progress=False).values()
    assert ds.attrs["task_status"] == "failed" and ds.attrs["task_failure"] == MACHINE
    assert ds.attrs["error"].startswith("MemoryError: the exact density matrix of 512 emitters: about "
                                        "10^312 bytes needed")  # log10(16 · 4^512 · 3084) = 312.9


ONE_MODEL = """
[geometry]
kind = "line"
n = 12
spacing = 0.3
[drive]
rabi = 1.0
[run]
t_end = 10.0
points = 201
[levels.meanfield]
"""


def _study_file(tmp_path, text):
    path = tmp_path / "s.toml"
    path.write_text(textwrap.dedent(text))
    return path


def test_a_billion_report_times_are_refused_with_the_estimate_before_anything_is_allocated(tmp_path, capsys):
    """[run] points = 10⁹ grew to 17 GB before it was killed."""
    from beyondmf.cli import EXIT_FAILED, main
    from beyondmf.study import read_study, run_study

    path = _study_file(tmp_path, ONE_MODEL.replace("points = 201", "points = 1_000_000_000"))
    out = tmp_path / "out"
    assert main(["run", str(path), "--out", str(out)]) == EXIT_FAILED
    err = capsys.readouterr().err
    assert "the results of 1 level(s) for 12 emitters at 1,000,000,000 report times: about" in err
    assert " TiB needed, but this machine has" in err and "fewer report times ([run] points)" in err
    assert not out.exists()  # refused before the output directory was made
    with pytest.raises(MemoryError, match="1,000,000,000 report times"):
        run_study(read_study(path))


def test_a_grid_of_a_million_tasks_is_refused_at_once_and_with_large_by_its_memory(tmp_path, capsys):
    """A grid of 10⁶ tasks printed nothing for five minutes: refused when read, with the task count
    (an upper bound: grid points × levels × realizations); --large confirms the count, and then the
    estimate of the merged results' memory refuses it on this machine."""
    import time

    from beyondmf.cli import EXIT_FAILED, EXIT_USAGE, main
    from beyondmf.sweep import MAX_TASKS

    rabi = ", ".join(str(1 + k / 1000) for k in range(1000))
    detuning = ", ".join(str(k / 1000) for k in range(1000))
    path = _study_file(tmp_path, ONE_MODEL + f'[sweep]\n[sweep.grid]\n"drive.rabi" = [{rabi}]\n'
                                             f'"drive.detuning" = [{detuning}]\n')
    start = time.perf_counter()
    assert main(["run", str(path), "--out", str(tmp_path / "out")]) == EXIT_USAGE
    err = capsys.readouterr().err
    assert (f"sweep.grid: 1,000,000 grid points × 1 levels × 1 realizations = up to 1,000,000 tasks, beyond "
            f"the planning limit of {MAX_TASKS:,}") in err and "--large" in err
    assert main(["run", str(path), "--out", str(tmp_path / "out"), "--large"]) == EXIT_FAILED
    err = capsys.readouterr().err
    assert "failed: the results of 1,000,000 tasks (12 emitters, 201 report times): about" in err
    assert time.perf_counter() - start < 30  # both before the grid points are checked one by one
    assert not (tmp_path / "out").exists()


def test_a_large_grid_says_what_it_is_doing_while_it_plans(tmp_path, capsys, monkeypatch):
    """Checking and building a grid's tasks shows a progress bar once it has taken a while (here at once)."""
    import beyondmf.study.sections as sections
    import beyondmf.sweep as sweep

    monkeypatch.setattr(sections, "PLANNING_BAR_DELAY_S", 0.0)
    path = _study_file(tmp_path, ONE_MODEL + '[sweep]\n[sweep.grid]\n"drive.rabi" = [1.0, 2.0, 3.0]\n')
    sweep.study_tasks(sweep.read_study(path))
    err = capsys.readouterr().err
    assert "checking grid points" in err and "building tasks" in err


def test_evolve_refuses_report_times_beyond_free_memory_before_the_level_allocates(monkeypatch):
    """Without the check, 10⁷ report times of 2000 emitters reached JAX, which failed allocating 320 GB."""
    model = bm.Model(bm.geometry.line_array(2, 0.3), rabi=1.0)
    monkeypatch.setattr(bm.memory, "available_bytes", lambda: 2**20)  # pretend 1 MiB is free
    with pytest.raises(MemoryError, match=r"the results of 2 emitters at 100,000 report times: about .* "
                                          r"needed, but this machine has 1 MiB free"):
        bm.evolve(model, "meanfield", np.linspace(0, 1, 10**5))


def test_an_allocation_that_xla_could_not_make_is_a_memory_failure_of_the_machine():
    from beyondmf.memory import as_memory_error
    from beyondmf.tasks import MACHINE, failure_kind

    class JaxRuntimeError(RuntimeError):  # the name jax gives it (jax.errors.JaxRuntimeError)
        pass

    err = JaxRuntimeError("RESOURCE_EXHAUSTED: Out of memory allocating 320000000000 bytes.")
    assert isinstance(as_memory_error(err), MemoryError) and failure_kind(err) == MACHINE
    assert "RESOURCE_EXHAUSTED: Out of memory allocating 320000000000 bytes." in str(as_memory_error(err))
    assert as_memory_error(JaxRuntimeError("INVALID_ARGUMENT")) is None
    assert failure_kind(TypeError("a bug")) is None  # propagates: not a failure of the task


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="memory mappings are read from /proc")
def test_compiled_code_is_dropped_before_the_kernels_mapping_limit_is_reached():
    """Measured here (no published source): each function XLA compiles for the CPU keeps memory mappings
    of its machine code; past vm.max_map_count the process dies of a segmentation fault (a CI run did).
    The guard frees them when asked, and leaves them alone below its threshold."""
    import jax
    import jax.numpy as jnp

    from beyondmf.memory import _mapping_counts, release_compiled_code

    release_compiled_code(0.0)
    before = _mapping_counts()[0]
    for n in range(1, 60):
        jax.jit(lambda x, n=n: jnp.sin(x) * n)(jnp.ones(n)).block_until_ready()
    grown = _mapping_counts()[0]
    assert grown > before + 60  # a few mappings per compiled function
    assert release_compiled_code(1.0) is False  # far below the kernel's limit: nothing dropped
    assert release_compiled_code(0.0) is True
    assert _mapping_counts()[0] < grown - 60
