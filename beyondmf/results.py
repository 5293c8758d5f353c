"""Saving and loading results: NetCDF (through xarray and h5netcdf), atomically, with provenance.

NetCDF has no complex type, so a complex variable X is stored as X__real and X__imag with the attribute
``complex_parts = 1``; attributes that are not plain numbers or strings (lists, dicts, complex numbers)
are stored as JSON strings and named in the attribute ``json_attributes``. `load` undoes both, so a
Dataset survives the round trip unchanged.
"""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

__all__ = ["save", "load", "provenance"]

_RE, _IM = "__real", "__imag"


def provenance() -> dict[str, str]:
    """Versions of beyondmf and of the libraries that determine its numbers."""
    import diffrax
    import jax

    from . import __version__

    return {
        "beyondmf_version": __version__,
        "jax_version": jax.__version__,
        "diffrax_version": diffrax.__version__,
    }


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
        elif isinstance(val, str | int | float | np.integer | np.floating):
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


def save(ds: xr.Dataset, path: str | os.PathLike) -> Path:
    """Write ``ds`` to ``path`` as NetCDF-4. The file appears whole or not at all."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    out = xr.Dataset(coords={k: v for k, v in ds.coords.items()})
    for name, var in ds.data_vars.items():
        if np.iscomplexobj(var.values):
            attrs = dict(var.attrs, complex_parts=1)
            out[name + _RE] = var.real.assign_attrs(attrs)
            out[name + _IM] = var.imag.assign_attrs(attrs)
        else:
            out[name] = var
    for name in out.variables:
        out[name].attrs = _encode_attrs(dict(out[name].attrs))
    out.attrs = _encode_attrs(dict(ds.attrs))
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    os.close(fd)
    try:
        out.to_netcdf(tmp, engine="h5netcdf")
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path


def load(path: str | os.PathLike) -> xr.Dataset:
    """Read a file written by `save` into memory, with complex variables and attributes restored."""
    path = Path(path)
    if not path.is_file():
        raise FileNotFoundError(f"no results file at {path}")
    with xr.open_dataset(path, engine="h5netcdf") as f:
        raw = f.load()
    ds = xr.Dataset(coords={k: v for k, v in raw.coords.items()})
    for name in list(raw.data_vars):
        var = raw[name]
        if name.endswith(_RE) and var.attrs.get("complex_parts") == 1:
            base = name[: -len(_RE)]
            attrs = {k: v for k, v in var.attrs.items() if k != "complex_parts"}
            merged = var + 1j * raw[base + _IM]
            merged.attrs = attrs
            ds[base] = merged
        elif not name.endswith(_IM):
            ds[name] = var
    for name in ds.variables:
        ds[name].attrs = _decode_attrs(dict(ds[name].attrs))
    ds.attrs = _decode_attrs(dict(raw.attrs))
    return ds
