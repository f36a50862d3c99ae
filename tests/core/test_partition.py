"""Partitions by hand: block sums, sub-boxes and windows, descriptions, local-domain
groups and the refusals of bad ratios, edges and ranges. Every expected value is counted
out on a small grid in the comments (no source needed: plain bookkeeping)."""

import numpy as np
import pytest

from upscale.core.partition import block_groups, make_partition, partition_from_ranges
from upscale.errors import InputError


def _values(shape):
    return np.arange(np.prod(shape), dtype=float).reshape(shape)


def test_sums_along_lines_and_across_and_back_to_the_fine_grid():
    # 5 x 3 x 2 cells, blocks of 2 x 2 x 2 (remainders 1 along x and y): sums by np.sum on slices.
    shape = (5, 3, 2)
    p = make_partition(shape, ratio=(2, 2, 2))
    v = _values(shape)
    cuts = [[slice(0, 2), slice(2, 4), slice(4, 5)], [slice(0, 2), slice(2, 3)], [slice(0, 2)]]
    blocks = np.array([[[v[a, b, c].sum() for c in cuts[2]] for b in cuts[1]] for a in cuts[0]])
    np.testing.assert_array_equal(p.block_sum(v), blocks)
    line = np.stack([v[s].sum(axis=0) for s in cuts[0]])              # coarse along x, fine across
    np.testing.assert_array_equal(p.line_sum(v, 0), line)
    across = np.stack([np.stack([v[:, b][:, :, c].sum(axis=(1, 2)) for c in cuts[2]], axis=-1)
                       for b in cuts[1]], axis=1)                      # fine along x, coarse across
    np.testing.assert_array_equal(p.cross_sum(v, 0), across)
    coarse = np.arange(6).reshape(3, 2, 1)
    fine = p.expand(coarse)
    assert fine.shape == shape
    assert fine[4, 2, 1] == coarse[2, 1, 0] and fine[1, 1, 0] == coarse[0, 0, 0] and fine[3, 2, 0] == coarse[1, 1, 0]
    np.testing.assert_array_equal(p.sizes(0), [2, 2, 1])
    assert p.fine_shape == shape and p.shape == (3, 2, 1)


def test_describe_names_ratios_remainders_and_edges():
    p = make_partition((5, 4, 6), ratio=(2, 2, 1), edges={"z": [0, 2, 6]})
    assert p.describe() == {"x": "ratio 2 (last block has 1 cells: remainder)", "y": "ratio 2", "z": "edges 0 2 6"}


def test_crop_and_window_of_a_box_of_blocks():
    # Edges along x 0 2 4 6 8 9; the box of blocks 1..2 (fine 2..6) crops to edges 0 2 4.
    p = make_partition((9, 4, 3), ratio=(2, 2, 3))
    box = (slice(1, 3), slice(1, 2), slice(0, 1))
    crop = p.crop(box)
    assert [e.tolist() for e in crop.edges] == [[0, 2, 4], [0, 2], [0, 3]]
    assert crop.ratio == p.ratio
    # Widened by 1 cell below and 3 above along x (fine 1..9: 9 is the grid's end), 1 each
    # way along y (fine 1..4 clipped at 4): the widening cells form partial blocks.
    fine, window, inner = p.window(box, low=(1, 1, 0), high=(3, 1, 0))
    assert fine == (slice(1, 9), slice(1, 4), slice(0, 3))
    assert [e.tolist() for e in window.edges] == [[0, 1, 3, 5, 7, 8], [0, 1, 3], [0, 3]]
    assert inner == (slice(1, 3), slice(1, 2), slice(0, 1))
    # Without widening the window is the box itself.
    fine, window, inner = p.window(box, low=(0, 0, 0), high=(0, 0, 0))
    assert fine == (slice(2, 6), slice(2, 4), slice(0, 3))
    assert [e.tolist() for e in window.edges] == [[0, 2, 4], [0, 2], [0, 3]]
    assert inner == (slice(0, 2), slice(0, 1), slice(0, 1))


def test_block_groups_local_domains_by_hand():
    # 7 cells along x in blocks of 3 (edges 0 3 6 7), border 1: domains [0, 4), [2, 7), [5, 7)
    # (clipped), i.e. three shapes; the block sits at 0, 1 and 1 in them.
    p = make_partition((7, 2, 2), ratio=(3, 2, 2))
    groups = block_groups(p, border=1)
    found = sorted((int(g.blocks[0][0]), int(g.starts[0][0]), g.shape, g.target) for g in groups)
    assert found == [(0, 0, (4, 2, 2), (slice(0, 3), slice(0, 2), slice(0, 2))),
                     (1, 2, (5, 2, 2), (slice(1, 4), slice(0, 2), slice(0, 2))),
                     (2, 5, (2, 2, 2), (slice(1, 2), slice(0, 2), slice(0, 2)))]
    # Face problems (extend 1 along x): blocks 0 and 1 joined to the next one, no border.
    groups = block_groups(p, extend=(1, 0, 0))
    found = sorted((int(b), g.shape, g.neighbour[0]) for g in groups for b in g.blocks[0])
    assert found == [(0, (6, 2, 2), slice(3, 6)), (1, (4, 2, 2), slice(3, 4))]
    # Gathered copies: the domain of block 1 holds fine cells 2..6 of a line.
    dx = np.arange(10.0, 17.0)
    group = next(g for g in block_groups(p, border=1) if g.blocks[0][0] == 1)
    np.testing.assert_array_equal(group.gather_line(dx, 0), [[12.0, 13.0, 14.0, 15.0, 16.0]])
    v = _values((7, 2, 2))
    np.testing.assert_array_equal(group.gather(v)[0], v[2:7])
    coarse = np.zeros(p.shape)
    group.scatter(coarse, np.array([5.0]))
    assert coarse[1, 0, 0] == 5.0 and coarse.sum() == 5.0
    only = block_groups(p, border=0, only=(np.array([2]), None, None))
    assert [(g.blocks[0].tolist(), g.shape) for g in only] == [([2], (1, 2, 2))]
    with pytest.raises(InputError, match="^border must be a whole number of fine cells >= 0, got -1$"):
        block_groups(p, border=-1)
    with pytest.raises(InputError, match="^border must be a whole number of fine cells >= 0, got 1.5$"):
        block_groups(p, border=1.5)


def test_refusals_name_the_axis_and_the_value():
    shape = (4, 5, 6)
    refused = [
        (dict(ratio=(2, 2)), r"^ratio must have three values \(x, y, z\), got 2$"),
        (dict(ratio=(2, 0, 1)), "^ratio along y is 0; it must be a whole number >= 1$"),
        (dict(ratio=(1.5, 1, 1)), "^ratio along x is 1.5; it must be a whole number >= 1$"),
        (dict(ratio=(1, 1, 7)), r"^ratio along z is 7, larger than the grid \(6 cells along z\)$"),
        (dict(edges={"w": [0, 1]}), r"^edges given for unknown axis \['w'\]; use x, y or z$"),
        (dict(edges={"y": [0, 2.5]}), r"^edges along y must be whole fine-cell indices, got \[0, 2.5\]$"),
        (dict(edges={"y": []}), r"^edges along y must be whole fine-cell indices, got \[\]$"),
        (dict(edges={"z": [0, 7]}), r"^edges along z must lie in 0..6, got \[0, 7\]$"),
        (dict(edges={"z": [-1, 3]}), r"^edges along z must lie in 0..6, got \[-1, 3\]$"),
        (dict(edges={"x": [0, 2, 2]}), r"^edges along x must be strictly increasing, got \[0, 2, 2\]$"),
    ]
    for kwargs, message in refused:
        with pytest.raises(InputError, match=message):
            make_partition(shape, **kwargs)
    # accepted at the limits: ratio equal to the size, edges 0 and n given or added
    assert make_partition(shape, ratio=(4, 5, 6)).shape == (1, 1, 1)
    assert make_partition(shape, edges={"z": [6]}).edges[2].tolist() == [0, 6]
    assert make_partition(shape, edges={"z": [0]}).edges[2].tolist() == [0, 6]
    assert make_partition(shape, edges={"x": (1, 3)}).edges[0].tolist() == [0, 1, 3, 4]


def test_partition_from_ranges_of_a_coarse_file():
    p = partition_from_ranges(([0, 2, 4], [0], [0, 1]), ([2, 4, 5], [3], [1, 6]))
    assert [e.tolist() for e in p.edges] == [[0, 2, 4, 5], [0, 3], [0, 1, 6]]
    assert p.ratio == (None, None, None)
    # ranges read back as floats (a file's packed or converted integers) still give index edges
    p = partition_from_ranges(([0.0, 2.0], [0.0], [0.0]), ([2.0, 3.0], [2.0], [1.0]))
    assert all(e.dtype.kind == "i" for e in p.edges)
    np.testing.assert_array_equal(p.block_sum(np.ones((3, 2, 1))).ravel(), [4.0, 2.0])
    for starts, stops in ((([1, 2], [0], [0]), ([2, 3], [1], [1])),     # not from 0
                          (([0, 3], [0], [0]), ([2, 4], [1], [1])),     # a gap
                          (([0, 2], [0], [0]), ([2, 2], [1], [1])),     # an empty block
                          (([], [0], [0]), ([], [1], [1]))):
        with pytest.raises(InputError, match="^x_start/x_stop do not describe contiguous blocks from index 0$"):
            partition_from_ranges(starts, stops)
    with pytest.raises(InputError, match="^z_start/z_stop"):
        partition_from_ranges(([0], [0], [1]), ([1], [1], [2]))
