"""Where tasks run: in this process (the default) or on a dask.distributed cluster, with resume.

`execute` skips every task whose file is already complete and valid, runs the rest on an executor, and
reads the results back. Workers write their own task files (`beyondmf.tasks.run_task`), so a killed run
loses only the tasks in flight, and the numbers do not depend on which executor ran them.
"""

from __future__ import annotations

import sys
import threading
import time
import warnings
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import xarray as xr

from .outdir import lock
from .results import remove_stale_parts
from .tasks import (
    MACHINE,
    TaskFileError,
    compute_group,
    drive_groups,
    failed_result,
    failure_of,
    read_task,
    run_group,
    task_key,
    task_path,
)

__all__ = ["InProcess", "Dask", "make_executor", "execute", "Interrupted", "CONNECT_TIMEOUT_S"]

# How long `Dask` waits for a scheduler to answer before giving up (seconds). dask's own ``timeout`` does
# not bound everything: a service that accepts the connection but never answers like a scheduler (a web
# server, say) can keep the handshake waiting forever, so the connection runs in a thread with this
# hard deadline.
CONNECT_TIMEOUT_S = 25.0


def _not_a_cancellation(record) -> bool:
    """A logging filter: drop the worker's note that a task it was running was cancelled."""
    return "ended with CancelledError" not in record.getMessage()


def _leave_ctrl_c_to_the_command() -> None:
    """Run on each worker process of a local cluster, which shares the user's terminal.

    Ctrl-C at a terminal reaches the whole process group. The command itself stops the cluster and
    says what was kept; a worker that took the interrupt as well printed its own traceback, so workers
    ignore SIGINT. The tasks in flight are then cancelled, as asked, and the worker's warning about each
    of them is dropped. (A Ctrl-C in the seconds while the workers start can still reach one of them.)
    """
    import logging
    import signal
    import threading

    if threading.current_thread() is threading.main_thread():  # where the worker's event loop runs
        signal.signal(signal.SIGINT, signal.SIG_IGN)
    logger = logging.getLogger("distributed.worker.state_machine")
    if _not_a_cancellation not in logger.filters:
        logger.addFilter(_not_a_cancellation)


def _worker_plugin():
    """A dask worker plugin that runs `_leave_ctrl_c_to_the_command` on every worker as it starts."""
    from distributed.diagnostics.plugin import WorkerPlugin

    class LeaveCtrlCToTheCommand(WorkerPlugin):
        name = "beyondmf-leave-ctrl-c-to-the-command"

        def setup(self, worker) -> None:
            _leave_ctrl_c_to_the_command()

    return LeaveCtrlCToTheCommand()


class Interrupted(KeyboardInterrupt):
    """Ctrl-C during `execute`: how many of the run's tasks have complete files on disk."""

    def __init__(self, kept: int, total: int, directory: Path) -> None:
        super().__init__(f"{kept} of {total} tasks kept")
        self.kept, self.total, self.directory = kept, total, directory


class InProcess:
    """Run tasks one after the other in this process; tasks that differ only in their drive run as one
    batched solve where the level can (`beyondmf.tasks.drive_groups`)."""

    name = "in-process"
    where = "in this process"
    groups_drives = True

    def __enter__(self) -> InProcess:
        return self

    def __exit__(self, *exc) -> None:
        return None

    def map_unordered(self, fn: Callable, items: Iterable, *args) -> Iterator:
        for item in items:
            yield fn(item, *args)


class Dask:
    """Run tasks on dask.distributed: a local loopback cluster of ``workers`` processes, or the scheduler
    at ``scheduler`` (an address such as "tcp://10.0.0.5:8786", e.g. one started by dask-jobqueue).

    Each worker process runs one task at a time (one thread): the levels' JAX code already uses the
    cores it is given, and one task per process keeps memory predictable. Tasks are not batched by drive
    here: the workers' parallelism is the speed-up.
    """

    groups_drives = False

    def __init__(self, workers: int | None = None, scheduler: str | None = None) -> None:
        if (workers is None) == (scheduler is None):
            raise ValueError("give exactly one of workers (a local cluster) or scheduler (an address)")
        if workers is not None and (int(workers) != workers or workers < 1):
            raise ValueError(f"workers must be a positive integer, got {workers!r}")
        self.workers, self.scheduler = workers, scheduler
        if workers is not None:
            n = int(workers)
            self.name = f"dask local cluster ({n} worker{'s' if n != 1 else ''})"
            self.where = f"on a local dask cluster of {n} worker process{'es' if n != 1 else ''}"
        else:
            self.name = f"dask scheduler {scheduler}"
            self.where = f"on the dask scheduler at {scheduler}"
        self._cluster = self._client = None

    def __enter__(self) -> Dask:
        from dask.distributed import Client, LocalCluster

        try:
            if self.workers is not None:
                self._cluster = LocalCluster(
                    n_workers=int(self.workers),
                    threads_per_worker=1,
                    processes=True,
                    host="127.0.0.1",
                    dashboard_address=None,
                )
                self._client = Client(self._cluster)
                self._client.register_plugin(_worker_plugin())  # also on a worker its nanny restarts
            else:
                self._client = _connect(self.scheduler, CONNECT_TIMEOUT_S)
        except BaseException:
            self.__exit__()  # a half-started cluster must not outlive us (e.g. Ctrl-C while starting)
            raise
        return self

    def __exit__(self, *exc) -> None:
        import logging

        client, cluster = self._client, self._cluster
        self._client = self._cluster = None
        log = logging.getLogger("distributed")
        level = log.level
        if exc and isinstance(exc[1], KeyboardInterrupt):
            # Ctrl-C: stopping the workers mid-task is what was asked for; keep the nannies' reports of
            # it ("still alive, killing", CancelledError tracebacks) off the terminal
            log.setLevel(logging.CRITICAL)
        try:
            if client is not None:
                client.close()
        finally:
            try:
                if cluster is not None:
                    cluster.close()
            finally:
                log.setLevel(level)

    def map_unordered(self, fn: Callable, items: Iterable, *args) -> Iterator:
        from dask.distributed import as_completed

        if self._client is None:
            raise RuntimeError("use the Dask executor inside a `with` block")
        futures = {self._client.submit(_on_worker, fn, item, *args, pure=False): item for item in items}
        for fut in as_completed(futures):
            try:
                result = fut.result()
            except Exception as err:
                if not _worker_lost(err):
                    raise
                yield Lost(futures[fut], err)  # the machine's state, not the task's: the next run retries
                continue
            yield result


class Lost:
    """What `Dask.map_unordered` yields for an item whose worker was lost (killed, out of memory, its
    connection gone) more often than the scheduler retries a task."""

    def __init__(self, item, error: BaseException) -> None:
        self.item, self.error = item, error


def _worker_lost(err: BaseException) -> bool:
    """Whether a task's exception says that its worker went away rather than that the task failed."""
    from distributed.comm.core import CommClosedError
    from distributed.scheduler import KilledWorker

    return isinstance(err, KilledWorker | CommClosedError)


def _on_worker(fn: Callable, *args):
    """``fn(*args)`` on a dask worker, the levels' warnings recorded in the results but not printed there
    (the waiting command reports them; `beyondmf._notes.recording_only`)."""
    from ._notes import recording_only

    with recording_only():
        return fn(*args)


async def _identify(address: str, deadline: float, connection_args: dict) -> Any:
    """The reply of whatever listens at ``address`` to dask's "identity" request."""
    from distributed.comm import connect
    from distributed.core import send_recv

    comm = await connect(address, timeout=deadline, **connection_args)
    try:
        return await send_recv(comm, op="identity")
    finally:
        comm.abort()


def _reachable(address: str, deadline: float, hint: str) -> float:
    """Fail at once where nothing can listen at a TCP/TLS ``address``; other schemes pass unchecked.

    dask's `connect` retries a refused connection until its whole timeout has passed; a plain socket
    says "refused" (nobody listens on that port) or "unknown host" immediately. A host that does not
    answer at all costs the deadline, which covers every address the name resolves to. Returns the time
    left of ``deadline``, for the probe that follows.
    """
    import socket

    from distributed.comm.addressing import parse_address, parse_host_port

    end = time.monotonic() + deadline
    try:
        scheme, location = parse_address(address)
        if scheme not in ("tcp", "tls"):
            return deadline
        host, port = parse_host_port(location)
    except ValueError as err:
        raise ConnectionError(f"{address!r} is not a scheduler address ({err}); {hint}") from None
    try:
        candidates = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM)
    except socket.gaierror as err:
        raise ConnectionError(f"the host of {address!r} is not known ({err.strerror}); {hint}") from None
    errors = []
    for family, kind, proto, _, where in candidates:
        left = end - time.monotonic()
        if left <= 0:
            break
        try:
            with socket.socket(family, kind, proto) as sock:
                sock.settimeout(left)
                sock.connect(where)
            return max(end - time.monotonic(), 1.0)
        except ConnectionRefusedError:
            errors.append("connection refused")
        except TimeoutError:
            errors.append(f"no answer within {deadline:g} s")
        except OSError as err:
            errors.append(err.strerror or str(err))
    if errors and all(e == "connection refused" for e in errors):
        raise ConnectionError(f"nothing listens at {address!r} (connection refused); {hint}")
    why = "; ".join(dict.fromkeys(errors)) or f"no answer within {deadline:g} s"
    raise ConnectionError(f"could not reach {address!r} ({why}); {hint}")


def _connect(address: str, deadline: float):
    """A dask `Client` of the scheduler at ``address``, or ConnectionError within about ``deadline`` s.

    First ask whatever listens there who it is, in a helper thread with its own event loop and a hard
    deadline: dask's own timeout does not cover a peer that accepts the connection but never answers
    (an HTTP server), and a peer that answers something else can make dask misread a message length
    and raise anything (a MemoryError asking for exbibytes has been seen). Only a peer that says it is
    a dask scheduler gets a `Client`. Every failure becomes one ConnectionError naming the address.
    """
    import asyncio

    from dask.distributed import Client
    from distributed.security import Security

    hint = (f"check that {address!r} is the address of a running dask scheduler (tcp://HOST:PORT, as "
            "printed by `dask scheduler`; not a worker's or another service's port) and that this machine "
            "can reach it")
    left = _reachable(address, deadline, hint)
    connection_args = Security().get_connection_args("client")
    box: dict[str, Any] = {}

    def attempt() -> None:
        try:
            box["reply"] = asyncio.run(
                asyncio.wait_for(_identify(address, left, connection_args), left))
        except BaseException as err:  # noqa: BLE001 - handed to the waiting thread
            box["error"] = err

    thread = threading.Thread(target=attempt, name="beyondmf-dask-probe", daemon=True)
    thread.start()
    thread.join(left + 5)
    if thread.is_alive() or isinstance(box.get("error"), asyncio.TimeoutError):
        raise ConnectionError(f"no answer from a dask scheduler at {address!r} within {deadline:g} s; {hint}")
    if "error" in box:
        err = box["error"]
        if isinstance(err, KeyboardInterrupt | SystemExit):
            raise err
        detail = " ".join(str(err).split()) or "no message"
        if isinstance(err, MemoryError):  # a length prefix read from some other protocol's bytes
            detail = f"it answered, but not in dask's protocol: {detail}"
        raise ConnectionError(f"could not connect to a dask scheduler at {address!r} "
                              f"({type(err).__name__}: {detail}); {hint}") from err
    reply = box.get("reply")
    kind = reply.get("type") if isinstance(reply, dict) else None
    if kind != "Scheduler":
        what = f"a dask {kind}" if isinstance(kind, str) else "something that is not a dask scheduler"
        raise ConnectionError(f"{address!r} answered as {what}, not as a dask scheduler; {hint}")
    try:
        return Client(address, timeout=f"{deadline:g}s")
    except OSError as err:
        raise ConnectionError(
            f"could not connect to the dask scheduler at {address!r}: {err}; {hint}") from err


def make_executor(workers: int | None = None, scheduler: str | None = None) -> InProcess | Dask:
    """InProcess when neither is given; otherwise a `Dask` executor."""
    if workers is None and scheduler is None:
        return InProcess()
    return Dask(workers=workers, scheduler=scheduler)


_STDERR_LOCK = threading.Lock()
_STDERR_BARS = 0  # progress bars now shown (in any thread); the outermost one wraps sys.stderr
_STDERR_WRAPPED: tuple | None = None  # (the stderr it replaced, its wrapper) while bars are shown


@contextmanager
def _progress_bar(total: int, initial: int, enabled: bool):
    """A tqdm bar over tasks. While bars are shown, what is written to ``sys.stderr`` (warnings of the
    levels, above all) goes through ``tqdm.write``, above the bar instead of through the middle of its
    line; recorded warnings (``warnings.catch_warnings(record=True)``, ``pytest.warns``) stay recorded.
    The first bar to open wraps ``sys.stderr`` and the last to close puts it back, if nothing else has
    replaced it meanwhile."""
    from tqdm.auto import tqdm

    with tqdm(total=total, initial=initial, unit="task", desc="tasks", disable=not enabled,
              smoothing=0.1) as bar:
        if not enabled:
            yield bar
            return
        _wrap_stderr(+1)
        try:
            yield bar
        finally:
            _wrap_stderr(-1)


def _wrap_stderr(change: int) -> None:
    global _STDERR_BARS, _STDERR_WRAPPED
    from tqdm.contrib import DummyTqdmFile

    with _STDERR_LOCK:
        _STDERR_BARS += change
        if change > 0 and _STDERR_BARS == 1:
            _STDERR_WRAPPED = (sys.stderr, DummyTqdmFile(sys.stderr))
            sys.stderr = _STDERR_WRAPPED[1]
        elif change < 0 and _STDERR_BARS == 0 and _STDERR_WRAPPED is not None:
            original, wrapper = _STDERR_WRAPPED
            _STDERR_WRAPPED = None
            if wrapper._buf:  # a last line without its newline
                original.write("".join(wrapper._buf))
                wrapper._buf = []
            if sys.stderr is wrapper:
                sys.stderr = original


def _scan(unique: Mapping[str, Mapping[str, Any]], directory: Path, progress: bool) -> tuple[list, dict]:
    """(the tasks of ``unique`` that still have to run, key → results of those that do not). A task runs
    if it has no file, a file that is not a valid result of its task (reported and removed), or a failure
    that depended on the machine's state (run again)."""
    from tqdm.auto import tqdm

    pending, kept = [], {}
    # a large run checks thousands of files before its first task: say so after a second of silence
    with tqdm(total=len(unique), unit="file", desc="checking finished tasks", delay=1.0, leave=False,
              disable=not progress) as bar:
        for key, task in unique.items():
            bar.update()
            path = task_path(directory, key)
            if not path.exists():
                pending.append(task)
                continue
            try:
                ds = read_task(path, task)
            except TaskFileError as err:
                warnings.warn(f"recomputing task {key}: {err}", stacklevel=4)  # the caller of execute
                path.unlink()
                pending.append(task)
                continue
            if failure_of(ds) == MACHINE:  # e.g. refused for lack of free memory: try again
                pending.append(task)
            else:
                kept[key] = ds
    return pending, kept


def execute(
    tasks: Sequence[Mapping[str, Any]],
    directory: str | Path | None = None,
    executor: InProcess | Dask | None = None,
    progress: bool = True,
    on_done: Callable[[str, str], None] | None = None,
    on_start: Callable[[int, int], None] | None = None,
) -> dict[str, xr.Dataset]:
    """Run ``tasks`` (skipping finished ones) and return key → results Dataset.

    With ``directory``, each task's result is DIR/tasks/<key>.nc; a file that is missing, unreadable,
    incomplete, or does not match its task's key and checksum is (re)computed, and so is a task that
    failed for a reason of the machine's state (a memory refusal; `beyondmf.tasks.failure_kind`). A task
    whose dask worker was lost is a failure of that kind too (no file: the next run computes it).
    DIR holds a run lock meanwhile (`beyondmf.outdir.lock`): a second run on DIR is refused. Without
    ``directory``, tasks run in this process and nothing is written.
    ``on_start(to run, total)`` is called once the finished tasks are known, before the first one runs;
    ``on_done(key, status)`` after each task finishes (a hook for progress reporting, and for tests that
    interrupt a run).
    """
    unique = {task_key(t): t for t in tasks}
    if directory is None:
        if executor is not None and not isinstance(executor, InProcess):
            raise ValueError("a distributed run needs an output directory: workers write the task files")
        out = {}
        if on_start:
            on_start(len(unique), len(unique))
        with _progress_bar(len(unique), 0, progress) as bar:
            for group in drive_groups(list(unique.values())):
                for task, ds in zip(group, compute_group(group), strict=True):
                    key = task_key(task)
                    out[key] = ds
                    bar.update()
                    if on_done:
                        on_done(key, "done")
        return out

    directory = Path(directory)
    with lock(directory):
        return _execute_in(unique, directory, executor or InProcess(), progress, on_done, on_start)


def _execute_in(unique, directory: Path, executor, progress: bool, on_done, on_start) -> dict:
    if (directory / "tasks").is_dir():
        pending, kept = _scan(unique, directory, progress)
    else:
        pending, kept = list(unique.values()), {}
    if on_start:
        on_start(len(pending), len(unique))
    failed, lost = 0, {}
    try:
        # the tasks directory is made only once the executor is up (a scheduler answered)
        with executor:
            (directory / "tasks").mkdir(parents=True, exist_ok=True)
            remove_stale_parts(directory / "tasks", "*.nc")  # of task files a killed run left
            with _progress_bar(len(unique), len(unique) - len(pending), progress) as bar:
                # groups are formed from every task of the run, so that a resumed run solves the same
                # groups as an uninterrupted one (bit for bit); a group with any member to run is solved
                # whole, and only those members are written
                todo = frozenset(task_key(t) for t in pending)
                grouped = getattr(executor, "groups_drives", False)
                if grouped:
                    units = [g for g in drive_groups(list(unique.values()))
                             if any(task_key(t) in todo for t in g)]
                else:  # one task per unit, every one to run (nothing to filter: no key set sent along)
                    units = [[t] for t in pending]
                for result in executor.map_unordered(run_group, units, str(directory),
                                                     todo if grouped else None):
                    if isinstance(result, Lost):
                        err = result.error
                        said = (f"worker lost: the dask worker running this task went away "
                                f"({type(err).__name__}: {' '.join(str(err).split())})")
                        done = []
                        for task in result.item:
                            if task_key(task) in todo:
                                lost[task_key(task)] = failed_result(task, said, MACHINE)
                                done.append((task_key(task), "failed"))
                    else:
                        done = [(key, status) for key, status, _seconds in result]
                    for key, status in done:
                        failed += status == "failed"
                        bar.update()
                        bar.set_postfix(failed=failed, refresh=False)
                        if on_done:
                            on_done(key, status)
    except KeyboardInterrupt as err:
        if isinstance(err, Interrupted):
            raise
        # task files are written whole or not at all (temporary file + rename), so every file there is
        # a finished task that the next run of the same tasks reuses
        kept = sum(task_path(directory, key).exists() for key in unique)
        raise Interrupted(kept, len(unique), directory) from err
    from tqdm.auto import tqdm

    out = {}
    with tqdm(total=len(unique), unit="file", desc="reading task results", delay=1.0, leave=False,
              disable=not progress) as bar:
        for key, task in unique.items():
            # (not `lost.get(key) or ...`: a Dataset without data variables, a failure's, is false)
            if key in lost:
                out[key] = lost[key]
            elif key in kept:
                out[key] = kept[key]
            else:
                out[key] = read_task(task_path(directory, key), task)
            bar.update()
    return out
