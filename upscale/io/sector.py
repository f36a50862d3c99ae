"""Sectors of a model: a window of whole coarse blocks, read on its own.

A sector is given in fine indices, ``X0:X1,Y0:Y1,Z0:Z1`` (half-open; an empty bound means
the grid's edge). It must lie on coarse block edges so that the coarse grid's sector is
made of whole blocks; a window that cuts a block is refused with the nearest valid one.
The fine sector is read from the file alone (lazily opened, only the window loaded), the
coarse sector cut from the coarse grid with its interior faces, and both are checked as a
model of their own (no-flow sides).
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from ..core.grid import AXES
from ..errors import InputError
from .coarse_file import coarse_partition


def parse_window(text: str, shape) -> tuple[slice, slice, slice]:
    """Fine-index slices of a window ``X0:X1,Y0:Y1,Z0:Z1`` on a grid of ``shape``.

    >>> parse_window("0:10,:,4:", (20, 8, 6))
    (slice(0, 10, None), slice(0, 8, None), slice(4, 6, None))
    """
    parts = str(text).split(",")
    if len(parts) != 3 or any(p.count(":") != 1 for p in parts):
        raise InputError(f"--window {text!r}: give X0:X1,Y0:Y1,Z0:Z1 (fine indices, half-open), e.g. 0:100,0:100,:")
    out = []
    for name, part, n in zip(AXES, parts, shape):
        low, high = part.split(":")
        try:
            start, stop = int(low) if low.strip() else 0, int(high) if high.strip() else int(n)
        except ValueError:
            raise InputError(f"--window {text!r}: the bounds along {name} are not whole numbers") from None
        if not 0 <= start < stop <= n:
            raise InputError(f"--window {text!r}: along {name} the window must lie in 0..{n} with start < stop")
        out.append(slice(start, stop))
    return tuple(out)


def block_window(window, coarse: xr.Dataset) -> tuple[slice, slice, slice]:
    """The coarse blocks of a fine ``window`` that lies on block edges; InputError naming
    the nearest window on block edges otherwise."""
    partition = coarse_partition(coarse)
    blocks, nearest, cut = [], [], False
    for edges, part in zip(partition.edges, window):
        low, high = (int(np.argmin(np.abs(edges - v))) for v in (part.start, part.stop))
        high = max(high, low + 1)
        cut |= edges[low] != part.start or edges[high] != part.stop
        blocks.append(slice(low, high))
        nearest.append(f"{int(edges[low])}:{int(edges[high])}")
    if cut:
        raise InputError(f"--window cuts coarse blocks: a sector must be made of whole blocks; the nearest is "
                         f"--window {','.join(nearest)}")
    return tuple(blocks)


def coarse_sector(coarse: xr.Dataset, blocks: tuple[slice, slice, slice]) -> xr.Dataset:
    """The coarse grid's sector of ``blocks``: its cells, the faces between them, and
    fine-index ranges counted from the sector's first fine cell."""
    select = {name: b for name, b in zip(AXES, blocks)}
    select.update({f"{name}_face": slice(b.start, b.stop - 1) for name, b in zip(AXES, blocks)})
    sector = coarse.isel({k: v for k, v in select.items() if k in coarse.dims})
    for name in AXES:
        first = int(sector[f"{name}_start"].values[0])
        for end in ("start", "stop"):
            sector[f"{name}_{end}"] = sector[f"{name}_{end}"] - first
    sector.attrs["fine_shape"] = " ".join(str(int(sector[f"{n}_stop"].values[-1])) for n in AXES)
    return sector


def describe(window) -> str:
    """The window as text, ``x 0:10, y 0:8, z 4:6``."""
    return ", ".join(f"{name} {w.start}:{w.stop}" for name, w in zip(AXES, window))
