"""What beyondmf owns in an output directory: a record of the files it wrote there, and a run lock.

An output directory (``beyondmf run --out DIR``, `beyondmf.sweep.run_sweep`) may also hold the user's own
files. beyondmf replaces or removes a file there only if it wrote that file itself: each file it writes
(results.nc, convergence.nc, the figures) is recorded, with its size and SHA-256, in
``DIR/.beyondmf-written.json``. A file of one of those names that is not recorded, or whose contents
changed since, belongs to someone else: `claim` refuses the directory before anything is computed, naming
the files (`NotOurFiles`).

``DIR/.beyondmf-lock`` holds the process id, host and start time of the run that uses DIR; a second run
on the same directory is refused (`DirectoryInUse`) while that process is alive. A lock left by a
process that no longer exists on this host (kill -9, a crash) is stale and taken over. The lock is
re-entrant within a process (a command that runs a sweep holds it once).
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import socket
import threading
import time
from collections.abc import Iterable, Iterator
from pathlib import Path

__all__ = ["MANIFEST", "LOCK", "OutputDirError", "NotOurFiles", "DirectoryInUse", "claim", "record",
           "place", "save_ours", "is_ours", "remove_ours", "lock"]

MANIFEST = ".beyondmf-written.json"
LOCK = ".beyondmf-lock"
_FORMAT = 1


class OutputDirError(Exception):
    """An output directory that this run cannot use as it is."""


class NotOurFiles(OutputDirError, FileExistsError):
    """The output directory holds files of the names beyondmf writes that beyondmf did not write."""

    def __init__(self, directory: Path, names: list[str]) -> None:
        self.directory, self.names = directory, names
        listed = ", ".join(names)
        super().__init__(
            f"{directory} holds {listed}, which this run would replace or remove but beyondmf did not write "
            f"(not in its record {MANIFEST}, or changed since); move {'them' if len(names) > 1 else 'it'} "
            "elsewhere, or give another output directory")


class DirectoryInUse(OutputDirError):
    """Another run holds the output directory's lock."""


# ---------------------------------------------------------------------------------------------------
# The record of written files


def _read(directory: Path) -> dict[str, dict]:
    """name → {"size", "sha256"} of the files recorded; an unreadable or edited record counts as empty
    (its files are then not ours: refused, never removed)."""
    try:
        data = json.loads((directory / MANIFEST).read_text(encoding="utf-8"))
        files = data["files"]
        if data.get("format") != _FORMAT or not isinstance(files, dict):
            return {}
        return {str(k): v for k, v in files.items()
                if isinstance(v, dict) and isinstance(v.get("size"), int)
                and isinstance(v.get("sha256"), str)}
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        return {}


def _write(directory: Path, files: dict[str, dict]) -> None:
    from .results import _create_part

    path = directory / MANIFEST
    tmp = _create_part(path)
    try:
        tmp.write_text(json.dumps({"format": _FORMAT, "written_by": "beyondmf", "files": files}, indent=1,
                                  sort_keys=True) + "\n", encoding="utf-8")
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _entry(path: Path) -> dict:
    st = path.stat()
    return {"size": st.st_size, "sha256": _sha256(path), "mtime_ns": st.st_mtime_ns, "inode": st.st_ino}


def _matches(path: Path, entry: dict | None) -> bool:
    """Whether ``path`` is the file of the record ``entry``, or of the one it replaces (``previous``: a
    run stopped between recording a file and renaming it into place left either)."""
    if entry is None:
        return False
    previous = entry.get("previous")
    if isinstance(previous, dict) and _matches(path, {k: v for k, v in previous.items() if k != "previous"}):
        return True
    try:
        st = path.lstat()
        if not path.is_file() or path.is_symlink() or st.st_size != entry["size"]:
            return False
        if st.st_mtime_ns == entry.get("mtime_ns") and st.st_ino == entry.get("inode"):
            return True  # the very file written (a copy or a replacement has another inode or time)
        return _sha256(path) == entry["sha256"]
    except OSError:
        return False


def is_ours(directory: str | os.PathLike, name: str) -> bool:
    """Whether DIR/name is a file beyondmf wrote there and nobody has changed since."""
    directory = Path(directory)
    return _matches(directory / name, _read(directory).get(name))


def claim(directory: str | os.PathLike, names: Iterable[str], patterns: Iterable[str] = ()) -> None:
    """Refuse (`NotOurFiles`) if DIR holds any of ``names``, or a file matching one of the glob
    ``patterns``, that beyondmf did not write. Call it before computing anything."""
    directory = Path(directory)
    if not directory.is_dir():
        return
    files = _read(directory)
    present = [n for n in names if os.path.lexists(directory / n)]
    for pattern in patterns:
        present += [p.name for p in directory.glob(pattern)]
    foreign = sorted({n for n in present if not _matches(directory / n, files.get(n))})
    if foreign:
        raise NotOurFiles(directory, foreign)


def record(path: str | os.PathLike) -> None:
    """Record the file at ``path`` (just written by beyondmf) in its directory's record."""
    path = Path(path)
    files = _read(path.parent)
    files[path.name] = _entry(path)
    _write(path.parent, files)


def place(tmp: str | os.PathLike, dest: str | os.PathLike) -> Path:
    """Move the file beyondmf wrote at ``tmp`` to ``dest`` (same directory) and record it, so that a kill
    at any moment leaves ``dest`` recorded as ours: the new file is recorded first, beside the one it
    replaces, then renamed into place (a rename keeps its inode and times), then the old entry dropped."""
    tmp, dest = Path(tmp), Path(dest)
    files = _read(dest.parent)
    new = _entry(tmp)
    old = files.get(dest.name)
    files[dest.name] = {**new, "previous": old if _matches(dest, old) else None}
    _write(dest.parent, files)
    os.replace(tmp, dest)
    files[dest.name] = new
    _write(dest.parent, files)
    return dest


def save_ours(ds, path: str | os.PathLike) -> Path:
    """`beyondmf.save` ``ds`` to ``path`` and record it (`place`): written whole under a temporary name
    that a later run removes if this one is killed (`beyondmf.results.remove_stale_parts`)."""
    from .results import _create_part, save

    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = _create_part(path)
    try:
        save(ds, tmp)
        return place(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


def remove_ours(directory: str | os.PathLike, name: str) -> bool:
    """Remove DIR/name if beyondmf wrote it (and nobody changed it since); return whether it did."""
    directory = Path(directory)
    files = _read(directory)
    path = directory / name
    if not _matches(path, files.get(name)):
        return False
    path.unlink(missing_ok=True)
    files.pop(name, None)
    _write(directory, files)
    return True


# ---------------------------------------------------------------------------------------------------
# The lock

_HELD: dict[Path, int] = {}
_HELD_LOCK = threading.Lock()


def _start_ticks(pid: int) -> int | None:
    """When process ``pid`` started (clock ticks since boot; Linux), to tell it from a later process that
    was given the same id; None where unknown."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as fh:
            stat = fh.read().decode(errors="replace")
        return int(stat.rsplit(")", 1)[1].split()[19])
    except (OSError, ValueError, IndexError):
        return None


def _holder_text(info: dict) -> str:
    since = info.get("started")
    known = isinstance(since, int | float)
    when = time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(since)) if known else "?"
    return f"process {info.get('pid', '?')} on {info.get('host', '?')}, since {when}"


def _stale(info: dict) -> bool:
    """A lock is stale when it was taken on this host (and process-id namespace) by a process that no
    longer exists, or by one whose id another process has been given since."""
    from .results import _alive, _writer_id

    pid = info.get("pid")
    if info.get("writer") != _writer_id() or not isinstance(pid, int):
        return False
    if not _alive(pid):
        return True
    ticks = info.get("start_ticks")
    return ticks is not None and _start_ticks(pid) not in (None, ticks)


def _acquire(directory: Path) -> None:
    from .results import _create_part, _writer_id

    path = directory / LOCK
    mine = {"pid": os.getpid(), "host": socket.gethostname(), "writer": _writer_id(),
            "start_ticks": _start_ticks(os.getpid()), "started": time.time()}
    for _ in range(5):
        tmp = _create_part(path)
        try:
            tmp.write_text(json.dumps(mine) + "\n", encoding="utf-8")
            try:
                os.link(tmp, path)  # atomic: fails if a lock exists; the lock appears with its contents
                return
            except FileExistsError:
                pass
            except OSError:  # a file system without hard links: create it exclusively, then fill it
                try:
                    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
                except FileExistsError:
                    pass
                else:
                    with os.fdopen(fd, "w", encoding="utf-8") as fh:
                        fh.write(json.dumps(mine) + "\n")
                    return
        finally:
            tmp.unlink(missing_ok=True)
        try:
            text = path.read_text(encoding="utf-8")
            info = json.loads(text)
            if not isinstance(info, dict):
                raise ValueError("not a table")
        except FileNotFoundError:
            continue  # released meanwhile: try again
        except (OSError, ValueError):
            with contextlib.suppress(OSError):
                if time.time() - path.stat().st_mtime < 5:  # being written (another run's first moment)
                    time.sleep(0.2)
                    continue
            if not path.exists():
                continue  # released meanwhile
            info = {}
        if info and not _stale(info):
            raise DirectoryInUse(
                f"{directory} is in use by another beyondmf run ({_holder_text(info)}); wait for it to end, "
                f"or give another output directory (if no such run exists any more, e.g. it ran on another "
                f"host that has gone, remove {path})")
        if not info:
            raise DirectoryInUse(f"{directory} has a lock file {path} that beyondmf cannot read; if no other "
                                 "beyondmf run uses this directory, remove it")
        # stale: move it aside (only one taker succeeds), check it is the one judged stale, retry
        aside = directory / f".beyondmf-lock.stale-{os.getpid()}-{os.urandom(3).hex()}"
        try:
            os.rename(path, aside)
        except FileNotFoundError:
            continue
        try:
            moved = aside.read_text(encoding="utf-8")
            if moved != text:  # another run took the stale lock over meanwhile: give its lock back
                with contextlib.suppress(OSError):
                    os.link(aside, path)
                raise DirectoryInUse(f"{directory} was just taken by another beyondmf run; wait for it to "
                                     "end, or give another output directory")
        finally:
            aside.unlink(missing_ok=True)
    raise DirectoryInUse(f"could not take the lock {path}; if no other beyondmf run uses {directory}, "
                         "remove it")


def _release(directory: Path) -> None:
    path = directory / LOCK
    try:
        info = json.loads(path.read_text(encoding="utf-8"))
        if isinstance(info, dict) and info.get("pid") == os.getpid():
            path.unlink()
    except (OSError, ValueError):
        pass


@contextlib.contextmanager
def lock(directory: str | os.PathLike) -> Iterator[None]:
    """Hold DIR's run lock (made if missing) for the duration of the block; `DirectoryInUse` if another
    live run holds it. Re-entrant within this process."""
    directory = Path(directory).absolute()
    with _HELD_LOCK:
        held = _HELD.get(directory, 0)
        if not held:
            directory.mkdir(parents=True, exist_ok=True)
            _acquire(directory)
        _HELD[directory] = held + 1
    try:
        yield
    finally:
        with _HELD_LOCK:
            _HELD[directory] -= 1
            if not _HELD[directory]:
                del _HELD[directory]
                _release(directory)
