"""The benchmark's own figures on small cases counted by hand."""

import pytest

from upscale.cli.bench import _factor_work, face_to_sealed_work, run_bench
from upscale.core.partition import make_partition


def test_factor_work_counts_the_band_updates():
    # A band of half width w over n unknowns: column j updates the triangle of its
    # min(w, n - 1 - j) entries below the pivot, r (r + 1) / 2 multiply-adds.
    assert _factor_work((4, 1, 1)) == 1 + 1 + 1 + 0          # tridiagonal, w = 1
    assert _factor_work((2, 2, 1)) == 3 + 3 + 1 + 0          # w = 2 (x slowest): reach 2, 2, 1, 0


def test_face_to_sealed_work_on_a_row_of_two_blocks():
    # Two blocks of 2 x 1 x 1 cells: three sealed solves each of a 2-cell band (1 update
    # each, 6 in all) and one x-face problem of 4 cells (3 updates): ratio 0.5.
    assert face_to_sealed_work(make_partition((4, 1, 1), ratio=(2, 1, 1))) == pytest.approx(0.5)


def test_bench_runs_and_agrees_with_the_plain_loop(capsys):
    figures = run_bench(shape=(10, 10, 10), sample=4)
    out = capsys.readouterr().out
    assert "x the sealed time" in out and "multipliers add" in out
    assert figures["added_multiplier_to_sealed"] == pytest.approx(
        (figures["together_seconds"] - figures["sealed_seconds"]) / figures["sealed_seconds"])
    assert figures["max_relative_difference_sealed"] < 1e-10
    assert figures["max_relative_difference_periodic"] < 1e-10
    # 2 x 2 x 2 blocks: 24 sealed solves of 5 x 5 x 5 cells, 4 face problems of two blocks
    # per direction (12, each 10 x 5 x 5 cells in its own band order)
    assert figures["multiplier_work_to_sealed"] == pytest.approx(
        12 * _factor_work((10, 5, 5)) / (24 * _factor_work((5, 5, 5))))
