"""Where a level's warnings land: at the user's line, recorded in the result, and above a progress bar.

Common practice (Python's `warnings` module documentation): a library warning should point at the caller's
code, not at the library's internals, so that the user sees which of their lines caused it.
"""

from __future__ import annotations

import functools
import subprocess
import sys
import warnings

import numpy as np

import beyondmf as bm
from beyondmf.sweep import compare_levels

# two emitters 0.01 λ0 apart: coupling rates of ~10⁵ Γ0, far above the stiffness an explicit solver is
# warned about
CLOSE_PAIR = np.array([[0.0, 0.0, 0.0], [0.0, 0.0, 0.01]])
STIFF = "stiff equations"


def _caught(fn):
    with warnings.catch_warnings(record=True) as got:
        warnings.simplefilter("always")
        result = fn()
    return result, [w for w in got if STIFF in str(w.message)]


def test_a_warning_from_evolve_points_at_the_callers_line_and_is_recorded():
    model = bm.Model(CLOSE_PAIR, rabi=0.1)
    ds, got = _caught(lambda: bm.evolve(model, "meanfield", np.linspace(0, 0.01, 3), solver="Tsit5"))
    assert got, "the explicit solver on a stiff pair should warn"
    assert {w.filename for w in got} == {__file__}
    assert any(STIFF in text for text in ds.attrs["warnings"])


def test_a_warning_under_compare_levels_points_at_the_callers_line():
    def run():
        return compare_levels(CLOSE_PAIR, {"mf": {"level": "meanfield", "solver": "Tsit5"}}, baseline="mf",
                              model={"rabi": 0.1}, times=np.linspace(0, 0.01, 3))

    _, got = _caught(run)
    assert got
    assert {w.filename for w in got} == {__file__}


def test_warnings_print_above_the_progress_bar_not_inside_its_line():
    # in a fresh interpreter: pytest records warnings itself, so they would never reach stderr here
    script = (
        "import numpy as np\n"
        "from beyondmf.sweep import compare_levels\n"
        f"compare_levels(np.array({CLOSE_PAIR.tolist()}),\n"
        "               {'mf': {'level': 'meanfield', 'solver': 'Tsit5'}}, baseline='mf',\n"
        "               model={'rabi': 0.1}, times=np.linspace(0, 0.01, 3), progress=True)\n"
    )
    err = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, check=True,
                         timeout=300).stderr
    lines = [line.split("\r")[-1] for line in err.split("\n") if STIFF in line]
    assert lines, err
    # the bar redraws itself with carriage returns; a warning written into it would follow "tasks: …|"
    # on the same line. Written through tqdm, it is a line of its own that starts with the location.
    assert all(line.startswith("<string>:") for line in lines), err
    assert "tasks" in err  # the bar was shown


def test_progress_bars_put_stderr_back_whatever_order_they_close_in():
    # two bars in two threads may close in either order; an exception inside a bar must not leave
    # sys.stderr wrapped (the first implementation restored what each bar had seen when it opened)
    import contextlib

    from beyondmf.executors import _progress_bar

    original = sys.stderr
    first, second = _progress_bar(1, 0, True), _progress_bar(1, 0, True)
    first.__enter__()
    second.__enter__()
    assert sys.stderr is not original
    first.__exit__(None, None, None)  # the first to open closes first
    assert sys.stderr is not original  # the second bar is still shown
    second.__exit__(None, None, None)
    assert sys.stderr is original
    with contextlib.suppress(RuntimeError), _progress_bar(1, 0, True):
        raise RuntimeError
    assert sys.stderr is original
    with _progress_bar(1, 0, False):  # a hidden bar leaves stderr alone
        assert sys.stderr is original


def test_on_a_dask_worker_the_warnings_are_recorded_in_the_result_but_not_printed():
    """A worker's printed warnings cut into the waiting command's progress bar (workflow review); the
    command reports the recorded ones itself, so the worker only records them."""
    from beyondmf.executors import _on_worker

    model = bm.Model(CLOSE_PAIR, rabi=0.1)
    times = np.linspace(0, 0.01, 3)
    explicit = functools.partial(bm.evolve, solver="Tsit5")
    ds, printed = _caught(lambda: _on_worker(explicit, model, "meanfield", times))
    assert not printed
    assert any(STIFF in said for said in ds.attrs["warnings"])
    ds, printed = _caught(lambda: bm.evolve(model, "meanfield", times, solver="Tsit5"))  # elsewhere: printed
    assert printed and any(STIFF in said for said in ds.attrs["warnings"])


def test_memory_sizes_are_given_in_a_readable_unit():
    from beyondmf.memory import size_text

    assert size_text(512) == "512 bytes"
    assert size_text(1023) == "0.999 KiB"
    assert size_text(17.6e6) == "16.8 MiB"
    assert size_text(1000 * 2**20) == "0.977 GiB"
    assert size_text(3.2 * 2**30) == "3.2 GiB"
    # exact at N = 30 used to say "3298534883328.0 GiB"
    assert size_text(3298534883328 * 2**30) == "3,072 EiB"
