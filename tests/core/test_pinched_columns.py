"""A pinched cell (dz = 0) between two active cells of a column: by default a pinch-out
connection joins the two (vertical flow passes as if they were neighbours, through the
series pair of their half transmissibilities h_a h_b / (h_a + h_b); common practice, no
source); with ``--no-pinch-connections`` (``pinch_connections=False``) the cell seals its
column vertically, in the fine whole-model check and in the coarse sealed kz alike, as
before the connections existed.

Checked against the independent two-point reference of tests/flow_reference.py: with
``pinch=True`` it takes the pinched cell out and joins the cells above and below it
directly; without, a cell of zero thickness has zero volume and so no transmissibility.
"""

import subprocess

import numpy as np
import pytest
import xarray as xr
from flow_reference import sealed_problem
from helpers import lognormal

from upscale import write
from upscale.checks.run import check
from upscale.checks.summary import field_summary
from upscale.core.pressure import fine_model_check
from upscale.io.pinch_outs import with_pinch_outs
from upscale.io.schema import arrays, fine_dataset
from upscale.io.validation import validate
from upscale.scale.coarsen import coarsen

SHAPE = (4, 4, 6)
COLUMN = (1, 2)      # the column with the pinched cell
PINCHED = 3          # its layer; layers 2 and 4 of the column are active
BLOCK = (COLUMN[0] // 2, COLUMN[1] // 2, 0)   # the coarse block holding it (ratio 2 2 6)


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


def _block(k, sizes):
    """The permeability and cell sizes of the coarse block holding the column."""
    dx, dy, dz = sizes
    cut = (slice(2 * BLOCK[0], 2 * BLOCK[0] + 2), slice(2 * BLOCK[1], 2 * BLOCK[1] + 2), slice(None))
    return tuple(kk[cut] for kk in k), (dx[cut[0]], dy[cut[1]], dz[cut])


def test_the_pinched_cell_lies_between_active_cells():
    ds, _, _ = _field(barrier=False)
    column = arrays(ds).active[COLUMN]
    assert not column[PINCHED] and column[PINCHED - 1] and column[PINCHED + 1]
    summary = field_summary(ds)
    assert summary["pinched_between_active"] == 1   # counted by hand: that one cell
    assert summary["pinch_outs"]["connections_made"] == 1
    assert field_summary(with_pinch_outs(ds, connections=False))["pinch_outs"]["connections_made"] == 0


def test_a_pinch_out_connection_opens_the_only_way_down():
    # Layer 3 sealed (kz = 0) everywhere but in the pinched column. With the connection
    # the fine whole-model z flow and the coarse sealed kz of the block holding the column
    # (all six layers in one coarse layer) equal the reference that joins the cells above
    # and below; without it nothing flows from top to bottom, exactly. Tolerances: the
    # check's direct solve is refined to a relative residual of 1e-10 (1e-8 on k); the
    # local solves to 1e-12 on a block of 24 cells (1e-10).
    ds, k, sizes = _field(barrier=True)
    joined = sealed_problem(k, *sizes, 2, pinch=True).value()
    assert joined > 0.0
    assert fine_model_check(arrays(ds), "z")["k"] == pytest.approx(joined, rel=1e-8)
    block_k, block_sizes = _block(k, sizes)
    coarse = coarsen(ds, ratio=(2, 2, 6), method="flow", bc="sealed")
    assert float(coarse["kz"][BLOCK]) == pytest.approx(sealed_problem(block_k, *block_sizes, 2, pinch=True).value(),
                                                       rel=1e-10)
    sealed = with_pinch_outs(ds, connections=False)
    result = fine_model_check(arrays(sealed), "z")
    assert result["rate"] == 0.0 and result["k"] == 0.0
    assert sealed_problem(k, *sizes, 2).value() == pytest.approx(0.0, abs=1e-12 * joined)  # the reference agrees
    assert float(coarsen(ds, ratio=(2, 2, 6), pinch_connections=False)["kz"][BLOCK]) == 0.0


def test_with_or_without_connections_against_the_reference():
    # A heterogeneous field, one pinched cell: the fine whole-model z flow and the coarse
    # sealed kz of the block holding the column against the reference, joined (the
    # default) and sealed (pinch_connections=False: the results from before the
    # connections). The two references differ by 90 % through the block and 13 % through
    # the model (computed), far more than the tolerances (as above).
    ds, k, sizes = _field(barrier=False)
    block_k, block_sizes = _block(k, sizes)
    for connections in (True, False):
        fine = fine_model_check(arrays(with_pinch_outs(ds, connections=connections)), "z")
        assert fine["k"] == pytest.approx(sealed_problem(k, *sizes, 2, pinch=connections).value(), rel=1e-8)
        coarse = coarsen(ds, ratio=(2, 2, 6), method="flow", bc="sealed", pinch_connections=connections)
        local = sealed_problem(block_k, *block_sizes, 2, pinch=connections).value()
        assert float(coarse["kz"][BLOCK]) == pytest.approx(local, rel=1e-10)
    assert sealed_problem(block_k, *block_sizes, 2).value() < 0.6 * sealed_problem(block_k, *block_sizes, 2,
                                                                                    pinch=True).value()


def test_the_command_line_without_connections_gives_the_sealed_results(tmp_path, cli_command, cli_env):
    # upscale coarsen --no-pinch-connections: the sealed block kz of the reference without
    # joins, the setting recorded in the file; upscale.check then runs the fine model as
    # the coarse grid was made (without connections: the fine z flow of the reference
    # without joins).
    ds, k, sizes = _field(barrier=False)
    fine_path, coarse_path = tmp_path / "fine.nc", tmp_path / "coarse.nc"
    write(ds, fine_path)
    run = subprocess.run(cli_command + ["coarsen", str(fine_path), "-o", str(coarse_path), "--ratio", "2", "2", "6",
                                        "--no-pinch-connections", "--quiet"], env=cli_env, capture_output=True,
                         text=True, timeout=300)
    assert run.returncode == 0, run.stderr
    with xr.open_dataset(coarse_path) as coarse:
        coarse = coarse.load()
    assert coarse.attrs["pinch_connections"] == "no" and coarse.attrs["pinch_thickness"] == 0.0
    block_k, block_sizes = _block(k, sizes)
    assert float(coarse["kz"][BLOCK]) == pytest.approx(sealed_problem(block_k, *block_sizes, 2).value(), rel=1e-10)
    metrics = check(ds, coarse, checks="steady")
    assert metrics["pinch_outs"]["fine"]["connections"] is False
    assert metrics["global"]["z"]["fine_k"] == pytest.approx(sealed_problem(k, *sizes, 2).value(), rel=1e-8)
