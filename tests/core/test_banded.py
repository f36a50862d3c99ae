"""The batched banded kernel against SciPy's SuperLU, and the compiled coupling assembly
against a plain loop over the cells written here."""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from hypothesis import given, settings
from hypothesis import strategies as st

from upscale.core.banded import solve_batch, solve_batch_with_lead
from upscale.core.block_problems import LocalDomain, _couplings, _layout


def _grid_systems(shape, nb, seed):
    """Coupling lists of nb random symmetric positive-definite systems on a grid."""
    rng = np.random.default_rng(seed)
    first, second, _, _ = _layout(shape, periodic=False)
    n = int(np.prod(shape))
    values = rng.uniform(0.01, 10.0, (nb, first.size)) ** 2
    diagonal = rng.uniform(0.1, 1.0, (nb, n))
    np.add.at(diagonal, (slice(None), first), values)
    np.add.at(diagonal, (slice(None), second), values)
    return first, second, values, diagonal, rng.standard_normal((nb, 2, n))


@pytest.mark.parametrize("reverse", [False, True])
def test_batched_solve_matches_scipy(reverse):
    # Reference: scipy.sparse.linalg.spsolve (SuperLU) on each system assembled with scipy.
    # 11 systems: one full lane group of 8 and an incomplete one; the band numbering is the
    # natural one or its reverse (positions are not the unknowns' own numbers).
    shape = (3, 4, 2)
    n = 24
    first, second, values, diagonal, rhs = _grid_systems(shape, 11, seed=3)
    position = np.arange(n)[::-1].copy() if reverse else np.arange(n)
    x, residual = solve_batch(first, second, position, values, diagonal, rhs, width=shape[1] * shape[2])
    for b in range(11):
        a = sp.coo_matrix((-values[b], (first, second)), shape=(n, n))
        matrix = (a + a.T + sp.diags(diagonal[b])).tocsc()
        for column in range(2):
            np.testing.assert_allclose(x[b, column], spla.spsolve(matrix, rhs[b, column]), rtol=1e-10, atol=1e-12)
    assert residual.max() <= 1e-12


@pytest.mark.parametrize("differ", [False, True])
@pytest.mark.parametrize("wanted", ["solution", "rates", "rates, other head rhs", "rates, outflow on head"])
def test_leading_system_matches_scipy(differ, wanted):
    # Reference: scipy.sparse.linalg.spsolve (SuperLU) on the leading system assembled on
    # its own: the unknowns at band positions below `lead`, the couplings among them and
    # its own diagonal. With equal diagonals on the first lead - width positions the
    # kernel shares that elimination with the whole system; with `differ` one lane's
    # diagonal differs there, so its lane group factors the leading system alone. With
    # outflow weights only the rates sum(outflow * x) are returned: solved on the last
    # `width` positions alone where the weights sit there and both right-hand sides agree
    # before them ("rates"), else from the whole leading solution (the other two cases).
    shape = (4, 3, 2)
    n, width, lead = 24, 6, 15
    first, second, values, diagonal, rhs = _grid_systems(shape, 11, seed=5)
    rng = np.random.default_rng(6)
    position = np.arange(n)[::-1].copy()
    lead_diagonal = diagonal.copy()
    tail = position >= lead - width
    lead_diagonal[:, tail] += rng.uniform(-0.05, 1.0, (11, int(tail.sum())))
    if differ:
        lead_diagonal[9, np.flatnonzero(position == 0)] += 0.5
    lead_rhs = rng.standard_normal(rhs.shape)
    if wanted != "rates, other head rhs":
        lead_rhs[:, :, ~tail] = rhs[:, :, ~tail]
    inside = rng.permutation(np.flatnonzero(position < lead))  # the leading system's own numbering
    outflow = None
    if wanted != "solution":
        outflow = np.where(position[inside] >= lead - width, rng.uniform(0.5, 2.0, (11, inside.size)), 0.0)
        if wanted == "rates, outflow on head":
            outflow[:, np.argmin(position[inside])] = 1.0
    x, residual, lead_result, residual_lead = solve_batch_with_lead(first, second, position, values, diagonal, rhs,
                                                                    width, inside, lead_diagonal[:, inside],
                                                                    lead_rhs[:, :, inside], outflow)
    for b in range(11):
        a = sp.coo_matrix((-values[b], (first, second)), shape=(n, n))
        matrix = (a + a.T + sp.diags(diagonal[b])).tocsc()
        leading = (a + a.T + sp.diags(lead_diagonal[b])).tocsc()[inside][:, inside]
        for column in range(2):
            np.testing.assert_allclose(x[b, column], spla.spsolve(matrix, rhs[b, column]), rtol=1e-10, atol=1e-12)
            reference = spla.spsolve(leading, lead_rhs[b, column, inside])
            if outflow is None:
                np.testing.assert_allclose(lead_result[b, column], reference, rtol=1e-10, atol=1e-12)
            else:
                np.testing.assert_allclose(lead_result[b, column], outflow[b] @ reference, rtol=1e-10)
    assert max(residual.max(), residual_lead.max()) <= 1e-12
    with pytest.raises(ValueError, match="first band positions"):
        solve_batch_with_lead(first, second, position, values, diagonal, rhs, width, inside[1:],
                              lead_diagonal[:, inside[1:]], lead_rhs[:, :, inside[1:]])


def test_batched_solve_refuses_an_indefinite_system():
    shape = (2, 2, 2)
    first, second, values, diagonal, rhs = _grid_systems(shape, 3, seed=4)
    diagonal[1] = -1.0
    with pytest.raises(FloatingPointError, match="1 local system"):
        solve_batch(first, second, np.arange(8), values, diagonal, rhs, width=4)


def _two_point_couplings(k, lengths, periodic: bool):
    """Independent reference, a plain loop over the cells of each domain: the half-cell
    transmissibility k A / (l / 2) = 2 k V / l^2 (0 for a cell of zero length) and the
    series pair h1 h2 / (h1 + h2) of each face (0 when both halves are 0) (Aziz & Settari
    1979, Petroleum Reservoir Simulation, ch. 5, from memory); with ``periodic`` also the
    face from the last cell to the first along each axis of more than one cell (a single
    cell is joined to its own image: no matrix entry). Returns
    the halves (3, nb, sx, sy, sz), the matrix entries {(p, q): (nb,) values} of the
    distinct cell pairs and each cell's coupling sum (nb, n)."""
    nb, shape = k[0].shape[0], k[0].shape[1:]
    n = int(np.prod(shape))
    half = np.zeros((3, nb) + shape)
    for b in range(nb):
        for cell in np.ndindex(*shape):
            volume = lengths[0][(b,) + cell] * lengths[1][(b,) + cell] * lengths[2][(b,) + cell]
            for a in range(3):
                length = lengths[a][(b,) + cell]
                half[(a, b) + cell] = 2.0 * k[a][(b,) + cell] * volume / length ** 2 if length > 0 else 0.0
    entries, total = {}, np.zeros((nb, n))
    for cell in np.ndindex(*shape):
        for a in range(3):
            nxt = list(cell)
            nxt[a] += 1
            if nxt[a] == shape[a]:
                if not (periodic and shape[a] > 1):
                    continue
                nxt[a] = 0
            p, q = int(np.ravel_multi_index(cell, shape)), int(np.ravel_multi_index(tuple(nxt), shape))
            h1, h2 = half[(a, slice(None)) + cell], half[(a, slice(None)) + tuple(nxt)]
            t = np.array([x * y / (x + y) if x + y > 0 else 0.0 for x, y in zip(h1, h2)])
            key = (min(p, q), max(p, q))
            entries[key] = entries.get(key, 0.0) + t
            total[:, p] += t
            total[:, q] += t
    return half, entries, total


@settings(max_examples=25, deadline=None)
@given(shape=st.tuples(*(st.integers(1, 4),) * 3), periodic=st.booleans(), seed=st.integers(0, 2 ** 16))
def test_compiled_couplings_equal_the_two_point_formulas(shape, periodic, seed):
    # The compiled one-pass assembly against the plain loop above (written here, not
    # upscale's own two-point module), with zero permeabilities and zero thicknesses among
    # the cells (without pinch-out connections: the kernel's own formulas; the connections
    # are checked against stacked cells and tests/flow_reference.py in test_pinch_outs.py).
    # Same formulas, other order of operations: 1e-14 (half) and 1e-13 (sums of up to six
    # terms) relative, a few units of round-off.
    rng = np.random.default_rng(seed)
    nb = 3
    full = (nb,) + shape
    k = tuple(np.where(rng.random(full) < 0.2, 0.0, rng.lognormal(0, 2, full)) for _ in range(3))
    lengths = (np.broadcast_to(rng.uniform(1, 5, (nb, shape[0], 1, 1)), full),
               np.broadcast_to(rng.uniform(1, 5, (nb, 1, shape[1], 1)), full),
               np.where(rng.random(full) < 0.1, 0.0, rng.uniform(0.1, 2, full)))
    domain = LocalDomain(k=k, lengths=lengths, target=tuple(slice(0, s) for s in shape), pinch_connections=False)
    couplings, (first, second, values), total = _couplings(domain, periodic)
    half, matrix_entries, expected_total = _two_point_couplings(k, lengths, periodic)
    for a in range(3):
        np.testing.assert_allclose(couplings.half[a], half[a], rtol=1e-14)
        if periodic:
            n = shape[a]
            low, high = [slice(None)] * 4, [slice(None)] * 4
            low[a + 1], high[a + 1] = slice(n - 1, n), slice(0, 1)
            h1, h2 = half[a][tuple(low)], half[a][tuple(high)]
            wrap = np.divide(h1 * h2, h1 + h2, out=np.zeros(h1.shape), where=h1 + h2 > 0)
            np.testing.assert_allclose(couplings.wrap[a], wrap, rtol=1e-14)
        else:
            assert couplings.wrap[a] is None
    np.testing.assert_allclose(total.reshape(nb, -1), expected_total, rtol=1e-13)
    # the coupling list the solver receives: the same matrix entries
    listed = {}
    for p, q, column in zip(first, second, values.T):
        key = (min(p, q), max(p, q))
        listed[key] = listed.get(key, 0.0) + column
    assert listed.keys() == matrix_entries.keys()
    for key, column in matrix_entries.items():
        np.testing.assert_allclose(listed[key], column, rtol=1e-13)
