"""Writing and reading result files: atomic file writes, JSON-safe values, NetCDF DataTrees.

A file is written to a temporary name in the same folder and moved into place with
``os.replace``, so a crash leaves either the old file or the new one, never half of one. Which
outputs may be created or replaced is decided in :mod:`bayesgeo.common.outputs`.
"""

from __future__ import annotations

import contextlib
import json
import os
from collections.abc import Iterator
from pathlib import Path

from bayesgeo.common.outputs import part_file
from bayesgeo.common.validate import InputError


__all__ = ["plain_attr", "to_jsonable", "read_datatree", "atomic_file", "write_json", "write_text"]


@contextlib.contextmanager
def atomic_file(path: str | Path, *, overwrite: bool = False) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; move it into place if the block succeeds.

    The low-level step for files inside a folder being assembled; outputs a user names go
    through :mod:`bayesgeo.common.outputs`, which owns what may be created and replaced.
    """
    path = Path(path)
    if path.exists() and not overwrite:
        raise InputError(f"{path}: already exists; choose another output or pass --overwrite")
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = part_file(path)
    try:
        yield tmp
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


def to_jsonable(obj):
    """Plain Python types for ``json.dumps``: mappings, sequences and arrays recursively, numpy
    scalars as Python numbers, NaN and infinities as ``None`` (strict JSON)."""
    import math
    from collections.abc import Mapping

    import numpy as np

    if isinstance(obj, Mapping):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist())
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


def plain_attr(value):
    """A value NetCDF attributes and JSON both take: numpy scalars as Python numbers, sequences
    element-wise, anything else that is not str/int/float/None as its string."""
    import numpy as np

    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, (list, tuple)):
        return [plain_attr(x) for x in value]
    return value if isinstance(value, (str, int, float)) or value is None else str(value)


def write_text(path: str | Path, text: str, *, overwrite: bool = False) -> Path:
    """Write ``text`` atomically."""
    with atomic_file(path, overwrite=overwrite) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return Path(path)


def write_json(path: str | Path, obj, *, overwrite: bool = False) -> Path:
    """Write ``obj`` as indented JSON atomically."""
    return write_text(path, json.dumps(obj, indent=2, allow_nan=True) + "\n", overwrite=overwrite)


def read_datatree(path: str | Path, *, what: str = "NetCDF file"):
    """Read a whole NetCDF ``DataTree`` into memory and close the file.

    Closing matters: an HDF5 handle left open crashed a later reopen of the same file in one
    process. Any reader failure becomes one :class:`InputError` line naming the file.
    """
    import xarray as xr

    path = Path(path)
    try:
        with xr.open_datatree(path, engine="netcdf4") as handle:
            return handle.load()
    except Exception as err:  # noqa: BLE001 - netCDF4 raises OSError, ValueError, RuntimeError ...
        msg = " ".join(str(err).split()) or type(err).__name__
        raise InputError(f"{path}: cannot be read as a {what} ({msg})") from None
