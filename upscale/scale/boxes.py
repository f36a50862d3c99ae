"""Boxes: a lazy field coarsened in boxes of whole coarse blocks, one task each.

A lazy field is cut into *boxes* of whole coarse blocks. Each box is one task: it takes
its fine cells plus a halo (the border ring of the local solves and, for face problems,
the next block; :meth:`upscale.core.upscaling.Recipe.halo`) and runs the very same
:func:`upscale.core.upscaling.block_variables` as an in-memory run, so the results agree to
round-off whatever the chunking or the scheduler. Box sizes follow a memory budget.

The writing process (:mod:`upscale.scale.stream`) runs the task graph. Each box is one
packed task (its small array pieces run
inside it, since a scheduler costs milliseconds per task): computed here, one box at a
time with the compiled kernel on every core, or sent to a dask.distributed client, either
``workers`` local processes or a running cluster by scheduler address, where the fine data
never passes through the writing process.
"""

from __future__ import annotations

import math
import operator
import threading

import numpy as np
import xarray as xr

from ..core.grid import AXES
from ..core.partition import Partition
from ..errors import InputError
from .cluster import active_client
from .memory import BOX_BYTES_PER_CELL, box_cells, default_memory


def plan_boxes(partition: Partition, halo, cells: int) -> tuple[list[slice], list[slice], list[slice]]:
    """Cut the coarse grid into boxes whose window (box plus halo) holds at most ``cells``
    fine cells, where whole blocks allow: slabs along x first, then along y, then z.
    Returns the block slices of the boxes along each axis (the boxes are their product)."""
    low, high = halo
    counts = list(partition.shape)
    per_box = list(counts)

    def window(per):
        return math.prod(min(int(partition.sizes(a).max()) * per[a] + low[a] + high[a],
                             partition.fine_shape[a]) for a in range(3))

    for axis in range(3):
        while per_box[axis] > 1 and window(per_box) > cells:
            per_box[axis] = max(1, per_box[axis] // 2)
        if window(per_box) <= cells:
            break
    return tuple([slice(i, min(i + per_box[a], counts[a])) for i in range(0, counts[a], per_box[a])]
                 for a in range(3))


def lazy_block_variables(fine: xr.Dataset, partition: Partition, recipe, memory: int | None = None,
                         box: tuple[int, int, int] | None = None) -> dict:
    """The per-block variables of :func:`upscale.coarse_grid.block_variables` for a lazy
    (dask-backed, normalised) field, as dask arrays chunked by boxes: ``box`` coarse
    blocks per box along x, y, z, or sized for ``memory`` bytes (default
    :func:`default_memory`)."""
    import dask
    import dask.array as da

    from ..core.grid import GridArrays
    from ..core.upscaling import block_variables

    memory = default_memory() if memory is None else int(memory)
    halo = recipe.halo(partition)
    if box is None:
        boxes = plan_boxes(partition, halo, box_cells(memory))
    else:
        if len(box) != 3 or any(int(b) != b or b < 1 for b in box):
            raise InputError(f"box must be three whole numbers of coarse blocks >= 1 (x, y, z), got {box}")
        boxes = tuple([slice(i, min(i + int(b), n)) for i in range(0, n, int(b))]
                      for b, n in zip(box, partition.shape))
    fine_chunks = tuple(tuple(int(partition.edges[a][b.stop] - partition.edges[a][b.start]) for b in boxes[a])
                        for a in range(3))
    cube = {n: da.asarray(fine[n].data).rechunk(fine_chunks) for n in ("dz", "kx", "ky", "kz", "porosity", "ntg",
                                                                       "active")}
    lines = {n: np.asarray(fine[n].values, dtype=float) for n in ("dx", "dy")}
    budget = max(min(box_cells(memory) * BOX_BYTES_PER_CELL // 4, 256 * 2 ** 20), 16 * 2 ** 20)

    def box_task(dx, dy, window_partition, blocks, **values):
        values["active"] = np.asarray(values["active"]).astype(bool)
        cells = GridArrays(dx=dx, dy=dy, **{n: np.asarray(v, dtype=v.dtype) for n, v in values.items()})
        return block_variables(cells, window_partition, blocks, recipe, budget=budget)

    grid = [len(b) for b in boxes]
    tasks = np.empty(grid, dtype=object)
    for index in np.ndindex(*grid):
        box = tuple(boxes[a][i] for a, i in enumerate(index))
        window, window_partition, blocks = partition.window(box, *halo)
        values = {n: v[window].rechunk(-1).to_delayed(optimize_graph=False).ravel()[0] for n, v in cube.items()}
        box = dask.delayed(box_task, pure=True)(lines["dx"][window[0]], lines["dy"][window[1]],
                                                window_partition, blocks, **values)
        tasks[index] = dask.delayed(_run_graph, pure=True)(_pack(box))
    names, shapes = _box_outputs(partition, recipe, boxes)
    out = {}
    for name in names:
        pieces = np.empty(grid, dtype=object)
        for index in np.ndindex(*grid):
            shape = shapes(name, index)
            dtype = np.int8 if name == "active" else float
            pieces[index] = da.from_delayed(dask.delayed(operator.getitem)(tasks[index], name), shape, dtype)
        out[name] = da.block(pieces.tolist())
    return out


def _box_outputs(partition: Partition, recipe, boxes):
    """Names of the variables a box task returns, and their shape per box index."""
    from ..core.upscaling import block_variable_names

    def shape(name: str, index) -> tuple[int, int, int]:
        sizes = [boxes[a][i].stop - boxes[a][i].start for a, i in enumerate(index)]
        if name.endswith("_flow"):
            axis = AXES.index(name[1])
            if boxes[axis][index[axis]].stop == partition.shape[axis]:
                sizes[axis] -= 1
        return tuple(sizes)

    return block_variable_names(recipe), shape


def _axis_of(dim: str) -> int:
    return AXES.index(dim.split("_")[0])


def _pack(value) -> bytes:
    """A delayed value's culled task graph and key, pickled: run as one task by
    :func:`_run_graph`, so the scheduler does not pay its per-task cost (milliseconds)
    for each of the many small array pieces a box reads."""
    import cloudpickle
    import dask

    (culled,) = dask.optimize(value)
    return cloudpickle.dumps((dict(culled.__dask_graph__()), culled.key))


#: one box at a time in this process: the compiled kernel is parallel itself, and its
#: default threading layer must not be entered from two threads at once
_BOX_LOCK = threading.Lock()


def _run_graph(packed: bytes):
    """Compute a packed box (:func:`_pack`): on the active dask.distributed client when
    there is one (retried there if a worker dies), else here, one task after another."""
    client = active_client()
    if client is not None:
        return client.submit(_run_here, packed, pure=False, retries=2).result()
    with _BOX_LOCK:
        return _run_here(packed)


def _run_here(packed: bytes):
    import cloudpickle
    import dask.local

    graph, key = cloudpickle.loads(packed)
    return dask.local.get_sync(graph, key)


def box_count(ds: xr.Dataset) -> int:
    """Number of boxes :func:`stream_write` computes for a dataset (for a progress bar)."""
    keys = set()
    for var in ds.variables.values():
        if var.chunks is not None:
            keys.update(key for _, key in box_keys(var))
    return len(keys)


def box_keys(var: xr.Variable):
    """(chunk index, box key) of every chunk of a dask-backed variable; the key counts
    chunks along x, y, z (face dimensions such as x_face count with their axis), 0 on
    axes the variable lacks, so the pieces of one box share a key."""
    for index in np.ndindex(*[len(c) for c in var.chunks]):
        key = [0, 0, 0]
        for dim, i in zip(var.dims, index):
            key[_axis_of(dim)] = i
        yield index, tuple(key)
