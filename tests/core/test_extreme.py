"""Extreme but valid fields: results stay finite and within bounds, with warnings where
a block is flagged; at 1e12 contrast the values against an independent SciPy solve
(tests/flow_reference.py), a single active cell against what one value averages to."""

import logging

import numpy as np
import pytest
from flow_reference import sealed_problem
from helpers import lognormal

from upscale import coarsen
from upscale.io.schema import fine_dataset


def _fine(k, dz=None, active=None, kz=None):
    shape = k.shape
    dz = np.ones(shape[2]) if dz is None else dz
    return fine_dataset(k, k, k if kz is None else kz, np.full(shape, 0.2), np.ones(shape[0]),
                        np.ones(shape[1]), dz, active=active)


def _check_finite_within_bounds(coarse, sealed=True):
    active = coarse.active.values.astype(bool)
    for name in "xyz":
        k = (coarse[f"k{name}"] * (coarse.ntg if name != "z" else 1)).values
        assert np.all(np.isfinite(k)) and np.all(k >= 0)
        if sealed:
            lower = coarse[f"k{name}_lower_bound"].values
            upper = coarse[f"k{name}_upper_bound"].values
            assert np.all(k[active] >= lower[active] * (1 - 1e-8) - 1e-300)
            assert np.all(k[active] <= upper[active] * (1 + 1e-8))
        for face in ("t", ):
            t = coarse[f"{face}{name}"].values
            assert np.all(np.isfinite(t)) and np.all(t >= 0)


# m3*cP/(day*bar) per mD*m from the definitions: 1 mD = 9.869233e-16 m2 (the darcy, from
# memory), 1 bar = 1e5 Pa, 1 cP = 1e-3 Pa s, 1 day = 86400 s.
METRIC = 9.869233e-16 * 1e5 / 1e-3 * 86400.0
EPS = np.finfo(float).eps


def test_contrast_of_1e12_between_cells():
    # Twelve orders of magnitude between neighbours, sealed flow-based k and multipliers in
    # one pass. Every block's kx, ky, kz against the independent SciPy reference (a fresh
    # two-point assembly, tests/flow_reference.py), and every interior face's flow-based
    # transmissibility (T = C Q / (p1 - p2), the two blocks' bulk-weighted mean pressures)
    # against the same reference on the two-block domain. Tolerance from the conditioning:
    # the normwise condition number of these matrices is about 1e12, the componentwise one
    # of each value as a functional of the solution (Skeel 1979; Higham 2002, ch. 7, from
    # memory) is computed here (of Q and of p1 - p2 for a face, whose relative errors add);
    # each solve errs by about that number times the unit round-off, we allow ten times it.
    # Measured: 75-420 for 22 of the 24 block values (agreement 1e-14); 1e12 for the two
    # blocks that no path of 1e6 mD cells crosses (k ~ 4e-6 mD: the rate is read from
    # pressures within 1e-12 of the held values), where 3e-3 is allowed and 2e-4 found.
    rng = np.random.default_rng(1)
    k = np.where(rng.random((8, 8, 8)) < 0.5, 1e-6, 1e6)
    coarse = coarsen(_fine(k), ratio=(4, 4, 4), method="flow", multipliers=True)
    _check_finite_within_bounds(coarse)
    assert float(coarse.solve_residual.max()) <= 1e-10
    ones = np.ones(4)
    for block in np.ndindex(2, 2, 2):
        cells = tuple(slice(4 * b, 4 * b + 4) for b in block)
        for axis, name in enumerate("xyz"):
            problem = sealed_problem((k[cells],) * 3, ones, ones, np.ones((4, 4, 4)), axis)
            tolerance = 10 * problem.condition() * EPS
            assert float(coarse[f"k{name}"][block]) == pytest.approx(problem.value(), rel=tolerance), (block, name)
    for axis, name in enumerate("xyz"):
        for low in np.ndindex(*[1 if a == axis else 2 for a in range(3)]):
            cells = tuple(slice(0, 8) if a == axis else slice(4 * low[a], 4 * low[a] + 4) for a in range(3))
            sizes = [np.ones(8 if a == axis else 4) for a in range(3)]
            problem = sealed_problem((k[cells],) * 3, sizes[0], sizes[1], np.ones(k[cells].shape), axis)
            pressure = problem.pressure()
            rate = problem.value() / problem.scale
            first = np.zeros(pressure.shape, dtype=bool)
            np.moveaxis(first, axis, 0)[:4] = True
            drop = pressure[first].mean() - pressure[~first].mean()   # unit cells: equal weights
            # the condition of the drop as a functional of the same solution
            weights = np.where(first, 1.0, -1.0).ravel() / 64
            drop_problem = type(problem)(problem.A, problem.b, weights, 0.0, 1.0, problem.held, problem.shape)
            tolerance = 10 * (problem.condition() + drop_problem.condition()) * EPS
            face = list(low)
            face[axis] = 0  # the one interior face along the axis, between blocks 0 and 1
            flow_t = float((coarse[f"t{name}"] * coarse[f"t{name}_multiplier"]).values[tuple(face)])
            assert flow_t == pytest.approx(METRIC * rate / drop, rel=tolerance), (name, low)


def test_all_zero_block_is_closed_with_a_warning(caplog):
    k = lognormal((8, 4, 4), 1.0, 2)
    k[:4] = 0.0  # the first coarse block has no permeability at all
    with caplog.at_level(logging.WARNING, logger="upscale"):
        coarse = coarsen(_fine(k), ratio=(4, 4, 4), method="flow", multipliers=True)
    _check_finite_within_bounds(coarse)
    assert float(coarse.kx[0, 0, 0]) == 0.0
    assert float(coarse.tx[0, 0, 0]) == 0.0
    assert any("zero kx" in record.message for record in caplog.records)


def test_single_active_cell():
    # One active cell in a 2 x 2 x 2 block. Any average of a single value is that value
    # (arithmetic and harmonic alike: the effective kx*ntg, ky*ntg, kz is the cell's k);
    # the sealed flow-based value is exactly 0 along every axis, since the cell touches
    # only one of the block's two faces normal to each axis (no connected path across).
    # The coarse cell's pore volume is the fine cell's (porosity 0.2, ntg 1, 1 m3), and it
    # has no active neighbour: every coarse face is closed.
    k = lognormal((4, 4, 4), 1.0, 3)
    active = np.zeros(k.shape, dtype=np.int8)
    active[1, 2, 3] = 1
    for method in ("flow", "arithmetic", "harmonic"):
        coarse = coarsen(_fine(k, active=active), ratio=(2, 2, 2), method=method)
        assert int(coarse.active.sum()) == 1 and bool(coarse.active[0, 1, 1])
        expected = 0.0 if method == "flow" else k[1, 2, 3]
        ntg = float(coarse.ntg[0, 1, 1])
        for name, scale in (("kx", ntg), ("ky", ntg), ("kz", 1.0)):
            assert float(coarse[name][0, 1, 1]) * scale == pytest.approx(expected, rel=1e-12, abs=0.0), (method, name)
        assert float(coarse.pore_volume[0, 1, 1]) == pytest.approx(0.2, rel=1e-12)
        assert float(coarse.pore_volume.sum()) == pytest.approx(0.2, rel=1e-12)
        for name in ("tx", "ty", "tz"):
            assert np.all(coarse[name].values == 0.0), (method, name)
        assert np.all(np.isfinite(coarse.kx.values)) and not np.any(np.isnan(coarse.porosity.values))


@pytest.mark.parametrize("bc", ["sealed", "periodic", "linear"])
def test_one_cell_thick_layers_and_many_pinched_cells(bc):
    rng = np.random.default_rng(7)
    k = lognormal((6, 6, 9), 1.5, 7)
    dz = rng.uniform(0.1, 2.0, k.shape) * (rng.random(k.shape) > 0.6)  # 60 % pinched
    dz[0, 0, 0] = 1.0
    coarse = coarsen(_fine(k, dz=dz), ratio=(3, 3, 1), method="flow", bc=bc, multipliers=True)
    _check_finite_within_bounds(coarse, sealed=bc == "sealed")
    fine_pv = float((0.2 * dz).sum())
    assert float(coarse.pore_volume.sum()) == pytest.approx(fine_pv, rel=1e-12)
