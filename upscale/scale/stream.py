"""Writing at any size: an in-memory Dataset atomically, a lazy one box by box.

The writing process runs the task graph on its own threads and streams the coarse
result to NetCDF box by box: the pieces of all variables that belong to one box are
written by one task as soon as they are computed, then dropped.
"""

from __future__ import annotations

import math
import os
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import xarray as xr

from .._runtime import interrupt_after
from ..core.grid import AXES
from ..errors import InputError
from ..io.schema import PERMEABILITY
from ..io.writing import atomic_write, check_output_path, write_dataset
from .boxes import box_keys
from .cluster import active_client
from .memory import STORED_CHUNK_BYTES


@contextmanager
def _file_access():
    """Around every call into the NetCDF library here: Ctrl-C held back until it returns
    (:func:`upscale._runtime.interrupt_after`), and the lock xarray takes for its own reads,
    since HDF5 is not thread-safe and an in-process worker may be reading the input."""
    from xarray.backends.netCDF4_ import NETCDF4_PYTHON_LOCK

    with interrupt_after(), NETCDF4_PYTHON_LOCK:
        yield


def stream_write(ds: xr.Dataset, path, progress=None) -> None:
    """Write a dataset whose variables may be dask arrays to NetCDF, box by box.

    The pieces of all variables that belong to one box are written by one task as soon
    as they are computed, then dropped. The graph runs on threads of this process; the
    heavy box tasks inside it go to the active dask.distributed client, if any
    (:func:`~upscale.scale.boxes._run_graph`). Permeabilities are checked for NaN,
    infinite or negative values in active cells before each piece is written.

    Parameters
    ----------
    ds : xarray.Dataset
        The dataset; its numpy-backed variables are written first, whole.
    path : str or os.PathLike
        The file to write (directly: :func:`write` makes it atomic).
    progress : callable, optional
        Receives 1 per box written.
    """
    import dask
    import netCDF4

    lazy = {n: v for n, v in ds.variables.items() if v.chunks is not None}
    groups = _box_groups(lazy)
    with _file_access():
        handle = netCDF4.Dataset(path, "w", format="NETCDF4")
    stores = _store_tasks(handle, groups, ds, path)
    try:
        with _file_access():
            _define(handle, ds)
            for name, var in ds.variables.items():
                if name not in lazy:
                    handle[name][...] = np.asarray(var.values)
        with _box_progress(progress):
            dask.compute(*stores, scheduler="threads", num_workers=_threads())
    finally:
        with _file_access():
            handle.close()


def _box_groups(lazy: dict) -> dict[tuple, list]:
    """The pieces of the lazy variables by box key: (name, region in global indices,
    delayed chunk) each."""
    groups: dict[tuple, list] = {}
    for name, var in lazy.items():
        starts = [np.concatenate([[0], np.cumsum(c)[:-1]]) for c in var.chunks]
        blocks = var.data.to_delayed(optimize_graph=False)
        for index, key in box_keys(var):
            region = tuple((int(s[i]), int(s[i]) + int(c[i])) for s, c, i in zip(starts, var.chunks, index))
            groups.setdefault(key, []).append((name, region, blocks[index]))
    return groups


def _store_tasks(handle, groups: dict, ds: xr.Dataset, path) -> list:
    """One delayed task per box, in box order, checking its pieces and writing them into
    the open file ``handle``; its key starts with "store-box-"."""
    import dask

    def store(places, *pieces):
        """Check one box's pieces and write them; their count."""
        written = dict(zip(places, pieces))
        _check_pieces(written, ds, path)
        with _file_access():
            for (name, region), piece in written.items():
                if piece.size:
                    handle[name][tuple(slice(*r) for r in region)] = piece
        return len(pieces)

    return [dask.delayed(store, pure=False, name=f"store-box-{'-'.join(map(str, key))}")(
        [(n, r) for n, r, _ in groups[key]], *[b for _, _, b in groups[key]]) for key in sorted(groups)]


def _box_progress(progress):
    """A dask callback calling ``progress(1)`` as each box's store task ends."""
    from dask.callbacks import Callback

    class Progress(Callback):
        def _posttask(self, key, result, dsk, state, worker_id):
            """Count a finished store task."""
            if progress is not None and str(key).startswith("store-box-"):
                progress(1)

    return Progress()


def _threads() -> int:
    """Threads of the writing process: enough to keep every worker of the active
    distributed client busy, at least two (reading and computing overlap)."""
    client = active_client()
    workers = len(client.scheduler_info()["workers"]) if client is not None else 1
    return max(2, 2 * workers)


def _check_pieces(written: dict, ds: xr.Dataset, path) -> None:
    """Refuse NaN, infinite or negative permeability in active cells of one box."""
    active = {r: p for (n, r), p in written.items() if n == "active"}
    for (name, region), piece in written.items():
        if name not in PERMEABILITY or ds[name].dims != AXES:
            continue
        flags = active.get(region)
        mask = ~(np.isfinite(piece) & (piece >= 0))
        if flags is not None:
            mask &= flags.astype(bool)
        if mask.any():
            first = np.argwhere(mask)[0] + [start for start, _ in region]
            at = ", ".join(f"{d}={i}" for d, i in zip(AXES, first))
            raise InputError(f"{path}: variable '{name}' would be NaN, infinite or negative in "
                             f"{int(mask.sum())} cell(s) of one chunk, first at ({at}); "
                             f"this is a bug: please report it")


def _define(handle, ds: xr.Dataset) -> None:
    """Dimensions, variables (zlib level 1; stored in chunks of at most
    :data:`STORED_CHUNK_BYTES`, thin along the first axis) and attributes of ``ds``."""
    for dim, size in ds.sizes.items():
        handle.createDimension(dim, size)
    for name, var in ds.variables.items():
        chunks = None
        if var.chunks is not None:
            chunks = [max(min(c), 1) for c in var.chunks]
            rest = var.dtype.itemsize * math.prod(chunks[1:])
            chunks[0] = max(min(chunks[0], STORED_CHUNK_BYTES // max(rest, 1)), 1)
        created = handle.createVariable(name, var.dtype, var.dims, zlib=True, complevel=1, chunksizes=chunks)
        created.setncatts({k: _attribute(v) for k, v in var.attrs.items()})
    handle.setncatts({k: _attribute(v) for k, v in ds.attrs.items()})


def _attribute(value):
    """An attribute value NetCDF can store (booleans and None as text)."""
    if isinstance(value, (bool, np.bool_)) or value is None:
        return str(value)
    return value


def write(ds: xr.Dataset, path: str | os.PathLike, progress=None) -> Path:
    """``upscale.write``: write a field or coarse grid to NetCDF, atomically.

    Parameters
    ----------
    ds : xarray.Dataset
        In memory, or lazy (dask-backed, e.g. ``coarsen`` of a field opened with
        ``chunks``): then computed and written box by box (:func:`stream_write`), Ctrl-C
        stopping the computation.
    path : str or os.PathLike
        The output file; never the file ``ds`` came from.
    progress : callable, optional
        Receives 1 per box written (lazy datasets only).

    Returns
    -------
    pathlib.Path
        The path written; the temporary file is removed if anything fails.
    """
    if not any(v.chunks is not None for v in ds.variables.values()):
        return write_dataset(ds, path)
    path = check_output_path(path, inputs=(ds.attrs.get("source_path"), ds.attrs.get("input_file")))
    return atomic_write(path, lambda tmp: stream_write(ds, tmp, progress), hold_interrupt=False)
