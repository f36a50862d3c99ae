"""Local-global and global face transmissibilities (bc="global") against exact results and
an independent solve."""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from hypothesis import given, settings
from hypothesis import strategies as st

import upscale
from helpers import lognormal
from upscale.core.local_global import (PressureField, fit_transmissibility, interpolate, local_face_fluxes,
                                       resistance_lines)
from upscale.core.partition import make_partition
from upscale.io.schema import arrays, fine_dataset
from upscale.io.validation import validate


def field(kx, ky=None, kz=None, sizes=(10.0, 10.0, 1.0)):
    kx = np.asarray(kx, dtype=float)
    ky = kx if ky is None else ky
    kz = kx if kz is None else kz
    nx, ny, nz = kx.shape
    return fine_dataset(kx, ky, kz, np.full(kx.shape, 0.2), np.full(nx, sizes[0]), np.full(ny, sizes[1]),
                        np.full(nz, sizes[2]))


def multipliers(coarse):
    return [coarse[f"t{a}_multiplier"].values for a in "xyz"]


@pytest.mark.parametrize("solves", ["coarse", "fine"])
@pytest.mark.parametrize("border", [0, 1])
def test_homogeneous_anisotropic_field_keeps_the_exact_transmissibilities(solves, border):
    # Homogeneous medium: every coarse face's two-point transmissibility T = k A / L is exact
    # (Bear 1972, uniform flow), so the global stage must leave every multiplier at 1.
    fine = field(np.full((12, 8, 6), 50.0), np.full((12, 8, 6), 20.0), np.full((12, 8, 6), 2.0))
    coarse = upscale.coarsen(fine, ratio=(3, 2, 2), method="flow", bc="global", border=border, global_solves=solves)
    for m in multipliers(coarse):
        np.testing.assert_allclose(m, 1.0, rtol=1e-7)
    # and the coarse k stays the homogeneous value (kx, ky net with ntg = 1)
    np.testing.assert_allclose(coarse["kx"].values, 50.0, rtol=1e-7)
    np.testing.assert_allclose(coarse["kz"].values, 2.0, rtol=1e-7)


@pytest.mark.parametrize("solves", ["coarse", "fine"])
def test_layers_along_x_keep_their_exact_parallel_transmissibilities(solves):
    # Layers parallel to x, a whole period in every coarse block: flow along x is the
    # thickness-weighted arithmetic mean (Bear 1972), exact for the sealed local problems
    # already; the global stage must not move it. Across the layers (z) the series value
    # of the blocks is exact too.
    k = np.empty((8, 4, 8))
    k[:, :, 0::2], k[:, :, 1::2] = 100.0, 1.0
    fine = field(k)
    local = upscale.coarsen(fine, ratio=(2, 2, 4), method="flow", bc="sealed", multipliers=True)
    coarse = upscale.coarsen(fine, ratio=(2, 2, 4), method="flow", bc="global", global_solves=solves)
    np.testing.assert_allclose(coarse["tx"].values * coarse["tx_multiplier"].values, local["tx"].values
                               * local["tx_multiplier"].values, rtol=1e-7)
    arithmetic = 0.5 * (100.0 + 1.0)
    np.testing.assert_allclose(coarse["kx"].values, arithmetic, rtol=1e-7)


def test_fit_uses_the_flow_with_the_largest_drop_or_the_flux_weights():
    q = np.array([[2.0, 0.0], [0.1, 1.0]])
    dp = np.array([[0.5, 1e-9], [-0.01, 0.25]])
    t, no_fit = fit_transmissibility(q, dp, "largest-drop")
    assert t.tolist() == [4.0, 4.0] and not no_fit.any()
    t, _ = fit_transmissibility(q, dp, "flux")
    # face 0: weights 1 and 0.05: (2 * 0.5 + 0.05 * 0.1 * -0.01) / (0.25 + 0.05 * 1e-4)
    assert t[0] == pytest.approx((1.0 - 0.00005) / (0.25 + 0.000005), rel=1e-12)
    _, no_fit = fit_transmissibility(np.array([[1.0]]), np.array([[-0.5]]), "largest-drop")
    assert no_fit.all()  # a negative fit is no fit: the face keeps its local value


def independent_face_flux(cells, partition, pressures, flow, axis, block):
    """The fine flux between ``block`` and the next one along ``axis`` for one flow,
    from a scipy sparse direct solve of the two-block region written here: two-point
    fluxes, Dirichlet boundary pressures from the same interpolation, the flow's own
    conditions where the region meets the model edge."""
    e = partition.edges
    lo = [int(e[a][block[a]]) for a in range(3)]
    hi = [int(e[a][block[a] + 1 + (a == axis)]) for a in range(3)]
    k = [kk[lo[0]:hi[0], lo[1]:hi[1], lo[2]:hi[2]] for kk in cells.flow_permeability()]
    d = [cells.dx[lo[0]:hi[0]], cells.dy[lo[1]:hi[1]], cells.dz[lo[0]:hi[0], lo[1]:hi[1], lo[2]:hi[2]]]
    shape = k[0].shape
    volume = d[0][:, None, None] * d[1][None, :, None] * d[2]
    length = [np.broadcast_to(d[0][:, None, None], shape), np.broadcast_to(d[1][None, :, None], shape), d[2]]
    half = [2 * k[a] * volume / length[a] ** 2 for a in range(3)]
    n = int(np.prod(shape))
    index = np.arange(n).reshape(shape)
    A = sp.lil_matrix((n, n))
    b = np.zeros(n)
    for a in range(3):
        for i in np.ndindex(shape):
            j = list(i)
            j[a] += 1
            if j[a] < shape[a]:
                t = half[a][i] * half[a][tuple(j)] / (half[a][i] + half[a][tuple(j)])
                p, q = index[i], index[tuple(j)]
                A[p, p] += t
                A[q, q] += t
                A[p, q] -= t
                A[q, p] -= t
    field_ = PressureField.of(pressures[flow], partition, flow)
    resistance = resistance_lines(cells)
    fine_shape = cells.shape
    for a in range(3):
        for end in (0, 1):
            at_edge = lo[a] == 0 if end == 0 else hi[a] == fine_shape[a]
            if at_edge and a != flow:
                continue  # no flow through the model's own sides
            layer = 0 if end == 0 else shape[a] - 1
            for i in np.ndindex(shape):
                if i[a] != layer:
                    continue
                cell = np.array([lo[c] + i[c] for c in range(3)])
                point = cell + 0.5
                point[a] = lo[a] if end == 0 else hi[a]
                if at_edge:
                    value = 1.0 if end == 0 else 0.0
                else:
                    value = interpolate(field_, resistance, point[None].astype(float), cell[None])[0]
                A[index[i], index[i]] += half[a][i]
                b[index[i]] += half[a][i] * value
    p = spla.spsolve(A.tocsc(), b).reshape(shape)
    last = int(e[axis][block[axis] + 1]) - lo[axis] - 1
    left = tuple(slice(last, last + 1) if a == axis else slice(0, int(e[a][block[a] + 1]) - lo[a]) for a in range(3))
    right = tuple(slice(last + 1, last + 2) if a == axis else left[a] for a in range(3))
    t = half[axis][left] * half[axis][right] / (half[axis][left] + half[axis][right])
    return float((t * (p[left] - p[right])).sum())


def test_local_face_flux_equals_an_independent_sparse_direct_solve():
    cells = arrays(validate(field(lognormal((9, 6, 4), 1.5, seed=4) * 50.0)))
    partition = make_partition(cells.shape, ratio=(3, 3, 2))
    rng = np.random.default_rng(1)
    # any smooth-ish coarse pressures will do: the comparison is of the local solve itself
    pressures = [np.sort(rng.uniform(0, 1, partition.shape), axis=a)[::1] for a in range(3)]
    pressures = [1.0 - p if a == 0 else p for a, p in enumerate(pressures)]
    measured = local_face_fluxes(cells, partition, pressures)
    for axis, block in [(0, (0, 0, 0)), (0, (1, 1, 1)), (1, (2, 0, 1)), (2, (1, 1, 0))]:
        for flow in range(3):
            expected = independent_face_flux(cells, partition, pressures, flow, axis, block)
            found = measured.faces[axis][(flow,) + block]
            assert found == pytest.approx(expected, rel=1e-9, abs=1e-12 * abs(expected) + 1e-14)


@settings(max_examples=8, deadline=None)
@given(seed=st.integers(0, 10_000), sigma=st.floats(0.5, 2.5))
def test_global_transmissibilities_are_positive_and_do_not_depend_on_which_block_is_first(seed, sigma):
    k = 30.0 * lognormal((8, 6, 4), sigma, seed)
    coarse = upscale.coarsen(field(k), ratio=(2, 2, 2), method="flow", bc="global", passes=3)
    mirrored = upscale.coarsen(field(k[::-1]), ratio=(2, 2, 2), method="flow", bc="global", passes=3)
    for a in "xyz":
        t = coarse[f"t{a}"].values * coarse[f"t{a}_multiplier"].values
        assert np.all(np.isfinite(t)) and np.all(t >= 0)
    # Mirroring the field along x mirrors every face (the x faces in reverse order); the
    # flows along x reverse too, which the fits do not see (q and dP change sign together).
    tx = coarse["tx"].values * coarse["tx_multiplier"].values
    tx_m = mirrored["tx"].values * mirrored["tx_multiplier"].values
    np.testing.assert_allclose(tx_m, tx[::-1], rtol=1e-6)
    rates = [float(v) for v in coarse.attrs["global_rate_change"].split()]
    assert rates[-1] < rates[0] or rates[-1] < 2e-3  # the passes settle


@pytest.mark.parametrize("box", [(1, 2, 1), (2, 1, 2)])
def test_local_global_in_boxes_equals_in_memory(tmp_path, box):
    # The same numbers whatever the boxes: each box solves the faces after its own blocks
    # from its window (the box and two blocks around it), the coarse passes are global.
    k = 30.0 * lognormal((12, 10, 6), 1.5, seed=9)
    path = tmp_path / "f.nc"
    upscale.write(field(k, 0.5 * k, 0.1 * k), path)
    memory = upscale.coarsen(upscale.open_field(path), ratio=(2, 2, 2), bc="global", border=1)
    lazy = upscale.coarsen(upscale.open_field(path, chunks={"x": 4}), ratio=(2, 2, 2), bc="global", border=1,
                           box=box)
    for name in ("kx", "ky", "kz", "tx_multiplier", "ty_multiplier", "tz_multiplier"):
        np.testing.assert_allclose(np.asarray(lazy[name].values), memory[name].values, rtol=1e-9, err_msg=name)
    assert lazy.attrs["global_passes"] == memory.attrs["global_passes"]


def test_global_fit_to_fine_flows_refuses_a_lazy_field_by_name(tmp_path):
    path = tmp_path / "f.nc"
    upscale.write(field(np.full((4, 4, 2), 10.0)), path)
    lazy = upscale.open_field(path, chunks={"x": 2})
    with pytest.raises(upscale.InputError, match="global solves 'fine' need the fine model in memory"):
        upscale.coarsen(lazy, ratio=(2, 2, 1), bc="global", global_solves="fine")
