"""The global stage of local-global upscaling for a field coarsened in boxes.

The coarse model of every pass is small and solved here; the fine face regions are
solved box by box, each box's task reading its window (the box's blocks and two blocks
around them, enough for the face regions after its blocks and the interpolation of
their boundary pressures) and returning the fluxes of the faces it owns. The tasks run
like the boxes of the local stage: here, one at a time, or on the active dask.distributed
client. The answer equals an in-memory run to round-off.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from ..core.grid import GridArrays
from ..core.local_global import FaceRegions, Frame
from ..core.partition import Partition
from ..core.upscaling import Recipe, global_stage
from ..io.schema import pinch_connections
from .boxes import _pack, _run_graph, lazy_block_variables, plan_boxes
from .memory import box_cells, default_memory

#: whole blocks a global window reaches beyond its box on every side
MARGIN_BLOCKS = 2


def global_in_boxes(fine: xr.Dataset, partition: Partition, recipe: Recipe, memory: int | None = None,
                    box=None) -> tuple[dict, object]:
    """The coarse variables of a lazy field with the global stage applied, and its report.

    Parameters
    ----------
    fine : xarray.Dataset
        A normalised, dask-backed field.
    partition : Partition
        The coarse blocks.
    recipe : Recipe
        With ``global_options`` (local-global: ``solves`` 'coarse').
    memory : int, optional
        Budget of one process holding one box, bytes.
    box : tuple of int, optional
        Coarse blocks per box of the local stage.

    Returns
    -------
    variables : dict of ndarray
        As :func:`upscale.core.upscaling.block_variables` for the whole grid.
    report : GlobalReport
    """
    import dask

    lazy = lazy_block_variables(fine, partition, recipe, memory, box)
    variables = dict(zip(lazy, dask.compute(*lazy.values())))
    measure = BoxMeasure(fine, partition, recipe.global_options.ring, default_memory() if memory is None else memory)
    lines = tuple(np.asarray(fine[n].values, dtype=float) for n in ("dx", "dy"))
    return variables, global_stage(None, partition, variables, recipe, measure=measure, lines=lines,
                                   pinch_connections=pinch_connections(fine))


class BoxMeasure:
    """``measure(pressures, solved)`` of the global stage, box by box."""

    def __init__(self, fine: xr.Dataset, partition: Partition, ring: int, memory: int):
        self.fine, self.partition, self.ring = fine, partition, ring
        margin = [int(partition.sizes(a).max()) * MARGIN_BLOCKS for a in range(3)]
        self.boxes = plan_boxes(partition, (tuple(margin), tuple(margin)), box_cells(memory))
        self.budget = max(min(box_cells(memory) * 100, 256 * 2 ** 20), 16 * 2 ** 20)

    def __call__(self, pressures, solved):
        import dask

        tasks = [dask.delayed(_run_graph, pure=True)(_pack(self._task(index, pressures, solved)))
                 for index in np.ndindex(*[len(b) for b in self.boxes])]
        results = dask.compute(*tasks, scheduler="threads")
        total = results[0]
        for measured in results[1:]:
            total = total + measured
        return total

    def _task(self, index, pressures, solved):
        """The delayed task of one box: its window's cells, frame and face regions."""
        import dask

        blocks = [self.boxes[a][i] for a, i in enumerate(index)]
        window = [slice(max(b.start - MARGIN_BLOCKS, 0), min(b.stop + MARGIN_BLOCKS, n))
                  for b, n in zip(blocks, self.partition.shape)]
        cells = tuple(slice(int(e[w.start]), int(e[w.stop])) for e, w in zip(self.partition.edges, window))
        values = {n: self.fine[n].data[cells] for n in ("dz", "kx", "ky", "kz", "porosity", "ntg", "active")}
        frame = Frame(tuple(c.start for c in cells), tuple(w.start for w in window), self.partition,
                      tuple(np.arange(b.start - w.start, b.stop - w.start) for b, w in zip(blocks, window)))
        dx, dy = (np.asarray(self.fine[n].values[c], dtype=float) for n, c in (("dx", cells[0]), ("dy", cells[1])))
        return dask.delayed(_box_measure, pure=True)(dx, dy, self.partition.crop(tuple(window)), frame, self.ring,
                                                     self.budget, pressures, solved, pinch_connections(self.fine),
                                                     **values)


def _box_measure(dx, dy, window_partition, frame, ring, budget, pressures, solved, pinch: bool, **values):
    """One box: the face regions after its owned blocks, measured under the coarse pressures
    (``pinch``: with pinch-out connections)."""
    values["active"] = np.asarray(values["active"]).astype(bool)
    cells = GridArrays(dx=dx, dy=dy, pinch_connections=pinch,
                       **{n: np.asarray(v, dtype=v.dtype) for n, v in values.items()})
    return FaceRegions(cells, window_partition, ring, budget, frame).measure(pressures, solved)
