"""Today's behaviour of a pinched cell (dz = 0) between two active cells of a column: no
pinch-out connection, so it seals that column vertically, in the fine whole-model check
and in the coarse sealed kz alike (README, "Files"; DEVELOPERS.md, "Known limitations").

Checked against the independent two-point reference of tests/flow_reference.py, where a
cell of zero thickness has zero volume and so no transmissibility. A later issue is to add
pinch-out connections (the design in DEVELOPERS.md: the real cells a and b on either side
joined through the series pair of their half transmissibilities, h_a h_b / (h_a + h_b));
the value such a connection would give is computed here too, and today's results must
stay below it. When the connections come, these tests are to change with them.
"""

import numpy as np
import pytest
from flow_reference import sealed_problem
from helpers import lognormal

from upscale.checks.summary import field_summary
from upscale.core.pressure import fine_model_check
from upscale.io.schema import arrays, fine_dataset
from upscale.io.validation import validate
from upscale.scale.coarsen import coarsen

SHAPE = (4, 4, 6)
COLUMN = (1, 2)      # the column with the pinched cell
PINCHED = 3          # its layer; layers 2 and 4 of the column are active


def _field(barrier: bool):
    """Lognormal k (kz = k / 5), cell sizes varying; cell (1, 2, 3) pinched. With
    ``barrier`` every other cell of layer 3 has kz = 0, so that the pinched column is the
    only way down."""
    rng = np.random.default_rng(4)
    k = lognormal(SHAPE, 1.0, 4) * 50.0
    kz = k / 5.0
    dx, dy = rng.uniform(5.0, 15.0, SHAPE[0]), rng.uniform(5.0, 15.0, SHAPE[1])
    dz = rng.uniform(0.5, 2.0, SHAPE)
    dz[COLUMN + (PINCHED,)] = 0.0
    if barrier:
        kz[:, :, PINCHED] = 0.0
    ds = validate(fine_dataset(k, k.copy(), kz, np.full(SHAPE, 0.2), dx, dy, dz))
    return ds, (k, k.copy(), kz), (dx, dy, dz)


def _with_pinch_out_link(problem, permeability, sizes, offset=(0, 0)):
    """The reference problem with the pinch-out connection a later issue will add: the
    cells above and below the pinched one joined by the series pair of their vertical
    half transmissibilities 2 kz V / dz^2. ``offset`` is the (i, j) of the domain's first
    column in the field."""
    dx, dy, dz = sizes
    i, j = COLUMN[0] - offset[0], COLUMN[1] - offset[1]

    def half(layer):
        volume = dx[i] * dy[j] * dz[i, j, layer]
        return 2.0 * permeability[2][i, j, layer] * volume / dz[i, j, layer] ** 2

    h_above, h_below = half(PINCHED - 1), half(PINCHED + 1)
    link = h_above * h_below / (h_above + h_below)
    shape = dz.shape
    a = np.ravel_multi_index((i, j, PINCHED - 1), shape)
    b = np.ravel_multi_index((i, j, PINCHED + 1), shape)
    A = problem.A.tolil()
    A[a, a] += link
    A[b, b] += link
    A[a, b] -= link
    A[b, a] -= link
    return type(problem)(A, problem.b, problem.c, problem.offset, problem.scale, problem.held, problem.shape)


def test_the_pinched_cell_lies_between_active_cells():
    ds, _, _ = _field(barrier=False)
    fine = arrays(ds)
    column = fine.active[COLUMN]
    assert not column[PINCHED] and column[PINCHED - 1] and column[PINCHED + 1]
    assert field_summary(ds)["pinched_between_active"] == 1   # counted by hand: that one cell


def test_a_pinched_cell_closes_the_only_way_down():
    # Layer 3 sealed (kz = 0) everywhere but in the pinched column: with no pinch-out
    # connection nothing flows from top to bottom, exactly, in the fine whole-model check
    # and in the coarse sealed kz of the block holding the column (all six layers in one
    # coarse layer); a pinch-out connection would open a way (rate > 0, computed).
    ds, k, sizes = _field(barrier=True)
    result = fine_model_check(arrays(ds), "z")
    assert result["rate"] == 0.0 and result["k"] == 0.0
    problem = sealed_problem(k, *sizes, 2)
    linked = _with_pinch_out_link(problem, k, sizes).value()
    assert linked > 0.0
    assert problem.value() == pytest.approx(0.0, abs=1e-12 * linked)   # the reference: 0 to round-off
    coarse = coarsen(ds, ratio=(2, 2, 6), method="flow", bc="sealed")
    block = (COLUMN[0] // 2, COLUMN[1] // 2, 0)
    assert float(coarse["kz"][block]) == 0.0


def test_a_pinched_cell_seals_its_column_in_fine_and_coarse_models():
    # A heterogeneous field, one pinched cell: the fine whole-model z flow and the coarse
    # sealed kz of the block holding the column, against the reference (where the pinched
    # cell carries nothing). Tolerances: the check's CG stops at a relative residual of
    # 1e-10 (1e-8 on k); the local solves are refined to 1e-12 on a block of 144 cells
    # (1e-10). The pinch-out connection would give 90 % more flow through the block and
    # 13 % through the model (computed): today's values must stay below (by 0.1 % at least,
    # far more than the tolerances).
    ds, k, sizes = _field(barrier=False)
    dx, dy, dz = sizes
    fine = fine_model_check(arrays(ds), "z")
    problem = sealed_problem(k, dx, dy, dz, 2)
    assert fine["k"] == pytest.approx(problem.value(), rel=1e-8)
    assert fine["k"] < _with_pinch_out_link(problem, k, sizes).value() * (1 - 1e-3)
    coarse = coarsen(ds, ratio=(2, 2, 6), method="flow", bc="sealed")
    block = (COLUMN[0] // 2, COLUMN[1] // 2, 0)
    cut = (slice(2 * block[0], 2 * block[0] + 2), slice(2 * block[1], 2 * block[1] + 2), slice(None))
    block_k = tuple(kk[cut] for kk in k)
    block_sizes = (dx[cut[0]], dy[cut[1]], dz[cut])
    local = sealed_problem(block_k, *block_sizes, 2)
    assert float(coarse["kz"][block]) == pytest.approx(local.value(), rel=1e-10)
    linked = _with_pinch_out_link(local, block_k, block_sizes, offset=(2 * block[0], 2 * block[1])).value()
    assert float(coarse["kz"][block]) < linked * (1 - 1e-3)
