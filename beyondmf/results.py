"""Saving and loading results: NetCDF (through xarray and h5netcdf), atomically, with provenance.

NetCDF has no complex type, so a complex variable X is stored as X__real and X__imag with the attribute
``complex_parts = 1``; attributes that are not plain numbers or strings (lists, dicts, complex numbers)
are stored as JSON strings and named in the attribute ``json_attributes``. `load` undoes both, so a
Dataset survives the round trip unchanged. `save` marks its files with the attribute
``beyondmf_file_format``; `load` refuses (`NotAResultsFile`) a file without it (or the attributes of files
of earlier versions), a NetCDF-3 or truncated file, and any file it cannot decode whole.
"""

from __future__ import annotations

import functools
import hashlib
import json
import os
import re
import socket
import time
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

__all__ = ["save", "load", "provenance", "remove_stale_parts", "NotAResultsFile"]

_RE, _IM = "__real", "__imag"


def provenance() -> dict[str, str]:
    """Versions of beyondmf and of the libraries that determine its numbers."""
    import diffrax
    import jax

    from ._version import __version__

    return {
        "beyondmf_version": __version__,
        "beyondmf_commit": _source_commit(),
        "jax_version": jax.__version__,
        "diffrax_version": diffrax.__version__,
    }


@functools.cache
def _source_commit() -> str:
    """The git commit of the code that runs, with "+changes" when its files differ from it; "" when the
    package is not run from a git checkout (an installed release: its version says what it is)."""
    import subprocess

    here = Path(__file__).resolve().parent
    try:
        top, head = subprocess.run(["git", "-C", str(here), "rev-parse", "--show-toplevel", "HEAD"],
                                   capture_output=True, text=True, timeout=5, check=True).stdout.split()
        if Path(top).resolve() / "beyondmf" != here:  # an installed copy inside some other repository
            return ""
        dirty = subprocess.run(["git", "-C", str(here), "status", "--porcelain", "--untracked-files=no",
                                "--", "."], capture_output=True, text=True, timeout=5, check=True).stdout
    except (OSError, subprocess.SubprocessError):
        return ""
    return head + ("+changes" if dirty.strip() else "")


def _json_default(obj: Any):
    if isinstance(obj, complex | np.complexfloating):
        return {"__complex__": [float(obj.real), float(obj.imag)]}
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, np.integer | np.floating | np.bool_):
        return obj.item()
    raise TypeError(f"cannot store {type(obj).__name__} in a results file attribute")


def _json_hook(d: dict):
    if set(d) == {"__complex__"}:
        re, im = d["__complex__"]
        return complex(re, im)
    return d


def _encode_attrs(attrs: dict[str, Any]) -> dict[str, Any]:
    out, encoded = {}, []
    for key, val in attrs.items():
        if isinstance(val, bool | np.bool_):
            out[key] = int(val)
        elif isinstance(val, str):
            out[key] = str(val)  # numpy's str_ too, which h5py cannot store as it is
        elif isinstance(val, int | float | np.integer | np.floating):
            out[key] = val
        else:
            out[key] = json.dumps(val, default=_json_default)
            encoded.append(key)
    if encoded:
        out["json_attributes"] = json.dumps(encoded)
    return out


def _decode_attrs(attrs: dict[str, Any]) -> dict[str, Any]:
    out = dict(attrs)
    for key in json.loads(out.pop("json_attributes", "[]")):
        out[key] = json.loads(out[key], object_hook=_json_hook)
    return out


@functools.cache
def _writer_id() -> str:
    """Who is writing, as 8 hex digits: this host and (on Linux) this process-id namespace.

    A temporary file's name carries this and the writer's process id, so that `remove_stale_parts` can
    tell a file abandoned by a dead process on this host from one being written right now elsewhere.
    """
    try:
        ns = os.readlink("/proc/self/ns/pid")
    except OSError:
        ns = ""
    return hashlib.sha256(f"{socket.gethostname()}|{ns}".encode()).hexdigest()[:8]


_PART = re.compile(r"^\..+\.([0-9a-f]{8})-([0-9]+)-[0-9a-f]+\.part$")
# A temporary file nobody has modified for this long is abandoned whoever wrote it: `save` writes its
# temporary file in one go (seconds even for large task files on a network file system).
STALE_AFTER_S = 15 * 60


def _create_part(path: Path) -> Path:
    """Create a new, empty temporary file beside ``path``, with the normal mode (0666 less the umask).

    ``os.open`` with mode 0o666 lets the system apply the umask, as `open` does; ``tempfile.mkstemp``
    would give 0600, which colleagues cannot read.
    """
    while True:
        tmp = path.parent / f".{path.name}.{_writer_id()}-{os.getpid()}-{os.urandom(4).hex()}.part"
        try:
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
        except FileExistsError:
            continue
        os.close(fd)
        return tmp


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # someone else's process
        return True
    return True


def remove_stale_parts(directory: str | os.PathLike, name: str = "*") -> list[Path]:
    """Remove the temporary files of `save` in ``directory`` that were clearly abandoned.

    Only temporaries of files called ``name`` (a glob: ``.NAME.*.part``) are considered; give the names
    beyondmf writes when ``directory`` may also hold other people's files.

    Other processes (dask workers on this and other hosts) may be writing into the same directory right
    now, so a temporary file is removed only if
    - it was written on this host, in this process-id namespace, by a process that no longer exists
      (its name carries the writer's host hash and process id), or
    - nobody has modified it for ``STALE_AFTER_S`` (15 minutes): `save` writes its temporary file in one
      go, so no live writer leaves one untouched that long. This also covers files of writers on other
      hosts, and temporary files of older versions, whose names carry no process id.
    Returns the paths removed; files that vanish or cannot be removed meanwhile are skipped.
    """
    directory = Path(directory)
    if not directory.is_dir():
        return []
    me, now, removed = _writer_id(), time.time(), []
    for tmp in directory.glob(f".{name}.*.part"):
        try:
            age = now - tmp.lstat().st_mtime
            if not tmp.is_file():
                continue
            m = _PART.match(tmp.name)
            dead = m is not None and m.group(1) == me and not _alive(int(m.group(2)))
            if dead or age > STALE_AFTER_S:
                tmp.unlink()
                removed.append(tmp)
        except OSError:
            continue
    return removed


def save(ds: xr.Dataset, path: str | os.PathLike) -> Path:
    """Write ``ds`` to ``path`` as NetCDF-4. The file appears whole or not at all.

    Missing parent directories are made. The file is written to a temporary file beside ``path``
    (``.NAME.*.part``) and renamed into place; it gets the normal mode of a new file (0666 less the umask).
    """
    if not isinstance(ds, xr.Dataset):
        raise TypeError(f"save: expected an xarray.Dataset (as returned by beyondmf.evolve or steady), "
                        f"got {type(ds).__name__}")
    path = Path(path)
    if path.is_dir():
        raise IsADirectoryError(f"save: {path} is a directory; give the path of the file to write, "
                                f"e.g. {path / 'results.nc'}")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except (FileExistsError, NotADirectoryError) as err:
        raise NotADirectoryError(f"save: cannot write {path}: a part of {path.parent} is a file, "
                                 "not a directory") from err
    out = xr.Dataset(coords={k: v for k, v in ds.coords.items()})
    for name, var in ds.data_vars.items():
        if np.iscomplexobj(var.values):
            attrs = dict(var.attrs, complex_parts=1)
            out[name + _RE] = var.real.assign_attrs(attrs)
            out[name + _IM] = var.imag.assign_attrs(attrs)
        else:
            out[name] = var
    for name in out.variables:
        # json_attributes always written ("[]" when empty): a file that lacks it was edited
        out[name].attrs = {"json_attributes": "[]", **_encode_attrs(dict(out[name].attrs))}
    out.attrs = {"json_attributes": "[]", **_encode_attrs(dict(ds.attrs))}
    out.attrs[MARK] = FILE_FORMAT  # `load` reads only files that carry it (or those of earlier versions)
    try:
        tmp = _create_part(path)
    except OSError as err:
        raise type(err)(err.errno, f"save: cannot write {path} ({err.strerror})") from err
    try:
        # The data are in memory and every file has one writer. Without this, xarray takes a dask
        # distributed lock per file wherever a dask client is active (on a worker: a client of its own
        # and two round trips to the scheduler for every task file, and errors at shutdown).
        import dask  # here, not at import time: only writing needs it

        with dask.config.set(scheduler="synchronous"):
            out.to_netcdf(tmp, engine="h5netcdf")
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path


class NotAResultsFile(ValueError):
    """A file that `load` cannot read as one written by `save`: not NetCDF-4, truncated, written by
    something else, or with attributes or variables it cannot fully decode. The message says which."""


# The attribute `save` marks its files with (removed again by `load`): the file format's version.
MARK = "beyondmf_file_format"
FILE_FORMAT = 1
# Attributes that files of earlier versions (before MARK) always carry one of: results of evolve/steady
# and merged sweeps (provenance), task files, files with list or table attributes.
_EARLIER = ("beyondmf_version", "task_format", "json_attributes")
_HDF5_SIGNATURE = b"\x89HDF\r\n\x1a\n"


def _file_kind(path: Path) -> str | None:
    """What the first bytes of ``path`` say it is, where that explains why h5netcdf cannot read it."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(8)
            # HDF5 looks for its signature at 0, 512, 1024, 2048, ... (a user block before it)
            hdf5 = head == _HDF5_SIGNATURE or any(
                fh.seek(at) == at and fh.read(8) == _HDF5_SIGNATURE for at in (512, 1024, 2048))
    except OSError:
        return None
    if head[:4] in (b"CDF\x01", b"CDF\x02", b"CDF\x05"):
        variant = {1: "classic", 2: "64-bit offset", 5: "64-bit data (CDF-5)"}[head[3]]
        return (f"a NetCDF-3 file ({variant} format), which beyondmf.save never writes; open it with "
                "xarray.open_dataset")
    if hdf5:
        return None  # HDF5: h5netcdf's own message says what is wrong (truncated, ...)
    if not head:
        return "an empty file (its writer was stopped before writing anything, or a copy failed): write or " \
               "copy it again"
    return f"not a NetCDF-4/HDF5 file at all (it starts with {head[:8]!r})"


def _decode_attrs_of(attrs: dict[str, Any], where: str, path: Path, marked: bool) -> dict[str, Any]:
    """`_decode_attrs`, every failure one `NotAResultsFile` naming the attribute. ``marked``: the file
    carries `MARK`, so `save` wrote json_attributes everywhere (earlier versions only where needed)."""
    out = dict(attrs)
    if marked and "json_attributes" not in out:
        raise NotAResultsFile(
            f"load: {path}: {where} lacks the attribute json_attributes that beyondmf.save writes (the list "
            "of attributes stored as JSON): the file was edited, and its attributes cannot be decoded; "
            "write it again with beyondmf.save")
    listed = out.pop("json_attributes", "[]")
    try:
        names = json.loads(listed)
        if not isinstance(names, list) or not all(isinstance(n, str) for n in names):
            raise ValueError("not a list of names")
    except (TypeError, ValueError) as err:
        raise NotAResultsFile(
            f"load: {path}: the attribute json_attributes of {where} is not the list of names beyondmf.save "
            f"writes ({err}): the file was edited or not written by beyondmf; write it again with "
            "beyondmf.save") from None
    for key in names:
        if key not in out:
            raise NotAResultsFile(
                f"load: {path}: {where} lists the attribute {key!r} in json_attributes but has no such "
                "attribute: the file was edited or not written by beyondmf; write it again with "
                "beyondmf.save")
        try:
            out[key] = json.loads(out[key], object_hook=_json_hook)
        except (TypeError, ValueError, KeyError) as err:
            raise NotAResultsFile(
                f"load: {path}: the attribute {key!r} of {where} is not the JSON beyondmf.save writes "
                f"({type(err).__name__}: {err}): the file was edited or not written by beyondmf; write it "
                "again with beyondmf.save") from None
    return out


def load(path: str | os.PathLike) -> xr.Dataset:
    """Read a file written by `save` into memory, with complex variables and attributes restored.

    A file it cannot read whole is refused with one `NotAResultsFile` (a ValueError) saying what is
    wrong: not NetCDF-4 (a NetCDF-3 file is named as such), truncated, not written by beyondmf, or with
    an attribute or complex variable it cannot decode; nothing is half-loaded.
    """
    path = Path(path)
    if path.is_dir():
        raise IsADirectoryError(f"load: {path} is a directory; expected a results file written by "
                                f"beyondmf.save, e.g. {path / 'results.nc'}")
    if not path.is_file():
        raise FileNotFoundError(f"no results file at {path}")
    kind = _file_kind(path)
    if kind is not None:
        raise NotAResultsFile(f"load: {path} is not a readable results file: expected NetCDF-4 as written by "
                              f"beyondmf.save, but it is {kind}")
    try:
        with xr.open_dataset(path, engine="h5netcdf") as f:
            raw = f.load()
    except (OSError, ValueError, KeyError, TypeError) as err:  # h5py: "truncated file", ...
        said = " ".join(str(err).split())
        why = ("it is truncated: its writer was stopped or a copy is incomplete; write or copy it again"
               if "truncated" in said else "it is damaged or not written by beyondmf.save")
        raise NotAResultsFile(
            f"load: {path} is not a readable results file: expected NetCDF-4 as written by beyondmf.save, "
            f"and {why} (h5netcdf said: {said})") from err
    marked = raw.attrs.get(MARK)
    if marked is None and not any(k in raw.attrs for k in _EARLIER):
        raise NotAResultsFile(
            f"load: {path} is a NetCDF-4 file, but not one written by beyondmf.save (it has none of the "
            f"attributes {MARK}, {', '.join(_EARLIER)}); open it with xarray.open_dataset")
    if marked is not None and marked != FILE_FORMAT:
        raise NotAResultsFile(
            f"load: {path} was written by another version of beyondmf (file format {marked!r}, this one "
            f"reads {FILE_FORMAT}); read it with that version")
    ds = xr.Dataset(coords={k: v for k, v in raw.coords.items()})
    for name in list(raw.data_vars):
        var = raw[name]
        part = name.endswith(_RE) or name.endswith(_IM)
        if not part or var.attrs.get("complex_parts") != 1:
            ds[name] = var
            continue
        base = name[: -len(_RE)]
        other = base + (_IM if name.endswith(_RE) else _RE)
        if other not in raw.data_vars or raw[other].attrs.get("complex_parts") != 1:
            raise NotAResultsFile(
                f"load: {path}: the complex variable {base!r} has its part {name!r} but not {other!r}: the "
                "file was edited or not written by beyondmf; write it again with beyondmf.save")
        if raw[other].shape != var.shape:
            raise NotAResultsFile(f"load: {path}: the real and imaginary parts of {base!r} differ in shape")
        if name.endswith(_IM):
            continue
        attrs = {k: v for k, v in var.attrs.items() if k != "complex_parts"}
        # set the parts, not re + 1j·im: that turns a real part −0.0 into +0.0, and a non-finite
        # imaginary part into a NaN real part
        data = np.empty(var.shape, dtype=complex)
        data.real, data.imag = var.values, raw[other].values
        ds[base] = xr.DataArray(data, dims=var.dims, coords=var.coords, attrs=attrs)
    for name in ds.variables:
        where = f"variable {name!r}"
        ds[name].attrs = _decode_attrs_of(dict(ds[name].attrs), where, path, marked is not None)
    attrs = dict(raw.attrs)
    attrs.pop(MARK, None)
    ds.attrs = _decode_attrs_of(attrs, "the file", path, marked is not None)
    return ds
