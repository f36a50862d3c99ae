"""Chunked and distributed execution on dask: fields larger than memory, clusters.

A lazy field is cut into *boxes* of whole coarse blocks. Each box is one task: it takes
its fine cells plus a halo (the border ring of the local solves and, for face problems,
the next block; :meth:`upscale.coarse_grid.Recipe.halo`) and runs the very same
:func:`upscale.coarse_grid.block_variables` as an in-memory run, so the results agree to
round-off whatever the chunking or the scheduler. Box sizes follow a memory budget.

The writing process runs the task graph on its own threads and streams the coarse
result to NetCDF box by box. Each box is one packed task (its small array pieces run
inside it, since a scheduler costs milliseconds per task): computed here, one box at a
time with the compiled kernel on every core, or sent to a dask.distributed client, either
``workers`` local processes or a running cluster by scheduler address, where the fine data
never passes through the writing process.
"""

from __future__ import annotations

import math
import operator
import os
import re
import threading
from contextlib import contextmanager

import numpy as np
import xarray as xr

from .errors import InputError
from .field import DIMS, PERMEABILITY, interrupt_after
from .partition import AXES, Partition

#: bytes one fine cell of a box costs while its task runs (window arrays, normalisation,
#: local systems, halo chunks held by dask); measured about 320-430 B in the solves alone
#: with flow and multipliers (the in-memory path), doubled for what dask holds around it
BOX_BYTES_PER_CELL = 800
#: memory one process needs before any box: python, numpy, numba, xarray, dask (measured ~250 MB)
PROCESS_BYTES = 300 * 2 ** 20
UNITS = {"": 1, "b": 1, "k": 2 ** 10, "kb": 2 ** 10, "m": 2 ** 20, "mb": 2 ** 20, "g": 2 ** 30, "gb": 2 ** 30,
         "t": 2 ** 40, "tb": 2 ** 40}


#: arrays from this size up get their own memory map, returned to the system when freed
#: (glibc otherwise raises its threshold after each free and keeps freed arrays in the heap:
#: measured on the 8 M-cell benchmark, peak 960 MB instead of 750 MB at the same speed)
MMAP_THRESHOLD = 4 * 2 ** 20


def keep_heap_small() -> None:
    """Fix glibc's memory-map threshold for this process (and, by the environment, for
    worker processes started after); nothing elsewhere."""
    os.environ.setdefault("MALLOC_MMAP_THRESHOLD_", str(MMAP_THRESHOLD))
    try:
        import ctypes

        libc = ctypes.CDLL("libc.so.6")
        libc.mallopt(-3, MMAP_THRESHOLD)  # M_MMAP_THRESHOLD
    except (OSError, AttributeError):
        pass


def parse_memory(text: str) -> int:
    """Bytes in a size such as ``2GB``, ``800MB``, ``1.5g`` (binary units; plain numbers are bytes)."""
    match = re.fullmatch(r"\s*([0-9]*\.?[0-9]+)\s*([a-zA-Z]*)\s*", str(text))
    unit = match.group(2).lower() if match else None
    if match is None or unit not in UNITS:
        raise InputError(f"memory size {text!r} is not understood; write e.g. 2GB, 800MB or 1.5G")
    value = float(match.group(1)) * UNITS[unit]
    if value < PROCESS_BYTES + 64 * 2 ** 20:
        raise InputError(f"memory size {text!r} is too small: one process needs about "
                         f"{(PROCESS_BYTES + 64 * 2 ** 20) // 2 ** 20} MB")
    return int(value)


def available_memory() -> int:
    """MemAvailable from /proc/meminfo in bytes (total physical memory where unknown)."""
    try:
        with open("/proc/meminfo") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")


def default_memory() -> int:
    """The budget when none is given: half the memory available now."""
    return available_memory() // 2


#: layers along x per chunk when a file is stored contiguously (not in chunks)
CONTIGUOUS_LAYERS = 4
#: largest stored (HDF5) chunk the box writer makes: boxes read whole stored chunks
STORED_CHUNK_BYTES = 8 * 2 ** 20
#: bytes per fine cell of an in-memory run (field, its checked copy, the solves; measured
#: 110-430 B in the solves alone, from static averages to flow with multipliers and border)
IN_MEMORY_BYTES_PER_CELL = {"static": 250, "flow": 600}


def box_cells(memory: int) -> int:
    """Fine cells per box (window) so that one process holding one box stays within ``memory`` bytes."""
    return max(int((memory - PROCESS_BYTES) // BOX_BYTES_PER_CELL), 1)


class MemoryPlan:
    """How a command fits its memory budget (bytes; None: :func:`default_memory`):
    in memory when the field fits, else in boxes; ``workers`` local processes or a
    ``cluster`` (where the budget is per worker) always use boxes."""

    def __init__(self, memory: int | None, workers: int | None = None, cluster: bool = False):
        self.memory = default_memory() if memory is None else memory
        self.workers = workers
        self.cluster = cluster
        if workers is not None and workers < 1:
            raise InputError(f"--workers must be at least 1, got {workers}")
        if workers and not cluster:
            least = (workers + 1) * PROCESS_BYTES + workers * 64 * 2 ** 20
            if self.memory < least:
                raise InputError(f"a memory budget of {self.memory / 2 ** 20:.0f} MB is too small for {workers} "
                                 f"worker process(es): each process needs about {PROCESS_BYTES // 2 ** 20} MB "
                                 f"before any work; give --memory {math.ceil(least / 2 ** 20)}MB or more, "
                                 f"or fewer workers")

    @property
    def box_memory(self) -> int:
        """Budget of one process holding one box."""
        if self.cluster or not self.workers:
            return self.memory
        # the writing process and every worker hold a process's own memory; workers a box each
        return int((self.memory - PROCESS_BYTES) / self.workers)

    def chunked(self, path, method: str, multipliers: bool) -> bool:
        """Boxes needed for the field in ``path``? (reads only the header)"""
        if self.workers or self.cluster:
            return True
        import netCDF4

        from .field import check_readable

        with netCDF4.Dataset(check_readable(path)) as nc:
            cells = math.prod(len(nc.dimensions[d]) for d in DIMS if d in nc.dimensions)
        per_cell = IN_MEMORY_BYTES_PER_CELL["flow" if ("flow" in str(method) or multipliers) else "static"]
        return PROCESS_BYTES + cells * per_cell > self.memory

    def open(self, path) -> xr.Dataset:
        """Open a field lazily in slabs along x small enough for the checks to stay in
        budget (about 1/32 of it per variable) and no thicker than the file's own chunks."""
        import netCDF4

        from .field import check_readable, open_field

        with netCDF4.Dataset(check_readable(path)) as nc:
            sizes = {d: len(nc.dimensions[d]) for d in DIMS if d in nc.dimensions}
            name = next((n for n in ("kx", "k") if n in nc.variables), None)
            chunking = nc[name].chunking() if name else "contiguous"
            dims = nc[name].dimensions if name else ()
        # a box reads whole chunks: keep them as thin as the file's own (or a few layers)
        native = chunking[dims.index("x")] if isinstance(chunking, list) and "x" in dims else CONTIGUOUS_LAYERS
        layer = 8 * math.prod(sizes.get(d, 1) for d in ("y", "z"))
        slab = max(min(int(self.box_memory // 32 // max(layer, 1)), native), 1)
        return open_field(path, chunks={"x": min(slab, sizes.get("x", 1)), "y": -1, "z": -1})


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

    from .coarse_grid import block_variables
    from .field import FineArrays

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
        cells = FineArrays(dx=dx, dy=dy, **{n: np.asarray(v, dtype=v.dtype) for n, v in values.items()})
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
    from .coarse_grid import block_variable_names

    def shape(name: str, index) -> tuple[int, int, int]:
        sizes = [boxes[a][i].stop - boxes[a][i].start for a, i in enumerate(index)]
        if name.endswith("_flow"):
            axis = AXES.index(name[1])
            if boxes[axis][index[axis]].stop == partition.shape[axis]:
                sizes[axis] -= 1
        return tuple(sizes)

    return block_variable_names(recipe), shape


# ----------------------------------------------------------------------------- running

@contextmanager
def cluster(workers: int | None = None, scheduler: str | None = None):
    """The dask.distributed client for the duration: ``scheduler`` (address of a running
    cluster) or ``workers`` local processes; neither: no client (boxes run here, one at
    a time, the kernel using every core)."""
    import logging

    if not scheduler and workers is None:
        yield None
        return
    from distributed import Client, LocalCluster

    logging.getLogger("distributed").setLevel(logging.ERROR)
    if scheduler:
        try:
            client = Client(scheduler, timeout="20s")
        except (OSError, TimeoutError) as exc:
            raise InputError(f"cannot reach the dask scheduler at {scheduler} ({exc}); "
                             f"start one (dask scheduler) or check the address") from None
        with client:
            yield client
        return
    if workers < 1:
        raise InputError(f"--workers must be at least 1, got {workers}")
    previous = os.environ.get("NUMBA_NUM_THREADS")
    # each worker's kernel gets its share of the cores (read when the worker imports numba)
    os.environ["NUMBA_NUM_THREADS"] = str(max((os.cpu_count() or 1) // workers, 1))
    try:
        local = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, memory_limit=0,
                             dashboard_address=None, silence_logs=logging.ERROR)
    finally:
        if previous is None:
            os.environ.pop("NUMBA_NUM_THREADS", None)
        else:
            os.environ["NUMBA_NUM_THREADS"] = previous
    with local, Client(local) as client:
        yield client


@contextmanager
def _file_access():
    """Around every call into the NetCDF library here: Ctrl-C held back until it returns
    (:func:`upscale.field.interrupt_after`), and the lock xarray takes for its own reads,
    since HDF5 is not thread-safe and an in-process worker may be reading the input."""
    from xarray.backends.netCDF4_ import NETCDF4_PYTHON_LOCK

    with interrupt_after(), NETCDF4_PYTHON_LOCK:
        yield


def _active_client():
    try:
        from distributed import get_client

        return get_client()
    except (ImportError, ValueError):
        return None


def _axis_of(dim: str) -> int:
    return AXES.index(dim.split("_")[0])


def stream_write(ds: xr.Dataset, path, progress=None) -> None:
    """Write a dataset whose variables may be dask arrays to NetCDF at ``path``, box by
    box: the pieces of all variables that belong to one box are written by one task as
    soon as they are computed, then dropped. The graph runs on threads of this process;
    the heavy box tasks inside it go to the active dask.distributed client, if any
    (:func:`_run_graph`). Permeabilities are checked for NaN, infinite or negative values
    in active cells before each piece is written. ``progress`` receives 1 per box."""
    import dask
    import netCDF4
    from dask.callbacks import Callback

    lazy = {n: v for n, v in ds.variables.items() if v.chunks is not None}
    groups: dict[tuple, list] = {}
    for name, var in lazy.items():
        starts = [np.concatenate([[0], np.cumsum(c)[:-1]]) for c in var.chunks]
        blocks = var.data.to_delayed(optimize_graph=False)
        for index, key in _box_keys(var):
            region = tuple((int(s[i]), int(s[i]) + int(c[i])) for s, c, i in zip(starts, var.chunks, index))
            groups.setdefault(key, []).append((name, region, blocks[index]))
    with _file_access():
        handle = netCDF4.Dataset(path, "w", format="NETCDF4")

    def store(places, *pieces):
        written = dict(zip(places, pieces))
        _check_pieces(written, ds, path)
        with _file_access():
            for (name, region), piece in written.items():
                if piece.size:
                    handle[name][tuple(slice(*r) for r in region)] = piece
        return len(pieces)

    stores = [dask.delayed(store, pure=False, name=f"store-box-{'-'.join(map(str, key))}")(
        [(n, r) for n, r, _ in groups[key]], *[b for _, _, b in groups[key]]) for key in sorted(groups)]

    class Progress(Callback):
        def _posttask(self, key, result, dsk, state, worker_id):
            if progress is not None and str(key).startswith("store-box-"):
                progress(1)

    try:
        with _file_access():
            _define(handle, ds)
            for name, var in ds.variables.items():
                if name not in lazy:
                    handle[name][...] = np.asarray(var.values)
        with Progress():
            dask.compute(*stores, scheduler="threads", num_workers=_threads())
    finally:
        with _file_access():
            handle.close()


def _threads() -> int:
    """Threads of the writing process: enough to keep every worker of the active
    distributed client busy, at least two (reading and computing overlap)."""
    client = _active_client()
    workers = len(client.scheduler_info()["workers"]) if client is not None else 1
    return max(2, 2 * workers)


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
    client = _active_client()
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
            keys.update(key for _, key in _box_keys(var))
    return len(keys)


def _box_keys(var: xr.Variable):
    """(chunk index, box key) of every chunk of a dask-backed variable; the key counts
    chunks along x, y, z (face dimensions such as x_face count with their axis), 0 on
    axes the variable lacks, so the pieces of one box share a key."""
    for index in np.ndindex(*[len(c) for c in var.chunks]):
        key = [0, 0, 0]
        for dim, i in zip(var.dims, index):
            key[_axis_of(dim)] = i
        yield index, tuple(key)


def _check_pieces(written: dict, ds: xr.Dataset, path) -> None:
    """Refuse NaN, infinite or negative permeability in active cells of one box."""
    active = {r: p for (n, r), p in written.items() if n == "active"}
    for (name, region), piece in written.items():
        if name not in PERMEABILITY or ds[name].dims != DIMS:
            continue
        flags = active.get(region)
        mask = ~(np.isfinite(piece) & (piece >= 0))
        if flags is not None:
            mask &= flags.astype(bool)
        if mask.any():
            first = np.argwhere(mask)[0] + [start for start, _ in region]
            at = ", ".join(f"{d}={i}" for d, i in zip(DIMS, first))
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
