"""Diagonal flows: constant pressure on a patch of one model face against a patch of the
opposite face, no flow elsewhere.

The axis flows (a whole face against the opposite face) are what flow-based and
local-global upscaling are built on, so they cannot prove them. A diagonal flow crosses
the model at a slant, through faces of every direction, and so checks the coarse grid on
a flow it was not fitted to. The patches are whole coarse blocks, so that the fine and
the coarse model see the same patch.

A patch covers a share of the blocks along each of the two axes across the face: the
first or the last quarter (or third) of the blocks, at least one block.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .partition import Partition


@dataclass(frozen=True)
class PatchFlow:
    """One diagonal flow: pressure 1 on the ``low`` patch of the low face normal to
    ``axis``, 0 on the ``high`` patch of the high face. A patch maps an axis across the
    face to ('first' | 'last', share of the blocks along it); axes not named are whole."""

    name: str
    axis: int
    low: dict
    high: dict
    description: str


#: the diagonal flows of ``upscale check``
PATCH_FLOWS = (
    PatchFlow("x_quarters_in_y", 0, {1: ("first", 0.25)}, {1: ("last", 0.25)},
              "x- face, first quarter in y, to x+ face, last quarter in y"),
    PatchFlow("x_thirds_in_z", 0, {2: ("first", 1 / 3)}, {2: ("last", 1 / 3)},
              "x- face, upper third, to x+ face, lower third"),
    PatchFlow("y_quarters_in_x", 1, {0: ("first", 0.25)}, {0: ("last", 0.25)},
              "y- face, first quarter in x, to y+ face, last quarter in x"),
    PatchFlow("z_quarters_in_x_and_y", 2, {0: ("first", 0.25), 1: ("first", 0.25)},
              {0: ("last", 0.25), 1: ("last", 0.25)},
              "top face, first quarter in x and y, to bottom face, last quarter in x and y"),
)


def patch_blocks(count: int, side: str, share: float) -> slice:
    """The blocks of a patch along one axis of ``count`` blocks: the first or the last
    ``share`` of them, rounded, at least one.

    >>> patch_blocks(10, "first", 0.25), patch_blocks(10, "last", 0.25), patch_blocks(2, "last", 1 / 3)
    (slice(0, 2, None), slice(8, 10, None), slice(1, 2, None))
    """
    size = max(1, int(round(share * count)))
    return slice(0, size) if side == "first" else slice(count - size, count)


def patch_masks(partition: Partition, flow: PatchFlow) -> tuple[tuple[np.ndarray, np.ndarray],
                                                                tuple[np.ndarray, np.ndarray]]:
    """Masks of the two patches on the faces normal to ``flow.axis``.

    Parameters
    ----------
    partition : Partition
        The coarse blocks of the fine grid.
    flow : PatchFlow
        The diagonal flow.

    Returns
    -------
    fine : (low, high)
        Boolean masks of the fine face cells, each the face's shape with length 1 along
        the flow axis, e.g. (1, ny, nz) for ``axis`` 0.
    coarse : (low, high)
        The same on the coarse face, e.g. (1, NY, NZ).
    """
    out_fine, out_coarse = [], []
    for patch in (flow.low, flow.high):
        coarse = np.ones(tuple(1 if a == flow.axis else n for a, n in enumerate(partition.shape)), dtype=bool)
        fine = np.ones(tuple(1 if a == flow.axis else n for a, n in enumerate(partition.fine_shape)), dtype=bool)
        for axis, (side, share) in patch.items():
            blocks = patch_blocks(partition.shape[axis], side, share)
            cells = slice(int(partition.edges[axis][blocks.start]), int(partition.edges[axis][blocks.stop]))
            coarse &= _along(coarse.shape, axis, blocks)
            fine &= _along(fine.shape, axis, cells)
        out_fine.append(fine)
        out_coarse.append(coarse)
    return tuple(out_fine), tuple(out_coarse)


def _along(shape: tuple[int, ...], axis: int, part: slice) -> np.ndarray:
    """True on ``part`` along ``axis`` of an array of ``shape``."""
    mask = np.zeros(shape[axis], dtype=bool)
    mask[part] = True
    return mask.reshape(tuple(-1 if a == axis else 1 for a in range(len(shape))))
