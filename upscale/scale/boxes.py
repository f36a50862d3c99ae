"""Boxes: a lazy field coarsened in boxes of whole coarse blocks, one task each.

A lazy field is cut into *boxes* of whole coarse blocks. Each box is one task: it takes
its fine cells plus a halo (the border ring of the local solves and, for face problems,
the next block; :meth:`upscale.core.upscaling.Recipe.halo`) and runs the very same
:func:`upscale.core.upscaling.block_variables` as an in-memory run, so the results agree to
round-off whatever the chunking or the scheduler. Box sizes follow a memory budget.

The writing process (:mod:`upscale.scale.stream`) runs the task graph. Each box is one
packed task (its small array pieces run inside it, so that the scheduler's cost per
task is paid once per box): computed here, one box at a time with the compiled kernel on
every core, or sent to a dask.distributed client, either ``workers`` local processes or
a running cluster by scheduler address, where the fine data never passes through the
writing process.
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
from ..io.schema import pinch_connections
from .cluster import active_client
from .memory import BOX_BYTES_PER_CELL, box_cells, default_memory


def plan_boxes(partition: Partition, halo, cells: int) -> tuple[list[slice], list[slice], list[slice]]:
    """Cut the coarse grid into boxes within a number of fine cells.

    Slabs along x first, then along y, then z, halving the blocks per box until the
    window (box plus halo) holds at most ``cells`` fine cells, where whole blocks allow.

    Parameters
    ----------
    partition : Partition
        The coarse blocks.
    halo : tuple
        (low, high): fine cells added before and after a box along each axis.
    cells : int
        Fine cells a window may hold.

    Returns
    -------
    tuple of list of slice
        The block slices of the boxes along each axis (the boxes are their product).
    """
    low, high = halo
    counts = list(partition.shape)
    per_box = list(counts)

    def window(per):
        """Fine cells of the largest window with ``per`` blocks per box along each axis."""
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
    """The per-block variables of a recipe (:func:`upscale.core.upscaling.block_variables`,
    or :func:`upscale.core.two_phase.two_phase_variables`) for a lazy field, one task per box.

    Parameters
    ----------
    fine : xarray.Dataset
        A normalised, dask-backed field.
    partition : Partition
        The coarse blocks.
    recipe : Recipe or TwoPhaseRecipe
        What to compute: its ``compute``, ``variable_names``, ``trailing``, ``halo`` and
        ``fine_variables``.
    memory : int, optional
        Budget of one process holding one box, bytes; None: :func:`default_memory`.
    box : tuple of int, optional
        Coarse blocks per box along x, y, z; None: sized for ``memory``.

    Returns
    -------
    dict of dask.array.Array
        The variables by name, chunked by boxes.
    """
    memory = default_memory() if memory is None else int(memory)
    halo = recipe.halo(partition)
    boxes = plan_boxes(partition, halo, box_cells(memory)) if box is None else _fixed_boxes(partition, box)
    tasks = _box_tasks(fine, partition, recipe, boxes, halo, _solve_budget(memory))
    return _assemble(tasks, partition, recipe, boxes)


def _fixed_boxes(partition: Partition, box) -> tuple[list[slice], list[slice], list[slice]]:
    """Block slices of boxes of ``box`` coarse blocks along x, y, z (checked: whole, >= 1)."""
    if len(box) != 3 or any(int(b) != b or b < 1 for b in box):
        raise InputError(f"box must be three whole numbers of coarse blocks >= 1 (x, y, z), got {box}")
    return tuple([slice(i, min(i + int(b), n)) for i in range(0, n, int(b))]
                 for b, n in zip(box, partition.shape))


def _solve_budget(memory: int) -> int:
    """Bytes one batch of a box's local solves may hold: a quarter of the box's share of
    ``memory``, within 16 MiB and 256 MiB."""
    return max(min(box_cells(memory) * BOX_BYTES_PER_CELL // 4, 256 * 2 ** 20), 16 * 2 ** 20)


def _box_tasks(fine: xr.Dataset, partition: Partition, recipe, boxes, halo, budget: int) -> np.ndarray:
    """One packed delayed task per box (an object array over the box grid), each
    computing its window's block variables."""
    import dask
    import dask.array as da

    fine_chunks = tuple(tuple(int(partition.edges[a][b.stop] - partition.edges[a][b.start]) for b in boxes[a])
                        for a in range(3))
    names = ("dz", "kx", "ky", "kz", "porosity", "ntg", "active") + tuple(recipe.fine_variables)
    cube = {n: da.asarray(fine[n].data).rechunk(fine_chunks) for n in names}
    lines = {n: np.asarray(fine[n].values, dtype=float) for n in ("dx", "dy")}
    grid = [len(b) for b in boxes]
    tasks = np.empty(grid, dtype=object)
    for index in np.ndindex(*grid):
        window, window_partition, blocks = partition.window(tuple(boxes[a][i] for a, i in enumerate(index)), *halo)
        values = {n: v[window].rechunk(-1).to_delayed(optimize_graph=False).ravel()[0] for n, v in cube.items()}
        task = dask.delayed(_box_task, pure=True)(lines["dx"][window[0]], lines["dy"][window[1]],
                                                  window_partition, blocks, recipe, budget, pinch_connections(fine),
                                                  **values)
        tasks[index] = dask.delayed(_run_graph, pure=True)(_pack(task))
    return tasks


def _box_task(dx, dy, window_partition, blocks, recipe, budget: int, pinch: bool, **values) -> dict:
    """The task of one box: its window's cells as GridArrays (``pinch``: with pinch-out
    connections; and the recipe's other fine variables), then the recipe's per-block
    variables (:meth:`Recipe.compute`)."""
    from ..core.grid import GridArrays

    values = {n: np.asarray(v, dtype=v.dtype) for n, v in values.items()}
    values["active"] = values["active"].astype(bool)
    extra = {n: values.pop(n) for n in recipe.fine_variables}
    cells = GridArrays(dx=dx, dy=dy, pinch_connections=pinch, **values)
    return recipe.compute(cells, window_partition, blocks, budget, extra=extra)


def _assemble(tasks: np.ndarray, partition: Partition, recipe, boxes) -> dict:
    """The variables of all boxes as dask arrays, one chunk per box."""
    import dask
    import dask.array as da

    names, shapes = _box_outputs(partition, recipe, boxes)
    out = {}
    for name in names:
        pieces = np.empty(tasks.shape, dtype=object)
        trailing = recipe.trailing(name)
        for index in np.ndindex(*tasks.shape):
            dtype = np.int8 if name == "active" else float
            piece = da.from_delayed(dask.delayed(operator.getitem)(tasks[index], name),
                                    shapes(name, index) + trailing, dtype)
            pieces[index] = [piece] if trailing else piece  # da.block joins the last axes: nest one deeper
        out[name] = da.block(pieces.tolist())
    return out


def _box_outputs(partition: Partition, recipe, boxes):
    """Names of the variables a box task returns, and their shape per box index."""
    def shape(name: str, index) -> tuple[int, int, int]:
        """Blocks of box ``index``, one fewer along its axis for a face variable at the end."""
        sizes = [boxes[a][i].stop - boxes[a][i].start for a, i in enumerate(index)]
        if name.endswith("_flow"):
            axis = AXES.index(name[1])
            if boxes[axis][index[axis]].stop == partition.shape[axis]:
                sizes[axis] -= 1
        return tuple(sizes)

    return recipe.variable_names(), shape


def _axis_of(dim: str) -> int:
    """The axis of a dimension: x, x_face -> 0 ..."""
    return AXES.index(dim.split("_")[0])


def _pack(value) -> bytes:
    """A delayed value's culled task graph and key, pickled: run as one task by
    :func:`_run_graph`, so the scheduler does not pay its per-task cost for each of the
    many small array pieces a box reads."""
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
    """Compute a packed box in this process, one task after another."""
    import cloudpickle
    import dask.local

    graph, key = cloudpickle.loads(packed)
    return dask.local.get_sync(graph, key)


def box_count(ds: xr.Dataset) -> int:
    """Number of boxes :func:`~upscale.scale.stream.stream_write` computes for a dataset.

    Parameters
    ----------
    ds : xarray.Dataset
        A dataset with dask-backed variables.

    Returns
    -------
    int
        The distinct box keys (:func:`box_keys`) of its variables, e.g. for a progress bar.
    """
    keys = set()
    for var in ds.variables.values():
        if var.chunks is not None:
            keys.update(key for _, key in box_keys(var))
    return len(keys)


def box_keys(var: xr.Variable):
    """The box of every chunk of a dask-backed variable.

    Parameters
    ----------
    var : xarray.Variable
        A dask-backed variable.

    Yields
    ------
    tuple
        (chunk index, box key); the key counts chunks along x, y, z (face dimensions such
        as x_face count with their axis), 0 on axes the variable lacks, so the pieces of
        one box share a key.
    """
    for index in np.ndindex(*[len(c) for c in var.chunks]):
        key = [0, 0, 0]
        for dim, i in zip(var.dims, index):
            key[_axis_of(dim)] = i
        yield index, tuple(key)
