"""The fine solves of every check run as one list of jobs on worker processes: the same
answers as each check solving its own fine model, and as an independent two-point solve."""

import numpy as np
import pytest

import flow_reference
import upscale
from helpers import lognormal
from upscale.checks import fine_solves
from upscale.checks.diagonal import diagonal_check
from upscale.checks.run import CHECKS
from upscale.checks.transient import transient_check
from upscale.core.grid import AXES
from upscale.core.partition import make_partition
from upscale.io.schema import arrays, fine_dataset
from upscale.io.validation import validate

SHAPE, RATIO = (9, 8, 6), (3, 2, 2)


@pytest.fixture(scope="module")
def models():
    kx = 30.0 * lognormal(SHAPE, 1.2, seed=5)
    dx, dy = np.linspace(8.0, 14.0, SHAPE[0]), np.full(SHAPE[1], 10.0)
    dz = np.random.default_rng(6).uniform(0.5, 2.0, SHAPE)
    fine = validate(fine_dataset(kx, 0.6 * kx, 0.05 * kx, np.full(SHAPE, 0.2), dx, dy, dz))
    coarse = validate(upscale.coarsen(fine, ratio=RATIO, method="flow", bc="sealed", multipliers=True))
    return fine, coarse, (kx, 0.6 * kx, 0.05 * kx), (dx, dy, dz)


def test_the_jobs_are_those_of_the_chosen_checks_longest_first():
    assert fine_solves.fine_jobs(("blocks", "layering")) == []
    jobs = fine_solves.fine_jobs(CHECKS)
    assert jobs[0] == ("transient", None)
    assert [key for kind, key in jobs if kind == "steady"] == [0, 1, 2]
    assert len([1 for kind, _ in jobs if kind == "floor"]) == len([1 for kind, _ in jobs if kind == "diagonal"]) == 4
    assert fine_solves.fine_jobs(("steady",)) == [("steady", 0), ("steady", 1), ("steady", 2)]


def test_jobs_on_workers_give_each_check_its_own_fine_answer(models):
    fine, coarse, k, (dx, dy, dz) = models
    cells = arrays(fine)
    partition = make_partition(SHAPE, ratio=RATIO)
    # A direct limit below the model's size sends every solve to AMG-CG and the jobs to
    # forked workers (on a machine with two cores or more), unlike the separate checks below,
    # which solve directly in this process.
    solved = fine_solves.fine_solutions(fine, coarse, cells, partition, CHECKS, transient={"direct_limit": 50},
                                        direct_limit=50)
    for axis, result in enumerate(solved["steady"]):
        assert result["solver"]["method"] == "amg-cg"
        # The independent two-point reference in tests/flow_reference.py (scipy's sparse LU);
        # the solves stop at a relative residual of 1e-10, the rate is as exact to about 1e-9.
        assert result["k"] == pytest.approx(flow_reference.sealed_permeability(k, dx, dy, dz, axis), rel=1e-8), \
            AXES[axis]
    alone = diagonal_check(fine, coarse)
    for name, d in alone.items():
        assert solved["diagonal"][name] == pytest.approx(d["fine_rate"], rel=1e-8), name
    shared = diagonal_check(fine, coarse, fine_rates=solved["diagonal"], floor_rates=solved["floor"])
    for name, d in alone.items():
        assert shared[name]["floor"] == pytest.approx(d["floor"], rel=1e-6, abs=1e-9), name
    # Each step is solved to a relative residual of 1e-8, so the cumulatives agree to about that.
    run_alone = transient_check(fine, coarse)
    run_shared = transient_check(fine, coarse, fine_run=solved["transient"])
    assert solved["transient"]["solver"]["method"] == "amg-cg"
    np.testing.assert_allclose(run_shared["fine"]["cumulative"], run_alone["fine"]["cumulative"], rtol=1e-6)
    assert run_shared["final_cumulative_relative_error"] == pytest.approx(run_alone["final_cumulative_relative_error"],
                                                                          rel=1e-4, abs=1e-7)
