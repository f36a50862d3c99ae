"""The diagonal-flow check against an independent two-point solve written here, and its
floor against the homogeneous case."""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla

import upscale
from helpers import lognormal
from upscale.checks.diagonal import diagonal_check
from upscale.core.partition import make_partition
from upscale.core.patch_flows import PATCH_FLOWS, patch_blocks, patch_masks
from upscale.io.schema import fine_dataset


def patch_rate_by_hand(kx, ky, kz, dx, dy, dz, flow, low, high):
    """Rate of a patch-to-patch flow: two-point fluxes (harmonic pair of half-cell
    transmissibilities 2 k V / l^2), pressure 1 through the half cells of the low patch,
    0 through those of the high patch, no flow elsewhere; scipy's sparse LU."""
    shape = kx.shape
    k = (kx, ky, kz)
    volume = dx[:, None, None] * dy[None, :, None] * dz
    lengths = (np.broadcast_to(dx[:, None, None], shape), np.broadcast_to(dy[None, :, None], shape), dz)
    half = [2 * k[a] * volume / lengths[a] ** 2 for a in range(3)]
    n = kx.size
    index = np.arange(n).reshape(shape)
    rows, cols, vals = [], [], []
    diagonal = np.zeros(n)
    for a in range(3):
        m = shape[a]
        h1, h2 = np.take(half[a], range(m - 1), axis=a), np.take(half[a], range(1, m), axis=a)
        t = (h1 * h2 / (h1 + h2)).ravel()
        i, j = np.take(index, range(m - 1), axis=a).ravel(), np.take(index, range(1, m), axis=a).ravel()
        rows += [i, j]
        cols += [j, i]
        vals += [-t, -t]
        np.add.at(diagonal, i, t)
        np.add.at(diagonal, j, t)
    b = np.zeros(n)
    ends = {}
    for side, mask, pressure in ((0, low, 1.0), (shape[flow] - 1, high, 0.0)):
        cells = np.take(index, [side], axis=flow)[mask]
        h = np.take(half[flow], [side], axis=flow)[mask]
        np.add.at(diagonal, cells, h)
        np.add.at(b, cells, h * pressure)
        ends[side] = (cells, h)
    A = sp.csc_matrix((np.concatenate(vals + [diagonal]), (np.concatenate(rows + [np.arange(n)]),
                                                            np.concatenate(cols + [np.arange(n)]))), shape=(n, n))
    p = spla.spsolve(A, b)
    cells, h = ends[0]
    return float((h * (1.0 - p[cells])).sum())


def test_patch_blocks_are_whole_blocks_and_never_empty():
    assert patch_blocks(8, "first", 0.25) == slice(0, 2)
    assert patch_blocks(8, "last", 0.25) == slice(6, 8)
    assert patch_blocks(1, "last", 0.25) == slice(0, 1)
    assert patch_blocks(3, "first", 1 / 3) == slice(0, 1)


def test_diagonal_rates_equal_an_independent_two_point_solve():
    shape = (8, 8, 6)
    kx = 20.0 * lognormal(shape, 1.5, seed=2)
    ky, kz = 0.5 * kx, 0.1 * kx
    dx, dy = np.linspace(8.0, 12.0, 8), np.full(8, 10.0)
    dz = np.random.default_rng(3).uniform(0.5, 2.0, shape)
    fine = fine_dataset(kx, ky, kz, np.full(shape, 0.2), dx, dy, dz)
    coarse = upscale.coarsen(fine, ratio=(2, 2, 2), method="flow", bc="sealed", multipliers=True)
    result = diagonal_check(fine, coarse)
    partition = make_partition(shape, ratio=(2, 2, 2))
    for flow in PATCH_FLOWS:
        (low, high), _ = patch_masks(partition, flow)
        expected = patch_rate_by_hand(kx, ky, kz, dx, dy, dz, flow.axis, low, high)
        assert result[flow.name]["fine_rate"] == pytest.approx(expected, rel=1e-8)
        assert result[flow.name]["relative_error"] == pytest.approx(
            result[flow.name]["coarse_rate"] / expected - 1.0, rel=1e-6, abs=1e-9)


def test_on_a_homogeneous_field_the_error_is_the_floor():
    # Upscaling a homogeneous field is exact, so the coarse grid's whole error on a
    # diagonal flow is what the coarse grid cannot resolve: exactly its floor.
    shape = (12, 12, 6)
    fine = fine_dataset(np.full(shape, 40.0), np.full(shape, 40.0), np.full(shape, 4.0), np.full(shape, 0.2),
                        np.full(12, 10.0), np.full(12, 10.0), np.full(6, 2.0))
    coarse = upscale.coarsen(fine, ratio=(3, 3, 2), method="arithmetic")
    for name, d in diagonal_check(fine, coarse).items():
        assert d["relative_error"] == pytest.approx(d["floor"], abs=1e-9), name
        # The coarse grid cannot follow the flow crowding at the patch edges: it carries less
        # (seen on every grid tried here; common practice expects it, no single source).
        assert d["floor"] < 0
        assert abs(d["above_floor"]) < 1e-9
