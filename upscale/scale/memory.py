"""Memory budgets: parsing sizes, and the plan that decides between in memory and boxes."""

from __future__ import annotations

import math
import re

import xarray as xr

from .._runtime import available_memory
from ..core.grid import AXES
from ..errors import InputError

#: bytes one fine cell of a box costs while its task runs: window arrays, normalisation,
#: local systems, and the halo chunks dask holds around them
BOX_BYTES_PER_CELL = 800


#: memory one process needs before any box: python, numpy, numba, xarray, dask
PROCESS_BYTES = 300 * 2 ** 20


UNITS = {"": 1, "b": 1, "k": 2 ** 10, "kb": 2 ** 10, "m": 2 ** 20, "mb": 2 ** 20, "g": 2 ** 30, "gb": 2 ** 30,
         "t": 2 ** 40, "tb": 2 ** 40}


def parse_memory(text: str) -> int:
    """Bytes in a memory size.

    Parameters
    ----------
    text : str
        A size such as ``2GB``, ``800MB``, ``1.5g`` (binary units; plain numbers are bytes).

    Returns
    -------
    int
        Bytes; refused (InputError) when not understood or too small for one process.
    """
    match = re.fullmatch(r"\s*([0-9]*\.?[0-9]+)\s*([a-zA-Z]*)\s*", str(text))
    unit = match.group(2).lower() if match else None
    if match is None or unit not in UNITS:
        raise InputError(f"memory size {text!r} is not understood; write e.g. 2GB, 800MB or 1.5G")
    value = float(match.group(1)) * UNITS[unit]
    if value < PROCESS_BYTES + 64 * 2 ** 20:
        raise InputError(f"memory size {text!r} is too small: one process needs about "
                         f"{(PROCESS_BYTES + 64 * 2 ** 20) // 2 ** 20} MB")
    return int(value)


def default_memory() -> int:
    """The budget when none is given.

    Returns
    -------
    int
        Half the memory available now, bytes.
    """
    return available_memory() // 2


#: layers along x per chunk when a file is stored contiguously (not in chunks)
CONTIGUOUS_LAYERS = 4


#: largest stored (HDF5) chunk the box writer makes: boxes read whole stored chunks
STORED_CHUNK_BYTES = 8 * 2 ** 20


#: bytes per fine cell of an in-memory run (the field, its checked copy, the solves), for
#: static averages and for flow upscaling or multipliers
IN_MEMORY_BYTES_PER_CELL = {"static": 250, "flow": 600}


def box_cells(memory: int) -> int:
    """Fine cells per box (window) for a memory budget.

    Parameters
    ----------
    memory : int
        Budget of one process holding one box, bytes.

    Returns
    -------
    int
        Cells such that the process stays within ``memory``; at least 1.
    """
    return max(int((memory - PROCESS_BYTES) // BOX_BYTES_PER_CELL), 1)


class MemoryPlan:
    """How a command fits its memory budget: in memory when the field fits, else in boxes.

    Parameters
    ----------
    memory : int or None
        Budget of the whole run, bytes (of each worker on a cluster); None:
        :func:`default_memory`.
    workers : int, optional
        Local worker processes; with them, always boxes.
    cluster : bool
        Boxes run on a running cluster; always boxes.
    """

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
        """Budget of one process holding one box, bytes."""
        if self.cluster or not self.workers:
            return self.memory
        # the writing process and every worker hold a process's own memory; workers a box each
        return int((self.memory - PROCESS_BYTES) / self.workers)

    def chunked(self, path, method: str, multipliers: bool) -> bool:
        """Whether the field needs boxes.

        Parameters
        ----------
        path : str or os.PathLike
            The field file; only its header is read.
        method : str
            The upscaling method(s), e.g. "flow" or "arithmetic,arithmetic,harmonic".
        multipliers : bool
            Whether multipliers are computed.

        Returns
        -------
        bool
            True with workers or a cluster, or when an in-memory run would exceed the budget.
        """
        if self.workers or self.cluster:
            return True
        from ..io.reading import grid_sizes

        cells = math.prod(grid_sizes(path).values())
        per_cell = IN_MEMORY_BYTES_PER_CELL["flow" if ("flow" in str(method) or multipliers) else "static"]
        return PROCESS_BYTES + cells * per_cell > self.memory

    def open(self, path) -> xr.Dataset:
        """Open a field lazily in slabs along x.

        Parameters
        ----------
        path : str or os.PathLike
            The field file.

        Returns
        -------
        xarray.Dataset
            The normalised field (:func:`~upscale.io.reading.open_field`), chunked in slabs
            small enough for the checks to stay in budget (about 1/32 of it per variable)
            and no thicker than the file's own chunks.
        """
        import netCDF4

        from ..io.reading import check_readable, open_field

        with netCDF4.Dataset(check_readable(path)) as nc:
            sizes = {d: len(nc.dimensions[d]) for d in AXES if d in nc.dimensions}
            name = next((n for n in ("kx", "k") if n in nc.variables), None)
            chunking = nc[name].chunking() if name else "contiguous"
            dims = nc[name].dimensions if name else ()
        # a box reads whole chunks: keep them as thin as the file's own (or a few layers)
        native = chunking[dims.index("x")] if isinstance(chunking, list) and "x" in dims else CONTIGUOUS_LAYERS
        layer = 8 * math.prod(sizes.get(d, 1) for d in ("y", "z"))
        slab = max(min(int(self.box_memory // 32 // max(layer, 1)), native), 1)
        return open_field(path, chunks={"x": min(slab, sizes.get("x", 1)), "y": -1, "z": -1})
