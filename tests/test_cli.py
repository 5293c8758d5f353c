"""The `beyondmf` command: running study files, their errors, help, and the bench arguments.

Most cases call `beyondmf.cli.main` in-process (no second JAX start-up); one runs `python -m beyondmf`
as a user would, to check the module entry point and the exit status seen by a shell.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import beyondmf
from beyondmf import cli
from beyondmf.study import StudyError, detector_direction, parse_study, read_study

ROOT = Path(__file__).resolve().parents[1]
QUICKSTART = ROOT / "studies" / "quickstart.toml"
FIGURES = ("emission.png", "intensity.png", "g2.png", "geometry.png")

SMALL = """
title = "small disc"
[geometry]
kind = "gaussian"
n = 12
widths = [1.0, 1.0, 0.2]
seed = 3
min_distance = 0.1
[drive]
rabi = 1.0
[detectors]
forward = [0, 0, 1]
sixty = { angle = 60, azimuth = 90 }
[run]
t_end = 4.0
points = 21
[levels.meanfield]
rtol = 1e-7
"""


def _run(args, capsys):
    code = cli.main([str(a) for a in args])
    return code, capsys.readouterr().err


def _replace(text: str, old: str, new: str) -> str:
    assert old in text, old
    return text.replace(old, new)


def test_quickstart_study_runs_and_writes_results_and_figures(tmp_path, capsys):
    """The first command a newcomer runs answers the package's question: mean field against cumulant2 on
    the same three draws of one cloud, with a verdict per observable (issue: quickstart with a verdict)."""
    code, err = _run(["run", QUICKSTART, "--out", tmp_path], capsys)
    assert code == 0, err
    assert "verdicts against cumulant2 (tolerance 0.1" in err
    verdict_line = next(line for line in err.splitlines() if line.strip().startswith("meanfield:"))
    assert all(f"{obs} " in verdict_line for obs in ("emission_rate", "intensity", "g2", "g2_total"))
    ds = beyondmf.load(tmp_path / "results.nc")
    assert list(ds["level"].values) == ["cumulant2", "meanfield"]
    assert ds.sizes["realization"] == 3 and ds.sizes["time"] == 201
    assert list(ds["detector"].values) == ["forward", "sixty"]
    assert ds["time"].values[-1] == pytest.approx(20.0)
    assert np.all(np.isfinite(ds["emission_rate"].values[..., 1:]))
    assert ds.attrs["baseline"] == "cumulant2"
    for name in ("values.png", "corrections.png"):
        png = tmp_path / name
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", name


def test_results_match_a_direct_evolve_call(tmp_path, capsys):
    """The command runs exactly the model the study describes: same numbers as the Python API."""
    study_file = tmp_path / "small.toml"
    study_file.write_text(SMALL)
    code, err = _run(["run", study_file, "--out", tmp_path / "out", "--no-plots"], capsys)
    assert code == 0, err
    ds = beyondmf.load(tmp_path / "out" / "results.nc").sel(level="meanfield")
    pos = beyondmf.geometry.gaussian_cloud(12, (1.0, 1.0, 0.2), seed=3, min_distance=0.1)
    model = beyondmf.Model(pos, rabi=1.0)
    sixty = (0.0, np.sin(np.pi / 3), np.cos(np.pi / 3))  # 60° from z, in the y–z plane
    ref = beyondmf.evolve(model, "meanfield", np.linspace(0, 4, 21),
                          detectors={"forward": (0, 0, 1), "sixty": sixty}, rtol=1e-7)
    np.testing.assert_allclose(ds["position"].values, pos)
    np.testing.assert_allclose(ds["emission_rate"].values, ref["emission_rate"].values, rtol=1e-12)
    np.testing.assert_allclose(ds["intensity"].values, ref["intensity"].values, rtol=1e-12)
    assert not (tmp_path / "out" / "emission.png").exists()


def test_steady_study_writes_results_without_time(tmp_path, capsys):
    text = _replace(SMALL, "[run]\nt_end = 4.0\npoints = 21", '[run]\ncalculation = "steady"')
    study_file = tmp_path / "steady.toml"
    study_file.write_text(text)
    code, err = _run(["run", study_file, "--out", tmp_path / "out"], capsys)
    assert code == 0, err
    ds = beyondmf.load(tmp_path / "out" / "results.nc")
    assert "time" not in ds.dims and ds["intensity"].dims == ("level", "detector")
    for name in FIGURES:
        assert (tmp_path / "out" / name).is_file()


def test_missing_variables_of_a_level_are_filled_with_nan():
    """Levels with stderr (sampling) and without (meanfield) concatenate along `level`."""
    import xarray as xr

    from beyondmf.study.single import _fill_missing

    a = xr.Dataset({"x": (("time",), np.ones(3))})
    b = xr.Dataset({"x": (("time",), np.zeros(3)), "x_stderr": (("time",), np.full(3, 0.1))})
    fa, fb = _fill_missing([a, b])
    assert np.all(np.isnan(fa["x_stderr"].values)) and fa["x_stderr"].shape == (3,)
    np.testing.assert_array_equal(fb["x_stderr"].values, 0.1)


def test_detector_angle_is_measured_from_the_laser():
    for laser in [(0, 0, 1), (1, 0, 0), (1, 1, 1)]:
        for angle, az in [(0, 0), (60, 0), (60, 90), (135, 30), (180, 0)]:
            n = detector_direction(laser, angle, az)
            l_hat = np.asarray(laser) / np.linalg.norm(laser)
            assert np.linalg.norm(n) == pytest.approx(1.0)
            assert np.degrees(np.arccos(np.clip(n @ l_hat, -1, 1))) == pytest.approx(angle, abs=1e-6)
    np.testing.assert_allclose(detector_direction((0, 0, 1), 60, 90), [0, np.sin(np.pi / 3), 0.5], atol=1e-12)


# Each bad study: (replace this, by that) in SMALL → the message starts with this key.
BAD = {
    "unknown top-level key": ("[drive]", "colour = 'red'\n[drive]", "colour: unknown key"),
    "unknown key in a section": ("rabi = 1.0", "rabi = 1.0\nphase = 0.3", "drive.phase: unknown key"),
    "wrong type": ("n = 12", 'n = "twelve"', "geometry.n: expected a positive integer, got 'twelve'"),
    "negative width": (
        "widths = [1.0, 1.0, 0.2]", "widths = [1, -2, 3]",
        "geometry.widths: expected 3 positive numbers, got [1, -2, 3]",
    ),
    "impossible time range": ("t_end = 4.0", "t_end = -1.0", "run.t_end: expected a time after t_start"),
    "too few points": ("points = 21", "points = 1", "run.points: expected an integer ≥ 2"),
    "unknown geometry kind": ('kind = "gaussian"', 'kind = "torus"', "geometry.kind: expected one of"),
    "missing required key": ("rabi = 1.0", "detuning = 0.0", "drive.rabi: missing"),
    "missing section": ("[run]\nt_end = 4.0\npoints = 21", "", "run: missing section"),
    "zero laser": ("[drive]", "[drive]\nlaser = [0, 0, 0]", "drive.laser: expected 3 numbers, not all zero"),
    "detector angle out of range": ("angle = 60", "angle = 200", "detectors.sixty.angle: expected an angle"),
    "unknown level": (
        "[levels.meanfield]", "[levels.nosuchlevel]", "levels.nosuchlevel: unknown level; known"
    ),
    "unknown level option": ("rtol = 1e-7", "rtl = 1e-7", "levels.meanfield.rtl: unknown option"),
    "wrong option type": ("rtol = 1e-7", 'rtol = "tight"', "levels.meanfield.rtol: expected a number"),
    "steady with evolve keys": ("[run]", '[run]\ncalculation = "steady"', "run.t_end: not used by"),
    "cloud too dense": ("min_distance = 0.1", "min_distance = 0.9", "geometry.min_distance: 12 emitters"),
    "not TOML": ("[drive]", "[drive", "not valid TOML"),
}


@pytest.mark.parametrize("case", list(BAD))
def test_bad_study_exits_with_one_line_naming_the_key(case, tmp_path, capsys):
    old, new, message = BAD[case]
    study_file = tmp_path / "bad.toml"
    study_file.write_text(_replace(SMALL, old, new))
    code, err = _run(["run", study_file, "--out", tmp_path / "out"], capsys)
    assert code == cli.EXIT_USAGE
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("beyondmf run: error: ")
    assert message in lines[0], lines[0]
    assert not (tmp_path / "out" / "results.nc").exists()


def test_unknown_level_error_lists_the_known_levels():
    with pytest.raises(StudyError) as info:
        parse_study(_replace(SMALL, "[levels.meanfield]", "[levels.nosuchlevel]"))
    for name in beyondmf.available_levels():
        assert name in str(info.value)


def test_missing_study_file(tmp_path, capsys):
    code, err = _run(["run", tmp_path / "nowhere.toml", "--out", tmp_path], capsys)
    assert code == cli.EXIT_USAGE
    assert err.strip() == f"beyondmf run: error: {tmp_path / 'nowhere.toml'}: no such study file"


def test_a_study_path_that_is_a_directory_or_not_text_is_named_as_such(tmp_path, capsys):
    code, err = _run(["run", tmp_path, "--out", tmp_path / "out"], capsys)
    assert code == cli.EXIT_USAGE and f"{tmp_path} is a directory; give the path of a study file" in err
    binary = tmp_path / "bin.toml"
    binary.write_bytes(b"\xff\xfe[drive]\n")
    code, err = _run(["run", binary, "--out", tmp_path / "out"], capsys)
    assert code == cli.EXIT_USAGE and f"{binary}: not a text file in UTF-8 (byte 0)" in err
    assert not (tmp_path / "out").exists()


def test_an_empty_out_is_refused_not_taken_as_the_current_directory(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    study_file = tmp_path / "s.toml"
    study_file.write_text(SMALL)
    code, err = _run(["run", study_file, "--out", ""], capsys)
    assert code == cli.EXIT_USAGE and "--out: give a directory" in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.toml"]


def test_levels_may_be_a_list_of_names():
    # a top-level key must come before the first [table] header in TOML
    study = parse_study('levels = ["meanfield"]\n' + _replace(SMALL, "[levels.meanfield]\nrtol = 1e-7", ""))
    assert study.levels == {"meanfield": {}}


def test_quickstart_file_parses():
    study = read_study(QUICKSTART)
    assert study.geometry.kind == "gaussian" and study.geometry.params["n"] == 200
    assert study.run.t_end == 20.0 and list(study.levels) == ["cumulant2", "meanfield"]


@pytest.mark.parametrize("command", [[], ["run"], ["levels"], ["bench"]])
def test_help_for_every_command(command, capsys):
    with pytest.raises(SystemExit) as info:
        cli.main([*command, "--help"])
    assert info.value.code == 0
    out = capsys.readouterr().out
    assert out.startswith("usage: beyondmf")


def test_levels_command_lists_registered_levels_and_options(capsys):
    assert cli.main(["levels"]) == 0
    out = capsys.readouterr().out
    for name in beyondmf.available_levels():
        assert out.count(f"{name}: ") == 1
    assert "rtol = 1e-06" in out


def test_levels_command_describes_every_option_in_a_line(capsys):
    """`beyondmf levels` gives each option of each level a one-line description (issue: the command line
    describes every option); the JSON form carries the same text."""
    assert cli.main(["levels", "--json"]) == 0
    levels = json.loads(capsys.readouterr().out)
    for name, info in levels.items():
        assert set(info["help"]) == set(info["options"]), name
        for opt, text in info["help"].items():
            assert text and "\n" not in text, (name, opt)


def test_dry_run_lists_tasks_memory_and_a_probed_time_and_writes_nothing(tmp_path, capsys):
    study = tmp_path / "small.toml"
    study.write_text(SMALL + "[levels.cumulant2]\n")
    before = sorted(tmp_path.iterdir())
    code = cli.main(["run", str(study), "--dry-run"])
    out = capsys.readouterr().out
    assert code == 0
    assert sorted(tmp_path.iterdir()) == before  # nothing written, no --out needed
    assert "2 distinct task(s) of evolve" in out
    rows = {line.split()[0]: line for line in out.splitlines()[2:4]}
    assert set(rows) == {"meanfield", "cumulant2"}
    for line in rows.values():
        assert re.search(r"\d+(\.\d+)? (KiB|MiB|bytes)", line) and "s a task" in line and "in all" in line


def test_run_without_out_or_dry_run_is_a_usage_error(capsys):
    with pytest.raises(SystemExit) as info:
        cli.main(["run", str(QUICKSTART)])
    assert info.value.code == cli.EXIT_USAGE
    assert "--out (or give --dry-run)" in capsys.readouterr().err


def test_bench_refuses_an_unknown_suite_before_measuring(capsys):
    code, err = _run(["bench", "--suite", "nosuchsuite"], capsys)
    assert code == cli.EXIT_USAGE
    assert "--suite: unknown benchmark suite(s) nosuchsuite; known:" in err
    assert len(err.strip().splitlines()) == 1


def test_bad_arguments_are_one_line_errors(capsys):
    with pytest.raises(SystemExit) as info:
        cli.main(["run", "study.toml"])  # no --out
    assert info.value.code == cli.EXIT_USAGE
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "--out" in err


def test_python_dash_m_entry_point_exit_status(tmp_path):
    """As a shell sees it: `python -m beyondmf` with a bad study exits 2 with one line, no traceback."""
    study_file = tmp_path / "bad.toml"
    study_file.write_text(_replace(SMALL, "n = 12", "n = -3"))
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.run(
        [sys.executable, "-m", "beyondmf", "run", str(study_file), "--out", str(tmp_path / "o")],
        capture_output=True, text=True, env=env, timeout=120,
    )
    assert proc.returncode == 2
    assert proc.stderr.strip() == "beyondmf run: error: geometry.n: expected a positive integer, got -3"
    assert "Traceback" not in proc.stderr


def _started_python_m(args, **kw):
    """``python -m beyondmf ARGS`` with SIGINT as at a terminal, even where the test run itself was
    started with SIGINT ignored (a background job of a shell): an ignored SIGINT is inherited, and
    Python then keeps ignoring it. (Set around the start, not in a preexec_fn: forking a threaded
    process to run Python code can deadlock.)"""
    import signal

    env = dict(os.environ, PYTHONPATH=str(ROOT))
    ours = signal.signal(signal.SIGINT, signal.SIG_DFL) if signal.getsignal(signal.SIGINT) == signal.SIG_IGN \
        else None
    try:
        return subprocess.Popen([sys.executable, "-m", "beyondmf", *map(str, args)], env=env, text=True, **kw)
    finally:
        if ours is not None:
            signal.signal(signal.SIGINT, ours)


def test_a_level_that_fails_costs_the_others_nothing(tmp_path, capsys):
    """One model, two levels, the second refuses the cloud (dicke needs all-to-all couplings): the first
    level's results are written, the refusal is printed and recorded, and the exit status says so."""
    from beyondmf.results import load

    study_file = tmp_path / "two.toml"
    study_file.write_text(SMALL + "[levels.dicke]\n")
    code, err = _run(["run", study_file, "--out", tmp_path / "out", "--no-plots"], capsys)
    assert code == cli.EXIT_FAILED
    assert "level meanfield: finished" in err and "level dicke: failed after" in err
    ds = load(tmp_path / "out" / "results.nc")
    assert list(ds["level"].values) == ["meanfield"]
    assert len(ds.attrs["failures"]) == 1 and ds.attrs["failures"][0].startswith("dicke: ")
    assert f"level {ds.attrs['failures'][0].replace(': ', ': failed: ', 1)}" in err
    direct = beyondmf.evolve(read_study(study_file).build_model(), "meanfield",
                             read_study(study_file).run.times(), rtol=1e-7)
    np.testing.assert_allclose(ds["emission_rate"].sel(level="meanfield"), direct["emission_rate"],
                               rtol=1e-12)

    # with only the failing level nothing is written and the message is the command's last line
    study_file.write_text(_replace(SMALL, "[levels.meanfield]\nrtol = 1e-7\n", "[levels.dicke]\n"))
    code, err = _run(["run", study_file, "--out", tmp_path / "none"], capsys)
    assert code == cli.EXIT_FAILED
    assert err.strip().splitlines()[-1].startswith("beyondmf run: failed: ")
    assert not (tmp_path / "none").exists()


def test_ctrl_c_ends_a_single_model_run_with_status_130_and_says_what_was_kept(tmp_path):
    """As a shell sees it: SIGINT mid-solve gives status 130 (not a crash at shutdown, 139), one line
    saying nothing was kept and how to start again, and no directory left behind."""
    import signal
    import time

    out = tmp_path / "new" / "out"
    study_file = tmp_path / "disc.toml"  # one model, one level: a run of several seconds, not as tasks
    study_file.write_text(_replace(_replace(_replace(SMALL, "n = 12", "n = 200"), "widths = [1.0, 1.0, 0.2]",
                                            "widths = [2.0, 2.0, 0.3]"), "t_end = 4.0\npoints = 21",
                                   "t_end = 20.0\npoints = 201"))
    proc = _started_python_m(["run", study_file, "--out", out], stderr=subprocess.PIPE)
    try:
        lines = []
        for line in proc.stderr:
            lines.append(line)
            if "level meanfield: started" in line:
                break
        time.sleep(1.0)  # inside the solve (it takes several seconds)
        proc.send_signal(signal.SIGINT)
        _, rest = proc.communicate(timeout=60)
    finally:
        proc.kill()
    err = "".join(lines) + rest
    assert proc.returncode == cli.EXIT_INTERRUPTED, err
    assert "beyondmf run: interrupted; nothing was written" in err
    assert "run the same command again to start over" in err
    assert "Traceback" not in err and "Exception ignored" not in err
    assert not (tmp_path / "new").exists()  # made by the run, empty, removed again


def test_ctrl_c_on_a_local_cluster_stops_quietly_and_keeps_the_finished_tasks(tmp_path):
    """Ctrl-C at a terminal reaches the whole process group, workers included: status 130, the line
    with the kept count, and none of the workers' reports of the cancelled tasks (they printed a
    CancelledError warning per task in flight before)."""
    import signal
    import time

    study_file = tmp_path / "sweep.toml"
    study_file.write_text(_replace(SMALL, "seed = 3\n", "") + "[sweep]\nrealizations = 12\n")
    out = tmp_path / "out"
    proc = _started_python_m(["run", study_file, "--out", out, "--workers", "2", "--no-plots"],
                             stderr=subprocess.PIPE, start_new_session=True)
    try:
        deadline = time.monotonic() + 120
        while not list((out / "tasks").glob("*.nc")) and time.monotonic() < deadline:
            time.sleep(0.1)
        assert proc.poll() is None, "the sweep ended before it could be interrupted"
        os.killpg(proc.pid, signal.SIGINT)
        _, err = proc.communicate(timeout=60)
    finally:
        proc.kill()
    assert proc.returncode == cli.EXIT_INTERRUPTED, err
    last = err.replace("\r", "\n").strip().splitlines()[-1]
    assert last.startswith("beyondmf run: interrupted; ") and "of 12 tasks finished and are kept" in last
    for noise in ("CancelledError", "Traceback", "WARNING", "Exception ignored"):
        assert noise not in err, err


def test_an_interrupt_swallowed_by_a_garbage_collector_callback_is_raised_again():
    """SIGINT landing in a gc callback (JAX has one) is only printed by Python; the command's hook gives
    it back to the main thread, so Ctrl-C is never lost."""
    import gc
    import sys as _sys
    import time

    seen = []
    once = []

    def callback(phase, info):
        if not once:
            once.append(1)
            raise KeyboardInterrupt

    import signal

    previous = _sys.unraisablehook
    _sys.unraisablehook = cli._redeliver_interrupt(lambda u: seen.append(u.exc_type))
    # Python's own SIGINT handler, even where the test run was started with SIGINT ignored (then
    # `_thread.interrupt_main` does nothing)
    handler = signal.signal(signal.SIGINT, signal.default_int_handler)
    gc.callbacks.append(callback)
    try:
        with pytest.raises(KeyboardInterrupt):
            gc.collect()
            for _ in range(100):
                time.sleep(0.01)
    finally:
        gc.callbacks.remove(callback)
        _sys.unraisablehook = previous
        signal.signal(signal.SIGINT, handler)
    assert once and seen == []  # re-raised, not passed on to be printed


@pytest.fixture
def not_a_scheduler():
    """Two local TCP services that are not dask schedulers: one never answers, one answers HTTP."""
    import socket
    import threading

    servers, conns = [], []

    def serve(sock, reply):
        while True:
            try:
                conn, _ = sock.accept()
            except OSError:
                return
            conns.append(conn)
            if reply:
                conn.sendall(b"HTTP/1.0 400 Bad request\r\nContent-Type: text/html\r\n\r\n<p>bad</p>\r\n")

    ports = {}
    for name, reply in (("silent", False), ("http", True)):
        sock = socket.socket()
        sock.bind(("127.0.0.1", 0))
        sock.listen(8)
        servers.append(sock)
        threading.Thread(target=serve, args=(sock, reply), daemon=True).start()
        ports[name] = sock.getsockname()[1]
    yield ports
    for s in servers + conns:
        s.close()


@pytest.mark.parametrize("service", ["silent", "http"])
def test_scheduler_address_of_something_else_fails_in_bounded_time(service, not_a_scheduler, tmp_path,
                                                                    capsys, monkeypatch):
    import time

    import beyondmf.executors as ex

    monkeypatch.setattr(ex, "CONNECT_TIMEOUT_S", 3.0)
    study_file = tmp_path / "small.toml"
    study_file.write_text(SMALL)
    address = f"tcp://127.0.0.1:{not_a_scheduler[service]}"
    start = time.monotonic()
    code, err = _run(["run", study_file, "--out", tmp_path / "out", "--scheduler", address], capsys)
    assert time.monotonic() - start < 3.0 + 10
    assert code == cli.EXIT_FAILED
    last = err.strip().splitlines()[-1]
    assert last.startswith("beyondmf run: failed: ") and f"'{address}'" in last
    assert "check that" in last and "running dask scheduler" in last
    assert not (tmp_path / "out").exists()  # neither DIR nor DIR/tasks before a scheduler answered


def test_scheduler_address_where_nothing_listens_fails_at_once(tmp_path, capsys):
    """A refused connection or an unknown host is known at once; dask's own connect would retry it for
    the whole timeout (25 s here before)."""
    import socket
    import time

    with socket.socket() as probe:  # a port that was free a moment ago: nothing listens there now
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    study_file = tmp_path / "small.toml"
    study_file.write_text(SMALL)
    for address, says in ((f"tcp://127.0.0.1:{port}", "nothing listens at"),
                          ("tcp://no-such-host.invalid:8786", "is not known"),
                          ("tcp://127.0.0.1", "missing port number")):
        start = time.monotonic()
        code, err = _run(["run", study_file, "--out", tmp_path / "out", "--scheduler", address], capsys)
        assert time.monotonic() - start < 5.0, address
        assert code == cli.EXIT_FAILED
        last = err.strip().splitlines()[-1]
        assert last.startswith("beyondmf run: failed: ") and says in last and "running dask scheduler" in last
        assert not (tmp_path / "out").exists()


def test_out_that_cannot_be_written_is_refused_before_computing(tmp_path, capsys, monkeypatch):
    import beyondmf.study

    def no_computing(*a, **k):
        raise AssertionError("computed before checking --out")

    monkeypatch.setattr(beyondmf.study, "run_study", no_computing)
    study_file = tmp_path / "small.toml"
    study_file.write_text(SMALL)
    (tmp_path / "file.nc").write_text("a file")
    code, err = _run(["run", study_file, "--out", tmp_path / "file.nc" / "sub"], capsys)
    assert code == cli.EXIT_USAGE
    assert err.strip() == (f"beyondmf run: error: --out: cannot create and write files in "
                           f"{tmp_path / 'file.nc' / 'sub'}: Not a directory (a part of that path is a "
                           "file); give a directory you can write to")

    def read_only(*a, **k):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(cli.tempfile, "NamedTemporaryFile", read_only)  # as on a read-only mount
    code, err = _run(["run", study_file, "--out", tmp_path / "ro" / "out"], capsys)
    assert code == cli.EXIT_USAGE and len(err.strip().splitlines()) == 1
    assert "cannot create and write files in" in err and "Permission denied" in err
    assert not (tmp_path / "ro").exists()  # the directories it made for nothing are gone


def test_run_help_names_the_files_that_are_written(capsys):
    with pytest.raises(SystemExit):
        cli.main(["run", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    for name in (*FIGURES, "results.nc", "DIR/tasks/", "values.png", "corrections.png",
                 "correction_map.png", "convergence.nc", "convergence_<observable>.png"):
        assert name in text, name
    # and those are the names the plotting code uses
    import inspect

    from beyondmf.figures import runs as plotting
    from beyondmf.figures import sweeps as correction_plots

    for module, names in ((plotting, FIGURES), (correction_plots, ("values.png", "corrections.png",
                                                                    "correction_map.png"))):
        for name in names:
            assert f'"{name}"' in inspect.getsource(module), name
    assert 'f"convergence_{obs}.png"' in inspect.getsource(cli)


def test_an_unknown_option_is_reported_against_its_command(capsys):
    with pytest.raises(SystemExit) as info:
        cli.main(["run", "x.toml", "--quik"])
    assert info.value.code == cli.EXIT_USAGE
    err = capsys.readouterr().err
    assert err.strip() == ("beyondmf run: error: unrecognized option --quik (did you mean --quick?) "
                           "(see beyondmf run --help)")
    assert cli.main(["levels", "--js"]) == 0  # abbreviations argparse accepts still work
    assert capsys.readouterr().out.lstrip().startswith("{")


def test_the_run_says_where_its_tasks_run(tmp_path, capsys):
    study_file = tmp_path / "small.toml"
    study_file.write_text(_replace(_replace(SMALL, "n = 12", "n = 3"), "seed = 3\n", "")
                          + "[sweep]\nrealizations = 1\n")
    code, err = _run(["run", study_file, "--out", tmp_path / "out", "--no-plots"], capsys)
    assert code == 0, err
    assert "running 1 task in this process" in err


def test_a_grid_point_that_cannot_be_built_fails_before_the_run_starts(tmp_path, capsys):
    study_file = tmp_path / "grid.toml"
    grid = '[sweep]\nrealizations = 1\n[sweep.grid]\n"geometry.min_distance" = [0.1, 50.0]\n'
    study_file.write_text(_replace(_replace(SMALL, "n = 12", "n = 3"), "seed = 3\n", "") + grid)
    code, err = _run(["run", study_file, "--out", tmp_path / "out", "--no-plots"], capsys)
    assert code == cli.EXIT_USAGE, err
    assert "running" not in err and "min_distance" in err, err
    assert not (tmp_path / "out").exists()


def test_a_closed_output_pipe_ends_quietly(tmp_path):
    """`beyondmf levels --json | head -1`: the reader leaves early; no message, status 141 (SIGPIPE)."""
    proc = _started_python_m(["levels", "--json"], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    proc.stdout.close()  # before the command has written anything (it is still starting up)
    err = proc.stderr.read()
    proc.wait(timeout=120)
    assert proc.returncode == cli.EXIT_PIPE
    assert err == ""


def test_warnings_are_printed_as_one_line_for_the_user(tmp_path, capsys):
    """A level's warning (here: an explicit solver on the stiff equations of two emitters 0.02 λ0 apart)
    reads as a line of the command, without the Python source location it was raised at."""
    path = tmp_path / "s.toml"
    path.write_text('title = "two very close emitters"\n[geometry]\nkind = "line"\nn = 2\nspacing = 0.02\n'
                    '[drive]\nrabi = 1.0\n[run]\nt_end = 1.0\npoints = 3\n[levels.meanfield]\n'
                    'solver = "Tsit5"\n')
    assert cli.main(["run", str(path), "--out", str(tmp_path / "o"), "--no-plots"]) == 0
    err = capsys.readouterr().err
    assert "beyondmf run: warning: stiff equations: coupling rates up to" in err
    assert "UserWarning" not in err and ".py:" not in err


def _read_only(monkeypatch, directory: Path) -> None:
    """Files cannot be created in ``directory`` (as on a read-only mount); elsewhere they can."""
    real = cli.tempfile.NamedTemporaryFile

    def probe(*a, dir=None, **k):
        if Path(dir) == directory:
            raise PermissionError(13, "Permission denied")
        return real(*a, dir=dir, **k)

    monkeypatch.setattr(cli.tempfile, "NamedTemporaryFile", probe)


def test_an_unwritable_tasks_directory_of_a_resumed_run_is_refused_before_computing(tmp_path, capsys,
                                                                                   monkeypatch):
    """DIR/tasks of an earlier run that can no longer be written (common practice: a read-only mount)."""
    import beyondmf.sweep

    def no_computing(*a, **k):
        raise AssertionError("computed before checking DIR/tasks")

    monkeypatch.setattr(beyondmf.sweep, "run_sweep", no_computing)
    study_file = tmp_path / "small.toml"
    study_file.write_text(_replace(SMALL, "seed = 3\n", "") + "[sweep]\nrealizations = 1\n")
    tasks = tmp_path / "out" / "tasks"
    tasks.mkdir(parents=True)
    _read_only(monkeypatch, tasks)
    code, err = _run(["run", study_file, "--out", tmp_path / "out"], capsys)
    assert code == cli.EXIT_USAGE and len(err.strip().splitlines()) == 1, err
    assert f"cannot create and write files in {tasks}: Permission denied" in err


def test_a_quick_run_says_so_in_its_file_and_removes_figures_it_did_not_make(tmp_path, capsys):
    study_file = tmp_path / "small.toml"
    study_file.write_text(_replace(SMALL, "n = 12", "n = 4") + "[quick]\nrun = { points = 11 }\n")
    from beyondmf import outdir

    out = tmp_path / "out"
    out.mkdir()
    (out / "notes.png").write_bytes(b"the user's own file")
    code, err = _run(["run", study_file, "--out", out, "--quick"], capsys)
    assert code == 0, err
    ds = beyondmf.load(out / "results.nc")
    assert ds.attrs["quick"] == 1 and ds.sizes["time"] == 11
    assert (out / "notes.png").exists()  # not one of our figure names: left alone
    assert all((out / name).exists() for name in FIGURES)
    # a figure of ours that this kind of run does not draw (an earlier sweep's), recorded as beyondmf's
    (out / "corrections.png").write_bytes(b"an earlier run's figure")
    outdir.record(out / "corrections.png")
    code, err = _run(["run", study_file, "--out", out, "--no-plots"], capsys)
    assert code == 0, err
    assert beyondmf.load(out / "results.nc").attrs["quick"] == 0
    assert not any((out / name).exists() for name in FIGURES)  # they showed the --quick numbers
    assert not (out / "corrections.png").exists() and f"removed {out / 'corrections.png'}" in err
    assert (out / "notes.png").read_bytes() == b"the user's own file"


def test_a_refusal_of_the_model_names_the_study_key_it_is_about(tmp_path, capsys):
    study_file = tmp_path / "s.toml"
    windows = _replace(SMALL, "rabi = 1.0", "rabi = 1.0\nwindows = [[0, 5], [3, 8]]")
    study_file.write_text(windows)
    code, err = _run(["run", study_file, "--out", tmp_path / "a"], capsys)
    assert code == cli.EXIT_USAGE and "drive.windows: envelope windows (0, 5) and (3, 8) overlap" in err
    cloud = 'kind = "gaussian"\nn = 12\nwidths = [1.0, 1.0, 0.2]\nseed = 3\nmin_distance = 0.1'
    points = _replace(SMALL, cloud, 'kind = "points"\npositions = [[0, 0, 0], [0, 0, 0.0001]]')
    study_file.write_text(points)
    code, err = _run(["run", study_file, "--out", tmp_path / "b"], capsys)
    assert code == cli.EXIT_USAGE and "geometry.positions: emitters 0 and 1 are 0.0001 λ0 apart" in err


def test_a_comparison_of_g2_alone_reports_its_verdicts_and_draws_its_figures(tmp_path, capsys):
    """A [compare] whose observables leave out the emission rate: the verdict line and the figures read
    the compared observables (both read emission_rate and failed after results.nc was written)."""
    study_file = tmp_path / "g2.toml"
    text = _replace(_replace(SMALL, "n = 12", "n = 3"), "seed = 3\n", "")
    study_file.write_text(text + '[levels.cumulant2]\n[sweep]\nrealizations = 2\n'
                          '[compare]\nbaseline = "meanfield"\nobservables = ["g2_total"]\n')
    code, err = _run(["run", study_file, "--out", tmp_path / "out"], capsys)
    assert code == 0, err
    assert "least favourable over times and detectors" in err and "cumulant2: g2_total" in err
    assert (tmp_path / "out" / "values.png").exists() and (tmp_path / "out" / "corrections.png").exists()


def test_a_single_model_run_does_not_need_an_old_tasks_directory_to_be_writable(tmp_path, capsys,
                                                                                monkeypatch):
    study_file = tmp_path / "small.toml"
    study_file.write_text(_replace(SMALL, "n = 12", "n = 3"))
    tasks = tmp_path / "out" / "tasks"
    tasks.mkdir(parents=True)
    _read_only(monkeypatch, tasks)
    code, err = _run(["run", study_file, "--out", tmp_path / "out", "--no-plots"], capsys)
    assert code == 0, err  # in process: tasks/ is not written, so not checked


def test_quiet_run_prints_no_status_lines_and_version_names_the_package(tmp_path, capsys):
    """--quiet keeps errors, failures, warnings and verdicts but drops status lines (common practice of
    command-line tools); --version prints the installed version and exits 0."""
    code, err = _run(["run", QUICKSTART, "--out", tmp_path, "--quiet", "--no-plots"], capsys)
    assert code == 0, err
    assert "started" not in err and "finished" not in err and "wrote" not in err, err
    assert "verdicts against cumulant2" in err and "running" not in err, err
    assert (tmp_path / "results.nc").is_file()
    with pytest.raises(SystemExit) as stop:
        cli.main(["--version"])
    assert stop.value.code == 0
    assert capsys.readouterr().out.strip() == f"beyondmf {beyondmf.__version__}"
