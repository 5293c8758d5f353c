"""The `beyondmf` command: run a study file, list the levels, run the benchmarks.

    beyondmf run STUDY.toml --out DIR [--quick] [--large] [--workers N | --scheduler ADDRESS]
                                          results.nc and PNG figures in DIR (tasks/ for a sweep)
    beyondmf run STUDY.toml --dry-run     its tasks, each level's memory and a time from a short probe
    beyondmf levels                       the registered levels and their options, one line each
    beyondmf bench [--full] [--suite NAME ...] [--out FILE]

Errors a user can fix (a bad study file, an unknown suite, a model a level refuses, too little memory)
end the command with a one-line message and a non-zero exit status, never a traceback. Ctrl-C ends it
with status 130 and a line saying what was kept; a closed output pipe (`beyondmf levels | head`) ends
it quietly.
"""

from __future__ import annotations

import argparse
import difflib
import json
import os
import shutil
import sys
import tempfile
import time
import warnings
from collections.abc import Sequence
from pathlib import Path

__all__ = ["main", "build_parser"]

EXIT_USAGE = 2  # bad input: study file, arguments
EXIT_FAILED = 1  # the calculation itself failed (solver, memory)
EXIT_INTERRUPTED = 130  # Ctrl-C (128 + SIGINT), as shells report it
EXIT_PIPE = 141  # the reader of our output went away (128 + SIGPIPE), as `yes | head` reports it


class _Parser(argparse.ArgumentParser):
    """argparse, but errors are one line (no usage block) so they read like our other errors."""

    def error(self, message: str):
        self.exit(EXIT_USAGE, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


class _SubParser(_Parser):
    """A command's parser: it reports options it does not know itself, against its own name, first.

    argparse otherwise hands them back to the top-level parser, whose error names `beyondmf` and points
    at `beyondmf --help` (which does not list the command's options), and only after complaining about
    a missing required argument. A close known option is suggested (``--quik``: did you mean --quick?).
    """

    def parse_known_args(self, args=None, namespace=None):
        args = list(sys.argv[1:] if args is None else args)
        known = [o for o in self._option_string_actions if o.startswith("--")]
        unknown = []
        for arg in args:
            if arg == "--":
                break  # the rest is positional
            name = arg.split("=", 1)[0]
            # argparse also accepts a unique abbreviation (--qui for --quick)
            if name.startswith("--") and not any(o.startswith(name) for o in known):
                unknown.append(name)
        if unknown:
            named = []
            for name in unknown:
                close = difflib.get_close_matches(name, known, n=1, cutoff=0.75)
                named.append(f"{name} (did you mean {close[0]}?)" if close else name)
            self.error(f"unrecognized option{'s' if len(named) > 1 else ''} {', '.join(named)}")
        namespace, extras = super().parse_known_args(args, namespace)
        if extras:
            self.error(f"unrecognized arguments: {' '.join(extras)}")
        return namespace, extras


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(
        prog="beyondmf",
        description="Light emitted by dense, laser-driven clouds of two-level emitters, at successive levels "
        "of correlation. Units: lengths in λ0, rates in Γ0, times in 1/Γ0.",
    )
    from ._version import __version__

    p.add_argument("--version", action="version", version=f"beyondmf {__version__}")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND", parser_class=_SubParser)

    r = sub.add_parser(
        "run",
        help="run a study file at the levels it lists",
        description="Run a study file (docs/study-files.md) and write into DIR. A study of one model runs "
        "at each level it lists and writes DIR/results.nc (NetCDF, one 'level' dimension; read with "
        "beyondmf.load) and the figures emission.png, intensity.png, g2.png and geometry.png. A study with "
        "[sweep] or [compare], or any study run with --workers or --scheduler, runs as tasks: each "
        "finished task is kept in DIR/tasks/ (running the same command again resumes), then it writes "
        "the merged DIR/results.nc and the figures values.png and, with several levels, corrections.png "
        "(correction_map.png for a 2-D grid); with [convergence] also DIR/convergence.nc and "
        "convergence_<observable>.png. Ctrl-C stops with exit status 130.",
    )
    r.add_argument("study", metavar="STUDY.toml", help="the study file")
    r.add_argument("--out", metavar="DIR",
                   help="directory for results.nc and the figures (a DIR holding files of those names that "
                   "beyondmf did not write, or used by another run, is refused); required unless --dry-run")
    r.add_argument("--dry-run", action="store_true",
                   help="list the tasks, the memory each level needs and a time estimated from a short probe "
                   "of each level on this machine, then stop (nothing is written)")
    r.add_argument("--no-plots", action="store_true",
                   help="write no figures (only results.nc, and tasks/ and convergence.nc where they apply)")
    r.add_argument("--quick", action="store_true",
                   help="apply the study's [quick] overrides (a CI-sized run)")
    r.add_argument("-q", "--quiet", action="store_true",
                   help="no progress bars and no status lines (errors, failures, warnings and verdicts still "
                   "print)")
    r.add_argument("--large", action="store_true",
                   help="run a study beyond the planning limit of 100,000 tasks (the memory check still "
                   "applies)")
    ex = r.add_mutually_exclusive_group()
    ex.add_argument("--workers", type=int, metavar="N",
                    help="run the tasks on a local dask cluster of N worker processes (loopback only)")
    ex.add_argument("--scheduler", metavar="ADDRESS",
                    help="run the tasks on the dask scheduler at ADDRESS, e.g. tcp://10.0.0.5:8786")

    p.run_parser = r  # for the one requirement argparse cannot state: --out unless --dry-run
    lv = sub.add_parser(
        "levels",
        help="list the registered levels and their options",
        description="List the levels of description this installation has, with their options and defaults "
        "(the keys a study file may set under [levels.NAME]).",
    )
    lv.add_argument("--json", action="store_true", help="print as JSON")

    b = sub.add_parser(
        "bench",
        help="run the benchmarks",
        description="Measure this machine's streaming bandwidth and matrix-product peak, then run benchmark "
        "suites and print a table of the figures (ratios are to the machine measured in the same run).",
    )
    b.add_argument("--full", action="store_true", help="include the large cases (minutes; much memory)")
    b.add_argument("--suite", action="append", metavar="NAME",
                   help="run only this suite (repeatable); default all")
    b.add_argument("--out", metavar="FILE", help="also write the rows as JSON to FILE")
    return p


def _say(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


def _status(msg: str) -> None:
    """A line about what the command is doing (not an error, failure, warning or verdict); --quiet: none."""
    from . import _config

    if not _config.QUIET:
        _say(msg)


class _Stopped(KeyboardInterrupt):
    """Ctrl-C, with a note of what the interrupted command had kept on disk."""

    def __init__(self, note: str) -> None:
        super().__init__(note)
        self.note = note


_FIGURES_TMP = ".figures-"


def _prepare_out(out: Path, tasks: bool) -> list[Path]:
    """Make sure ``out`` is a directory we can write into, before any computing; return the directories
    this made (so that a run that ends with nothing written can remove them again).

    Writes and removes a probe file: only that shows that files can really be created there (a
    read-only mount, /proc, a full quota...).
    """
    from .outdir import LOCK, MANIFEST
    from .results import STALE_AFTER_S, remove_stale_parts

    if out.exists() and not out.is_dir():
        raise _UsageError(f"--out: {out} exists and is not a directory; give a directory (it is created "
                          "if missing)")
    created = [d for d in [out, *out.parents] if not d.exists()][::-1]
    resumed = out / "tasks"  # a resumed task run writes there: checked too, before any computing
    for where in (out, resumed) if tasks and resumed.exists() else (out,):
        try:
            where.mkdir(parents=True, exist_ok=True)
            with tempfile.NamedTemporaryFile(dir=where, prefix=".beyondmf-write-test-") as probe:
                probe.write(b"beyondmf can write here\n")
                probe.flush()
        except OSError as err:
            _remove_empty(created)
            why = err.strerror or type(err).__name__
            if isinstance(err, NotADirectoryError | FileExistsError):
                why += " (a part of that path is a file)"
            raise _UsageError(f"--out: cannot create and write files in {where}: {why}; give a directory you "
                              "can write to") from None
    # temporaries of a killed run (of our files only: DIR may hold other files)
    for name in ("results.nc", "convergence.nc", MANIFEST, LOCK):
        remove_stale_parts(out, name)
    now = time.time()
    for old in out.glob(_FIGURES_TMP + "*"):  # figure temporaries of a killed run
        try:
            if old.is_dir() and now - old.stat().st_mtime > STALE_AFTER_S:
                shutil.rmtree(old, ignore_errors=True)
        except OSError:
            pass
    return created


def _remove_empty(dirs: list[Path]) -> None:
    """Remove those of ``dirs`` (made by this command) that are still empty, innermost first."""
    for d in reversed(dirs):
        try:
            d.rmdir()
        except FileNotFoundError:
            continue  # never made (tasks/ before the scheduler answered)
        except OSError:
            return  # not empty: something was written


def _write_figures(make, out: Path) -> list[Path]:
    """Call ``make(directory)`` (it writes figures there and returns their paths) on a temporary directory
    inside ``out``, then move each figure into ``out``: a figure appears whole or not at all, even if the
    command is stopped while drawing it."""
    from .outdir import NotOurFiles, is_ours, place

    tmp = Path(tempfile.mkdtemp(prefix=_FIGURES_TMP, dir=out))
    try:
        written = []
        for path in make(tmp):
            dest = out / Path(path).name
            if os.path.lexists(dest) and not is_ours(out, dest.name):  # made by someone during the run
                raise NotOurFiles(out, [dest.name])
            place(path, dest)  # recorded as ours, then renamed into place
            written.append(dest)
            _status(f"wrote {dest}")
        return written
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


# The figures `beyondmf run` writes into DIR (convergence_<observable>.png by pattern).
_OUR_FIGURES = ("emission.png", "intensity.png", "g2.png", "geometry.png", "values.png", "corrections.png",
                "correction_map.png", "correlations.png", "correlations_g2.png", "correlations_spectrum.png")
_OUR_FILES = ("results.nc", "convergence.nc", *_OUR_FIGURES)
_OUR_PATTERNS = ("convergence_*.png",)


def _remove_earlier_outputs(out: Path, convergence: bool) -> None:
    """Once this run's results.nc is written, remove what an earlier run left beside it: the figures (this
    run draws its own next; drawn from other numbers, they must not stand beside the new file even if
    drawing fails) and, for a study without [convergence], convergence.nc. Only files that beyondmf wrote
    there itself (`beyondmf.outdir`; the run refused others of these names before it started)."""
    from .outdir import remove_ours

    stale = [*_OUR_FIGURES, *(p.name for p in out.glob("convergence_*.png"))]
    if not convergence:
        stale.append("convergence.nc")
    for name in sorted(stale):
        try:
            if remove_ours(out, name):
                _status(f"removed {out / name} (an earlier run's; results.nc is new)")
        except OSError:
            continue


def _cmd_run(args) -> int:
    from .outdir import claim, lock
    from .study import check_plan, check_run_size, is_sweep, read_study

    if args.workers is not None and args.workers < 1:
        raise _UsageError(f"--workers: expected a positive number of workers, got {args.workers}")
    # Path("") is "."; an empty --out is a slip (an unset variable), not "here"
    if args.out is not None and not args.out.strip():
        raise _UsageError("--out: give a directory for results.nc and the figures, e.g. --out out/study "
                          "(--out . writes into the current directory)")
    study = read_study(args.study, quick=args.quick, large=args.large)
    if args.dry_run:
        return _dry_run(study)
    out = Path(args.out)
    as_tasks = is_sweep(study) or args.workers is not None or args.scheduler is not None
    # memory of the results, before any directory is made (the task count was checked when read)
    if as_tasks:
        check_plan(study, large=True)
    else:
        check_run_size(study)
    created = _prepare_out(out, tasks=as_tasks)
    tasks_existed = (out / "tasks").exists()
    t0 = time.perf_counter()
    try:
        with lock(out):  # one run at a time in DIR
            claim(out, _OUR_FILES, _OUR_PATTERNS)  # files of our names that we did not write: refused
            if as_tasks:
                return _run_tasks(study, out, args, t0)
            return _run_one_model(study, out, args, t0)
    except BaseException:
        # leave no empty directory behind a run that wrote nothing (a scheduler that did not answer...)
        _remove_empty(created if tasks_existed else [*created, out / "tasks"])
        raise


def _dry_run(study) -> int:
    """``run --dry-run``: the plan of the study (`beyondmf.sweep.plan`), printed; nothing written."""
    from .memory import size_text
    from .sweep.plan import plan_study

    _status("dry run: probing each level on its first task (nothing is written)")
    count, plans = plan_study(study)
    print(f"{study.title or 'study'}: {count} distinct task(s) of {study.run.calculation}")
    rows = [("level", "tasks", "N", "memory", "probe (this machine)", "estimate")]
    for p in plans:
        mem = "not estimated" if p.memory is None else size_text(p.memory)
        if p.probe_error:
            probe, est = f"{p.probe}: failed ({p.probe_error})", "-"
        elif p.warm is None:
            probe, est = p.probe or "not probed", "-"
        else:
            probe = f"{p.probe}: {p.cold:.2g} s, again {p.warm:.2g} s"
            est = f"~{p.per_task:.2g} s a task, ~{p.total:.2g} s in all (compile ~{p.compile:.2g} s)"
        rows.append((p.label, str(p.tasks), str(p.emitters), mem, probe, est))
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    for r in rows:
        print("  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)).rstrip())
    print("(estimates scale the probe by time span and samples; adaptive steps make them a guide to the "
          "order of magnitude; each --workers process compiles once)")
    return 0


def _run_one_model(study, out: Path, args, t0: float) -> int:
    """A study of one model, in this process: every level, then results.nc and the figures."""
    from .figures import plot_all
    from .outdir import save_ours
    from .study import run_study

    def on_level(name: str, stage: str, seconds: float | None) -> None:
        if stage == "start":
            _status(f"level {name}: started ({study.run.calculation})")
        elif stage == "done":
            _status(f"level {name}: finished in {seconds:.1f} s")
        else:
            rest = "; the other levels go on" if len(study.levels) > 1 else ""
            _say(f"level {name}: failed after {seconds:.1f} s (why: at the end){rest}")

    try:
        # a level that cannot do this model does not cost the others their results
        ds = run_study(study, on_level=on_level, keep_going=True)
        path = save_ours(ds, out / "results.nc")
    except KeyboardInterrupt:
        raise _Stopped("nothing was written (a study of one model keeps no partial results: results.nc "
                       "is written once every level has finished); run the same command again to start "
                       "over") from None
    failures = ds.attrs["failures"]
    for failure in failures:
        _say(f"level {failure.replace(': ', ': failed: ', 1)}")
    kept = f" (levels {', '.join(map(str, ds['level'].values))}; see above for the failed ones)"
    _status(f"wrote {path}" + (kept if failures else ""))
    _remove_earlier_outputs(out, convergence=False)
    if not args.no_plots:
        try:
            _write_figures(lambda d: plot_all(ds, d), out)
        except KeyboardInterrupt:
            raise _Stopped(f"{path} is complete, the figures are not all written") from None
    if failures:
        n = len(study.levels)
        _say(f"{len(failures)} of {n} level{'s' * (n != 1)} failed (see above; results.nc holds the "
             "others)")
    _status(f"done in {time.perf_counter() - t0:.1f} s")
    return EXIT_FAILED if failures else 0


def _run_tasks(study, out: Path, args, t0: float) -> int:
    """A sweep or comparison study (or any study with --workers/--scheduler): resumable tasks."""
    from .executors import Interrupted, make_executor
    from .sweep import run_sweep

    executor = make_executor(args.workers, args.scheduler)

    def start(to_run: int, total: int) -> None:  # once the finished tasks on disk are known
        done = total - to_run
        tasks = f"task{'s' * (total != 1)}"
        if not to_run:
            _status(f"all {total} {tasks} are done in {out / 'tasks'}; nothing to run")
        elif not done:
            _status(f"running {total} {tasks} {executor.where}")
        else:
            _status(f"running {to_run} of {total} {tasks} {executor.where}, {done} done (kept in "
                 f"{out / 'tasks'})")

    from . import _config

    try:
        ds = run_sweep(study, out, executor=executor, progress=not _config.QUIET, on_start=start)
    except Interrupted as stop:
        if not stop.kept:
            raise _Stopped(f"none of the {stop.total} tasks had finished; run the same command again to "
                           "start") from None
        raise _Stopped(f"{stop.kept} of {stop.total} tasks finished and are kept in "
                       f"{stop.directory / 'tasks'}; run the same command again to resume (finished tasks "
                       "are not recomputed)") from None
    except KeyboardInterrupt:
        raise _Stopped(f"{out / 'results.nc'} was not written, finished tasks are kept in {out / 'tasks'}; "
                       "run the same command again to resume") from None
    try:
        _report_tasks(study, ds, out, args, t0)
    except KeyboardInterrupt:
        raise _Stopped(f"all {ds.attrs['tasks']} tasks and {out / 'results.nc'} are written, the figures and "
                       "reports are not all; running the same command again recomputes no task") from None
    failed = int(ds.attrs.get("tasks_failed", 0))
    if failed:  # one rule for every executor: a failed task is a failed run
        _say(f"{failed} of {ds.attrs['tasks']} tasks failed (NaN in {out / 'results.nc'}; their messages "
             "above and in its attribute 'failures')")
        return EXIT_FAILED
    return 0


def _report_tasks(study, ds, out: Path, args, t0: float) -> None:
    """After a task run: what was written, failures, warnings, figures, convergence, verdicts."""
    from .figures import plot_sweep

    _status(f"wrote {out / 'results.nc'} ({ds.attrs['tasks']} tasks)")
    _remove_earlier_outputs(out, convergence="convergence" in study.extra)
    for failure in ds.attrs.get("failures", []):
        _say(f"task failed: {failure}")
    said = ds.attrs.get("warnings", [])
    if said:
        _say(f"{len(said)} warning(s) from the levels about their own runs (all in results.nc, attribute "
             "'warnings'); the first: " + said[0])
    if not args.no_plots:
        _write_figures(lambda d: plot_sweep(ds, d), out)
    if "convergence" in study.extra:
        _report_convergence(study, ds, out, not args.no_plots)
    if "baseline" in ds.attrs:
        from .compare import verdict_table

        verdict = next(v for name, v in ds.data_vars.items() if name.endswith("_verdict"))
        over = "times, detectors and grid points" if any(
            d not in ("level", "time", "detector") for d in verdict.dims) else "times and detectors"
        _say(f"verdicts against {ds.attrs['baseline']} (tolerance {ds.attrs['tolerance']:g}; per observable "
             f"the least favourable over {over}, in results.nc point by point):")
        warned = ds.get("warned_realizations")
        for level, row in verdict_table(ds).items():
            k = 0 if warned is None else int(warned.sel(level=level).sum())
            note = f"  [{k} of its runs warned about themselves: treat these verdicts with care]" if k else ""
            _say(f"  {level}: " + ", ".join(f"{k} {v}" for k, v in row.items()) + note)
    _status(f"done in {time.perf_counter() - t0:.1f} s")


def _report_convergence(study, ds, out: Path, plots: bool) -> None:
    """Write DIR/convergence.nc (a table per observable) and its figures; say whether each converged."""
    import xarray as xr

    from .convergence import figure
    from .outdir import save_ours
    from .study import check_convergence

    tables = check_convergence(study, ds)
    merged = xr.Dataset({f"{obs}_{var}": t[var] for obs, t in tables.items() for var in t.data_vars})
    # the attributes the tables share; each observable's last bound is the last entry of its X_bound
    merged.attrs.update({k: v for k, v in next(iter(tables.values())).attrs.items() if k != "last_bound"})
    merged.attrs["observables"] = list(tables)
    save_ours(merged, out / "convergence.nc")
    _status(f"wrote {out / 'convergence.nc'}")
    for obs, table in tables.items():
        state = "converged" if bool(table["converged"]) else "NOT converged"
        _say(f"convergence of {obs} in {table.attrs['parameter']}: {state} "
             f"(last bound {table.attrs['last_bound']:.3g}, tolerance {table.attrs['tolerance']:g})")
        if plots:
            def draw(d: Path, table=table, obs=obs) -> list[Path]:
                path = d / f"convergence_{obs}.png"
                figure(table, obs).savefig(path, dpi=90)
                return [path]

            _write_figures(draw, out)


def _cmd_levels(args) -> int:
    from . import available_levels, get_level, level_options
    from .levels.base import option_help

    levels = {name: {"summary": summary, "options": level_options(name),
                     "help": {opt: option_help(get_level(name), opt) for opt in level_options(name)}}
              for name, summary in available_levels().items()}
    if args.json:
        print(json.dumps(levels, indent=2, default=str))
        return 0
    for name, info in levels.items():
        print(f"{name}: {info['summary']}")
        width = max((len(f"{o} = {d!r}") for o, d in info["options"].items()), default=0)
        for opt, default in info["options"].items():
            text = info["help"][opt]
            print(f"    {f'{opt} = {default!r}':<{width}}  {text}".rstrip())
    return 0


def _format_table(rows) -> str:
    cols = ["suite", "case", "metric", "value", "unit", "note"]
    cells = [[r.suite, r.case, r.metric, f"{r.value:.4g}", r.unit, r.note] for r in rows]
    widths = [max(len(c), *(len(row[i]) for row in cells)) if cells else len(c) for i, c in enumerate(cols)]
    line = lambda vals: "  ".join(v.ljust(w) for v, w in zip(vals, widths, strict=True)).rstrip()  # noqa: E731
    return "\n".join([line(cols), line(["-" * w for w in widths]), *(line(c) for c in cells)])


def _cmd_bench(args) -> int:
    from .bench import run_suites, suites

    known = suites()
    unknown = [n for n in (args.suite or []) if n not in known]
    if unknown:
        raise _UsageError(
            f"--suite: unknown benchmark suite(s) {', '.join(unknown)}; known: {', '.join(known)}"
        )
    rows = run_suites(args.suite, args.full)
    print(_format_table(rows))
    if args.out:
        out = Path(args.out)
        out.parent.mkdir(parents=True, exist_ok=True)
        from .results import _create_part

        tmp = _create_part(out)  # the temporary name `save` uses, so remove_stale_parts knows it
        try:
            tmp.write_text(json.dumps([r.as_dict() for r in rows], indent=2))
            os.replace(tmp, out)  # whole or not at all
        finally:
            tmp.unlink(missing_ok=True)
        _status(f"wrote {out}")
    return 0


class _UsageError(Exception):
    """A command-line argument that cannot be used."""


_COMMANDS = {"run": _cmd_run, "levels": _cmd_levels, "bench": _cmd_bench}


def _quiet_stdout() -> None:
    """Point stdout at /dev/null, so that the interpreter's last flush to a closed pipe says nothing."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError, AttributeError):  # stdout is not a file (captured, in tests)
        sys.stdout = open(os.devnull, "w")  # noqa: SIM115 - lives until the process ends


def _hard_exit(code: int) -> None:
    """End the process now, without the interpreter's shutdown.

    After Ctrl-C, JAX/XLA threads may still be running, and tearing the interpreter down under them has
    crashed it (a segmentation fault instead of status 130). Nothing is lost by skipping the shutdown:
    every file is written whole or not at all (`results.save` and the task files: temporary file +
    rename, removed on interruption; figures: drawn in a temporary directory, then renamed), the dask
    cluster was closed by its `with` block, and the output streams are flushed here.
    """
    import multiprocessing

    for child in multiprocessing.active_children():  # a worker that outlived its cluster: do not orphan it
        child.terminate()
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):
            pass
    os._exit(code)


def _redeliver_interrupt(previous):
    """An `sys.unraisablehook` that gives a swallowed Ctrl-C back to the main thread.

    Python raises KeyboardInterrupt wherever the main thread is when SIGINT arrives; inside a garbage
    collector callback (JAX registers one) or a ``__del__`` the exception cannot propagate and is only
    printed, and the run would go on as if Ctrl-C had not been pressed. Raise it again in the main thread
    instead; other unraisable exceptions go to the previous hook.
    """
    import _thread
    import threading

    def hook(unraisable) -> None:
        if issubclass(unraisable.exc_type, KeyboardInterrupt):
            # from another thread, a moment later: raised here, inside the hook, it would be lost again
            again = threading.Timer(0.05, _thread.interrupt_main)
            again.daemon = True
            again.start()
        else:
            previous(unraisable)

    return hook


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the `beyondmf` command; returns the exit status.

    ``argv`` None means the real command line (the `beyondmf` script, ``python -m beyondmf``): then a
    Ctrl-C ends the process at once with status 130 (`_hard_exit`); with ``argv`` given (a caller in
    Python, the tests) it returns 130 instead.
    """
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command == "run" and args.out is None and not args.dry_run:
        parser.run_parser.error("the following arguments are required: --out (or give --dry-run)")
    from . import _config

    quiet_before, _config.QUIET = _config.QUIET, bool(getattr(args, "quiet", False)) or _config.QUIET
    previous_hook = sys.unraisablehook
    sys.unraisablehook = _redeliver_interrupt(previous_hook)
    try:
        with warnings.catch_warnings():
            # a command prints warnings as one line for its user, not as Python source locations
            warnings.showwarning = _show_warning(args.command)
            return _main(args, hard_exit=argv is None)
    finally:
        sys.unraisablehook = previous_hook
        _config.QUIET = quiet_before


def _show_warning(command: str):
    def show(message, category, filename, lineno, file=None, line=None):
        print(f"beyondmf {command}: warning: {' '.join(str(message).split())}", file=file or sys.stderr)

    return show


def _main(args, hard_exit: bool) -> int:
    from .integrate import SolveError
    from .outdir import DirectoryInUse, NotOurFiles
    from .study import StudyError

    try:
        code = _COMMANDS[args.command](args)
        sys.stdout.flush()  # a reader that went away shows up here at the latest, not at shutdown
        return code
    except BrokenPipeError:
        # `beyondmf levels --json | head -1`: the reader has what it wanted; stop quietly, as CLI tools do
        _quiet_stdout()
        return EXIT_PIPE
    except (StudyError, _UsageError) as err:
        _say(f"beyondmf {args.command}: error: {err}")
        return EXIT_USAGE
    except NotOurFiles as err:  # --out: a directory holding other people's files of our names
        _say(f"beyondmf {args.command}: error: --out: {err}")
        return EXIT_USAGE
    except DirectoryInUse as err:  # another run on the same --out
        _say(f"beyondmf {args.command}: failed: {err}")
        return EXIT_FAILED
    except (ValueError, SolveError, MemoryError, ConnectionError) as err:
        # a level refusing the model, a failed solve, a run too big for this machine, no scheduler
        _say(f"beyondmf {args.command}: failed: {' '.join(str(err).split())}")
        return EXIT_FAILED
    except KeyboardInterrupt as err:
        note = f"; {err.note}" if isinstance(err, _Stopped) else ""
        try:
            _say(f"beyondmf {args.command}: interrupted{note}")
        except (OSError, ValueError):
            pass
        if hard_exit:
            _hard_exit(EXIT_INTERRUPTED)
        return EXIT_INTERRUPTED


if __name__ == "__main__":
    sys.exit(main())
