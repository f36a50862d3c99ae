"""Writing outputs: atomically (a temporary name, renamed when complete), never over an
input, never with NaN or negative permeability in active cells.
"""

from __future__ import annotations

import os
import tempfile
from contextlib import nullcontext
from pathlib import Path

import numpy as np
import xarray as xr

from .._runtime import interrupt_after
from ..errors import InputError
from .schema import PERMEABILITY
from .validation import Check, count_bad, refuse_first


def check_output_path(path: str | os.PathLike, inputs: tuple = ()) -> Path:
    """Refuse an output path whose folder is missing, that is a folder, or that names one
    of the inputs.

    Parameters
    ----------
    path : str or os.PathLike
        The output file.
    inputs : tuple
        Paths of the inputs (None or empty entries are skipped).

    Returns
    -------
    pathlib.Path
        ``path``, once it has passed.
    """
    path = Path(path)
    if not path.parent.resolve().is_dir():
        raise InputError(f"{path}: output folder '{path.parent}' does not exist; create it first")
    if path.is_dir():
        raise InputError(f"{path}: is a folder; give a file name for the output")
    for source in inputs:
        if source and path.resolve() == Path(source).resolve():
            raise InputError(f"{path}: output would overwrite the input file; choose another name")
    return path


def atomic_write(path: str | os.PathLike, write_to, hold_interrupt: bool = True) -> Path:
    """Write a file under a temporary name next to ``path`` and rename it into place when
    complete; the temporary file is removed if anything fails.

    Parameters
    ----------
    path : str or os.PathLike
        The file to write.
    write_to : callable
        Called with the temporary path; writes the whole file there.
    hold_interrupt : bool
        Hold Ctrl-C back until ``write_to`` returns (:func:`interrupt_after`), so that it
        ends the call cleanly; False when ``write_to`` guards its own file operations.

    Returns
    -------
    pathlib.Path
        The path written, with the usual permissions (0666 less the umask).
    """
    path = Path(path)
    handle, temporary = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    os.close(handle)
    try:
        with interrupt_after() if hold_interrupt else nullcontext():
            write_to(temporary)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(temporary, 0o666 & ~umask)  # mkstemp creates 0600; give the usual permissions
        os.replace(temporary, path)
    except BaseException:
        if os.path.exists(temporary):
            os.unlink(temporary)
        raise
    return path


def write_dataset(ds: xr.Dataset, path: str | os.PathLike) -> Path:
    """Write an in-memory field atomically to NetCDF (zlib level 1).

    Parameters
    ----------
    ds : xarray.Dataset
        A field or coarse grid held in memory (numpy-backed).
    path : str or os.PathLike
        The output file; refused if its folder is missing or it names the file ``ds`` came
        from (attributes ``source_path``, ``input_file``).

    Returns
    -------
    pathlib.Path
        The path written. Refused (InputError) before anything is written when a
        permeability would be NaN, infinite or negative in an active cell.
    """
    path = check_output_path(path, inputs=(ds.attrs.get("source_path"), ds.attrs.get("input_file")))
    active = xr.DataArray(ds["active"].variable).astype(bool) if "active" in ds else True
    checks = [Check(active & ~(np.isfinite(ds[name]) & (ds[name] >= 0)), name, "would be NaN, infinite or negative",
                    "this is a bug: please report it") for name in PERMEABILITY if name in ds]
    refuse_first(checks, count_bad(checks), str(path))
    encoding = {name: {"zlib": True, "complevel": 1} for name in ds.data_vars}
    return atomic_write(path, lambda tmp: ds.to_netcdf(tmp, engine="netcdf4", encoding=encoding))


def multiplier_csv(face_multipliers: dict[str, np.ndarray]) -> str:
    """Transmissibility multipliers as CSV text.

    Parameters
    ----------
    face_multipliers : dict of str to numpy.ndarray
        Direction ("x", "y", "z") to the multipliers of its interior faces, shape
        (NX - 1, NY, NZ) along x and so on.

    Returns
    -------
    str
        Columns i, j, k, direction, multiplier: one row per interior face, the face
        between cell (i, j, k) and the next cell along the direction (0-based).
    """
    lines = ["i,j,k,direction,multiplier"]
    for name, m in face_multipliers.items():
        index = np.indices(m.shape).reshape(3, -1).T
        lines += [f"{i},{j},{k},{name},{v:.9g}" for (i, j, k), v in zip(index.tolist(), m.ravel().tolist())]
    return "\n".join(lines) + "\n"
