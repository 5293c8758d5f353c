"""The `beyondmf` command: run a study file, list the levels, run the benchmarks.

    beyondmf run STUDY.toml --out DIR [--quick] [--workers N | --scheduler ADDRESS]
                                          results.nc and PNG figures in DIR
    beyondmf levels                       the registered levels and their options
    beyondmf bench [--full] [--suite NAME ...] [--out FILE]

Errors a user can fix (a bad study file, an unknown suite, a model a level refuses, too little memory)
end the command with a one-line message and a non-zero exit status, never a traceback.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from collections.abc import Sequence
from pathlib import Path

__all__ = ["main", "build_parser"]

EXIT_USAGE = 2  # bad input: study file, arguments
EXIT_FAILED = 1  # the calculation itself failed (solver, memory)


class _Parser(argparse.ArgumentParser):
    """argparse, but errors are one line (no usage block) so they read like our other errors."""

    def error(self, message: str):
        self.exit(EXIT_USAGE, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(
        prog="beyondmf",
        description="Light emitted by dense, laser-driven clouds of two-level emitters, at successive levels "
        "of correlation. Units: lengths in λ0, rates in Γ0, times in 1/Γ0.",
    )
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND", parser_class=_Parser)

    r = sub.add_parser(
        "run",
        help="run a study file at the levels it lists",
        description="Run the model of a study file (docs/study-files.md) at each level it lists and write "
        "DIR/results.nc (NetCDF, one 'level' dimension; read with beyondmf.load) and PNG figures: "
        "emission.png, intensity.png, geometry.png.",
    )
    r.add_argument("study", metavar="STUDY.toml", help="the study file")
    r.add_argument("--out", required=True, metavar="DIR", help="directory for results.nc and the figures")
    r.add_argument("--no-plots", action="store_true", help="write results.nc only")
    r.add_argument("--quick", action="store_true",
                   help="apply the study's [quick] overrides (a CI-sized run)")
    ex = r.add_mutually_exclusive_group()
    ex.add_argument("--workers", type=int, metavar="N",
                    help="run the tasks on a local dask cluster of N worker processes (loopback only)")
    ex.add_argument("--scheduler", metavar="ADDRESS",
                    help="run the tasks on the dask scheduler at ADDRESS, e.g. tcp://10.0.0.5:8786")

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


def _cmd_run(args) -> int:
    from .plotting import plot_all
    from .results import save
    from .study import run_study
    from .sweep import is_sweep, read_study

    if args.workers is not None and args.workers < 1:
        raise _UsageError(f"--workers: expected a positive number of workers, got {args.workers}")
    study = read_study(args.study, quick=args.quick)
    out = Path(args.out)
    if out.exists() and not out.is_dir():
        raise _UsageError(f"--out: {out} exists and is not a directory")
    t0 = time.perf_counter()
    if is_sweep(study) or args.workers is not None or args.scheduler is not None:
        return _run_tasks(study, out, args, t0)

    def on_level(name: str, stage: str, seconds: float | None) -> None:
        if stage == "start":
            _say(f"level {name}: started ({study.run.calculation})")
        else:
            _say(f"level {name}: finished in {seconds:.1f} s")

    ds = run_study(study, on_level=on_level)
    path = save(ds, out / "results.nc")
    _say(f"wrote {path}")
    if not args.no_plots:
        for fig in plot_all(ds, out):
            _say(f"wrote {fig}")
    _say(f"done in {time.perf_counter() - t0:.1f} s")
    return 0


def _run_tasks(study, out: Path, args, t0: float) -> int:
    """A sweep or comparison study (or any study with --workers/--scheduler): resumable tasks."""
    from .correction_plots import plot_sweep
    from .executors import make_executor
    from .sweep import run_sweep

    executor = make_executor(args.workers, args.scheduler)
    _say(f"running tasks on {executor.name}; finished tasks in {out / 'tasks'} are reused")
    ds = run_sweep(study, out, executor=executor, progress=True)
    _say(f"wrote {out / 'results.nc'} ({ds.attrs['tasks']} tasks)")
    for failure in ds.attrs.get("failures", []):
        _say(f"task failed: {failure}")
    said = ds.attrs.get("warnings", [])
    if said:
        _say(f"{len(said)} warning(s) from the levels about their own runs (all in results.nc, attribute "
             "'warnings'); the first: " + said[0])
    if not args.no_plots:
        for fig in plot_sweep(ds, out):
            _say(f"wrote {fig}")
    if "convergence" in study.extra:
        _report_convergence(study, ds, out, not args.no_plots)
    if "baseline" in ds.attrs:
        from .compare import verdict_table

        _say(f"verdicts against {ds.attrs['baseline']} (tolerance {ds.attrs['tolerance']:g}):")
        warned = ds.get("warned_realizations")
        for level, row in verdict_table(ds).items():
            k = 0 if warned is None else int(warned.sel(level=level).sum())
            note = f"  [{k} of its runs warned about themselves: treat these verdicts with care]" if k else ""
            _say(f"  {level}: " + ", ".join(f"{k} {v}" for k, v in row.items()) + note)
    _say(f"done in {time.perf_counter() - t0:.1f} s")
    return 0


def _report_convergence(study, ds, out: Path, plots: bool) -> None:
    """Write DIR/convergence.nc (a table per observable) and its figures; say whether each converged."""
    import xarray as xr

    from .convergence import figure
    from .results import save
    from .sweep import check_convergence

    tables = check_convergence(study, ds)
    merged = xr.Dataset({f"{obs}_{var}": t[var] for obs, t in tables.items() for var in t.data_vars})
    merged.attrs.update(next(iter(tables.values())).attrs)
    save(merged, out / "convergence.nc")
    _say(f"wrote {out / 'convergence.nc'}")
    for obs, table in tables.items():
        state = "converged" if bool(table["converged"]) else "NOT converged"
        _say(f"convergence of {obs} in {table.attrs['parameter']}: {state} "
             f"(last bound {table.attrs['last_bound']:.3g}, tolerance {table.attrs['tolerance']:g})")
        if plots:
            path = out / f"convergence_{obs}.png"
            fig = figure(table, obs)
            fig.savefig(path, dpi=90)
            _say(f"wrote {path}")


def _cmd_levels(args) -> int:
    from . import available_levels, level_options

    levels = {name: {"summary": summary, "options": level_options(name)}
              for name, summary in available_levels().items()}
    if args.json:
        print(json.dumps(levels, indent=2, default=str))
        return 0
    for name, info in levels.items():
        print(f"{name}: {info['summary']}")
        for opt, default in info["options"].items():
            print(f"    {opt} = {default!r}")
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
        out.write_text(json.dumps([r.as_dict() for r in rows], indent=2))
        _say(f"wrote {out}")
    return 0


class _UsageError(Exception):
    """A command-line argument that cannot be used."""


_COMMANDS = {"run": _cmd_run, "levels": _cmd_levels, "bench": _cmd_bench}


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the `beyondmf` command; returns the exit status."""
    args = build_parser().parse_args(argv)
    from .integrate import SolveError
    from .study import StudyError

    try:
        return _COMMANDS[args.command](args)
    except (StudyError, _UsageError) as err:
        _say(f"beyondmf {args.command}: error: {err}")
        return EXIT_USAGE
    except (ValueError, SolveError, MemoryError, ConnectionError) as err:
        # a level refusing the model, a failed solve, a run too big for this machine
        _say(f"beyondmf {args.command}: failed: {' '.join(str(err).split())}")
        return EXIT_FAILED
    except KeyboardInterrupt:
        _say(f"beyondmf {args.command}: interrupted")
        return 130


if __name__ == "__main__":
    sys.exit(main())
