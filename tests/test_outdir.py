"""Output directories: beyondmf replaces or removes only files it wrote itself; one run per directory."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap

import pytest

from beyondmf import outdir
from beyondmf.cli import EXIT_FAILED, EXIT_USAGE, main

# a study of one model that refuses nothing; the tests below stop before computing anything
STUDY = """
[geometry]
kind = "line"
n = 2
spacing = 0.3
[drive]
rabi = 1.0
[run]
t_end = 1.0
points = 3
[levels.meanfield]
"""


def _gone_pid() -> int:
    """The process id of a process that has already ended."""
    done = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True,
                          text=True, check=True)
    return int(done.stdout)


def test_only_recorded_unchanged_files_are_ours_and_only_those_are_removed(tmp_path):
    ours, theirs = tmp_path / "values.png", tmp_path / "geometry.png"
    ours.write_bytes(b"a figure beyondmf drew")
    outdir.record(ours)
    theirs.write_bytes(b"the user's own figure")
    assert outdir.is_ours(tmp_path, "values.png") and not outdir.is_ours(tmp_path, "geometry.png")
    with pytest.raises(outdir.NotOurFiles, match=r"holds geometry\.png, which this run would replace"):
        outdir.claim(tmp_path, ["values.png", "geometry.png", "results.nc"])
    assert not outdir.remove_ours(tmp_path, "geometry.png") and theirs.exists()
    assert outdir.remove_ours(tmp_path, "values.png") and not ours.exists()
    # a file of ours that someone changed since (same name, other contents) is no longer ours
    ours.write_bytes(b"a figure beyondmf drew")
    outdir.record(ours)
    ours.write_bytes(b"edited by hand, same length!!")
    assert not outdir.is_ours(tmp_path, "values.png")
    # a copy of the directory (other inode and times, same contents) keeps its files ours
    copy = tmp_path / "copy"
    copy.mkdir()
    (tmp_path / "results.nc").write_bytes(b"x" * 1000)
    outdir.record(tmp_path / "results.nc")
    (copy / "results.nc").write_bytes(b"x" * 1000)
    (copy / outdir.MANIFEST).write_bytes((tmp_path / outdir.MANIFEST).read_bytes())
    assert outdir.is_ours(copy, "results.nc")
    (copy / outdir.MANIFEST).write_text("{edited")  # an unreadable record: nothing there is ours
    assert not outdir.is_ours(copy, "results.nc")


@pytest.mark.parametrize("names", [["results.nc"], ["convergence.nc", "geometry.png"],
                                   ["convergence_g2.png"]])
def test_the_command_refuses_a_directory_holding_the_users_files_of_our_names(tmp_path, capsys, names):
    """Data loss reported: --out pointing at a directory with the user's own results.nc, convergence.nc
    or geometry.png overwrote or deleted them ("an earlier run's"). Refused before anything is computed,
    naming the files and what to do; the files are untouched."""
    study = tmp_path / "s.toml"
    study.write_text(STUDY)
    out = tmp_path / "mine"
    out.mkdir()
    for name in names:
        (out / name).write_bytes(f"the user's own {name}".encode())
    assert main(["run", str(study), "--out", str(out)]) == EXIT_USAGE
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1, err
    assert f"--out: {out} holds {', '.join(sorted(names))}" in err and "move" in err and "another" in err
    for name in names:
        assert (out / name).read_bytes() == f"the user's own {name}".encode()
    assert sorted(p.name for p in out.iterdir()) == sorted(names)  # no lock, no record, no tasks left


def test_run_sweep_refuses_a_results_file_it_did_not_write(tmp_path):
    from beyondmf.sweep import run_sweep, study_from_table

    study = study_from_table({"geometry": {"kind": "line", "n": 2, "spacing": 0.3}, "drive": {"rabi": 1.0},
                              "run": {"calculation": "steady"}, "levels": ["meanfield"], "sweep": {}})
    (tmp_path / "results.nc").write_bytes(b"the user's own results")
    with pytest.raises(outdir.NotOurFiles, match="results.nc"):
        run_sweep(study, tmp_path, progress=False)
    assert (tmp_path / "results.nc").read_bytes() == b"the user's own results"
    assert not (tmp_path / "tasks").exists() and not (tmp_path / outdir.LOCK).exists()


def test_a_second_run_on_a_directory_in_use_is_refused_naming_the_holder(tmp_path, capsys):
    """Two runs on one --out both computed every task, unannounced."""
    from beyondmf.results import _writer_id

    holder = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        lock = {"pid": holder.pid, "host": "here", "writer": _writer_id(), "start_ticks": None,
                "started": 0}
        (tmp_path / outdir.LOCK).write_text(json.dumps(lock))
        with pytest.raises(outdir.DirectoryInUse, match=rf"in use by another beyondmf run \(process "
                                                        rf"{holder.pid} on here"):
            with outdir.lock(tmp_path):
                pass
        study = tmp_path / "s.toml"
        study.write_text(STUDY)
        assert main(["run", str(study), "--out", str(tmp_path)]) == EXIT_FAILED
        assert f"in use by another beyondmf run (process {holder.pid}" in capsys.readouterr().err
        assert json.loads((tmp_path / outdir.LOCK).read_text())["pid"] == holder.pid  # left as it was
    finally:
        holder.kill()
        holder.wait()


def test_a_stale_lock_of_a_process_that_is_gone_is_taken_over_and_released(tmp_path):
    from beyondmf.results import _writer_id

    (tmp_path / outdir.LOCK).write_text(json.dumps({"pid": _gone_pid(), "host": "here",
                                                   "writer": _writer_id(), "started": 0}))
    with outdir.lock(tmp_path):
        held = json.loads((tmp_path / outdir.LOCK).read_text())
        assert held["pid"] == os.getpid()
        with outdir.lock(tmp_path):  # re-entrant: a command that runs a sweep takes it twice
            pass
        assert (tmp_path / outdir.LOCK).exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == []  # released, nothing left beside


def test_a_lock_of_another_host_is_not_judged_stale(tmp_path):
    (tmp_path / outdir.LOCK).write_text(json.dumps({"pid": _gone_pid(), "host": "elsewhere",
                                                   "writer": "0badf00d", "started": 0}))
    with pytest.raises(outdir.DirectoryInUse, match=r"on elsewhere.*remove .*\.beyondmf-lock"):
        with outdir.lock(tmp_path):
            pass


def test_a_lock_taken_by_a_process_killed_with_sigkill_does_not_block_the_next_run(tmp_path):
    code = textwrap.dedent(f"""
        import os, signal
        from beyondmf import outdir
        with outdir.lock({str(tmp_path)!r}):
            os.kill(os.getpid(), signal.SIGKILL)
    """)
    done = subprocess.run([sys.executable, "-c", code], capture_output=True)
    assert done.returncode == -9 and (tmp_path / outdir.LOCK).exists()
    with outdir.lock(tmp_path):
        pass
    assert not (tmp_path / outdir.LOCK).exists()


def test_every_figure_the_command_draws_is_a_name_it_claims_and_removes():
    """A new figure name must be claimed (a user's file of that name refused) and removed when stale."""
    import inspect
    import re

    from beyondmf import cli
    from beyondmf.figures import runs as plotting
    from beyondmf.figures import sweeps as correction_plots

    source = inspect.getsource(plotting) + inspect.getsource(correction_plots)
    drawn = set(re.findall(r'"([a-z0-9_]+\.png)"', source))
    assert drawn and drawn <= set(cli._OUR_FIGURES), drawn - set(cli._OUR_FIGURES)
    assert {"results.nc", "convergence.nc", *cli._OUR_FIGURES} <= set(cli._OUR_FILES)


def test_a_run_stopped_while_it_replaces_a_file_of_ours_leaves_it_ours(tmp_path, monkeypatch):
    """results.nc is recorded before it is renamed into place: stopped before the rename (the old file
    stays) or after it (the new one is there), the next run still knows the file as its own."""
    dest = tmp_path / "results.nc"
    dest.write_bytes(b"the first run's results")
    outdir.record(dest)

    def stop(*args):
        raise KeyboardInterrupt

    new = tmp_path / "new.part"
    new.write_bytes(b"the second run's results, longer")
    monkeypatch.setattr(outdir.os, "replace", stop)  # stopped between recording and renaming
    with pytest.raises(KeyboardInterrupt):
        outdir.place(new, dest)
    monkeypatch.undo()
    assert dest.read_bytes() == b"the first run's results" and outdir.is_ours(tmp_path, "results.nc")
    writes = []
    real = outdir._write

    def stop_at_the_second(directory, files):
        writes.append(1)
        if len(writes) == 2:
            raise KeyboardInterrupt  # stopped after the rename, before the old entry was dropped
        real(directory, files)

    monkeypatch.setattr(outdir, "_write", stop_at_the_second)
    with pytest.raises(KeyboardInterrupt):
        outdir.place(new, dest)
    monkeypatch.undo()
    assert dest.read_bytes() == b"the second run's results, longer" and outdir.is_ours(tmp_path, "results.nc")
    outdir.claim(tmp_path, ["results.nc"])  # no refusal
