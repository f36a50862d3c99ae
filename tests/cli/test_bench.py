"""The benchmark's own figures on small cases counted by hand."""

import numpy as np
import pytest
from flow_reference import periodic_permeability, sealed_permeability

from upscale.cli.bench import _factor_work, face_to_sealed_work, run_bench
from upscale.core.partition import make_partition
from upscale.gallery.synthetic import lognormal_field


def test_factor_work_counts_the_band_updates():
    # A band of half width w over n unknowns: column j updates the triangle of its
    # min(w, n - 1 - j) entries below the pivot, r (r + 1) / 2 multiply-adds.
    assert _factor_work((4, 1, 1)) == 1 + 1 + 1 + 0          # tridiagonal, w = 1
    assert _factor_work((2, 2, 1)) == 3 + 3 + 1 + 0          # w = 2 (x slowest): reach 2, 2, 1, 0


def test_face_to_sealed_work_on_a_row_of_two_blocks():
    # Two blocks of 2 x 1 x 1 cells: three sealed solves each of a 2-cell band (1 update
    # each, 6 in all) and one x-face problem of 4 cells (3 updates): ratio 0.5.
    assert face_to_sealed_work(make_partition((4, 1, 1), ratio=(2, 1, 1))) == pytest.approx(0.5)


def _band_cholesky_work(n: int, width: int) -> int:
    """Multiply-adds of a right-looking banded Cholesky factorisation, n unknowns, half
    bandwidth w, counted by hand: pivot j updates the triangle of the r = min(w, n - 1 - j)
    entries below it, r (r + 1) / 2; for n > w that is (n - w) w (w + 1) / 2 for the
    pivots with a full band plus (w - 1) w (w + 1) / 6 for the last w."""
    return (n - width) * width * (width + 1) // 2 + (width - 1) * width * (width + 1) // 6


def test_bench_runs_and_agrees_with_the_plain_loop(capsys, monkeypatch):
    # The bench's two sides, each against the independent SciPy references of
    # tests/flow_reference.py (their own assembly): the batched sealed and periodic
    # diagonal of every block of the field, and every block the plain loop solved. Both
    # the kernel (refined to a relative residual of 1e-12) and SuperLU are good to far
    # better than the 1e-10 allowed on these lognormal blocks (sigma 2, 125 cells).
    from upscale.cli import bench

    recorded = {"plain": []}
    time_flow, plain_block = bench._time_flow, bench._plain_block

    def recording_time_flow(cells, partition):
        results, times = time_flow(cells, partition)
        recorded["batched"] = results
        return results, times

    def recording_plain_block(k, lengths, bc):
        out = plain_block(k, lengths, bc)
        recorded["plain"].append((k, lengths, bc, out))
        return out

    monkeypatch.setattr(bench, "_time_flow", recording_time_flow)
    monkeypatch.setattr(bench, "_plain_block", recording_plain_block)
    figures = run_bench(shape=(10, 10, 10), sample=4)
    out = capsys.readouterr().out
    assert "x the sealed time" in out and "multipliers add" in out and "two-phase over single-phase" in out
    assert figures["two_phase_to_single"] == pytest.approx(figures["two_phase_seconds"] / figures["single_phase_seconds"])
    assert figures["two_phase_to_single_cpu"] == pytest.approx(
        figures["two_phase_cpu_seconds"] / figures["single_phase_cpu_seconds"])
    assert figures["two_phase_to_sealed"] == pytest.approx(figures["two_phase_seconds"] / figures["sealed_seconds"])
    references = {"sealed": sealed_permeability, "periodic": periodic_permeability}
    field = lognormal_field(shape=(10, 10, 10), seed=0)   # the bench's field (seed 0)
    k = tuple(field[name].values for name in ("kx", "ky", "kz"))
    dx, dy, dz = field["dx"].values, field["dy"].values, field["dz"].values
    assert dz.ndim == 1 and np.all(field["ntg"].values == 1)   # ntg 1: flow permeability is k
    for bc, reference in references.items():
        tensor = recorded["batched"][bc].tensor
        for block in np.ndindex(2, 2, 2):
            cut = tuple(slice(5 * b, 5 * b + 5) for b in block)
            for axis in range(3):
                expected = reference(tuple(kk[cut] for kk in k), dx[cut[0]], dy[cut[1]], dz[cut[2]], axis)
                assert tensor[block + (axis, axis)] == pytest.approx(expected, rel=1e-10), (bc, block, axis)
    # 2 x 2 x 2 whole blocks of 5 x 5 x 5 cells: the sample of 4 is timed whole, per condition
    assert figures["blocks"] == 8 and figures["sample_blocks"] == 4
    assert len(recorded["plain"]) == 2 * 4
    for kk, lengths, bc, plain in recorded["plain"]:
        sizes = (lengths[0][:, 0, 0], lengths[1][0, :, 0], lengths[2])
        expected = [references[bc](kk, *sizes, axis) for axis in range(3)]
        np.testing.assert_allclose(plain, expected, rtol=1e-10, err_msg=bc)
    assert figures["max_relative_difference_sealed"] < 1e-10
    assert figures["max_relative_difference_periodic"] < 1e-10
    # The work ratio by hand: 24 sealed solves (8 blocks, 3 directions) of 125 cells with
    # half bandwidth 25 (the two shorter axes, the largest slowest), and 12 face problems
    # (4 per direction) of 250 cells, 10 x 5 x 5 in their own order, half bandwidth 25:
    # 12 * 75725 / (24 * 35100) = 1.0787.
    assert _band_cholesky_work(125, 25) == 35100 and _band_cholesky_work(250, 25) == 75725
    assert figures["multiplier_work_to_sealed"] == pytest.approx(12 * 75725 / (24 * 35100), rel=1e-12)
