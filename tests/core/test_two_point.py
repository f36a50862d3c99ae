"""Two-point transmissibilities against the textbook formulas, written out here: a half cell
k A / (l / 2) = 2 k V / l^2, a face the series pair h1 h2 / (h1 + h2) (Aziz & Settari 1979,
Petroleum Reservoir Simulation, ch. 5, from memory), and the face arrays' checks."""

import numpy as np
import pytest

from upscale.core.two_point import check_faces, face_transmissibility, half_transmissibility


def test_half_transmissibility_broadcasts_every_argument_and_closes_pinched_cells():
    # Each of k, volume and length may carry the shape alone (the docstring's contract); a
    # length of 0 (a pinched cell) gives exactly 0, not 0/0. Values by hand: 2 k V / l^2.
    k = np.array([1.0, 3.0]).reshape(2, 1, 1)
    volume = np.array([2.0, 5.0, 7.0]).reshape(1, 3, 1)
    length = np.array([1.0, 0.0, 2.0, 4.0]).reshape(1, 1, 4)
    expected = np.zeros((2, 3, 4))
    for i, j, m in np.ndindex(2, 3, 4):
        if length[0, 0, m] > 0:
            expected[i, j, m] = 2.0 * k[i, 0, 0] * volume[0, j, 0] / length[0, 0, m] ** 2
    with np.errstate(all="raise"):   # no 0/0 anywhere, pinched cells included
        got = half_transmissibility(k, volume, length)
    assert got.shape == (2, 3, 4)
    # exact: the same products and one division of small whole numbers
    np.testing.assert_array_equal(got, expected)
    assert np.all(got[:, :, 1] == 0.0)


def test_face_transmissibility_with_a_batch_axis_is_the_series_pair_of_neighbours():
    # A leading batch axis (as the local solves use): faces along each of the last three
    # axes only, h1 h2 / (h1 + h2) of the two neighbours, 0 where both are 0.
    rng = np.random.default_rng(3)
    half = rng.uniform(0.5, 2.0, (2, 3, 4, 5))
    half[1, 0, 0, :2] = 0.0
    for axis in range(3):
        got = face_transmissibility(half, axis)
        a = np.moveaxis(half, axis + 1, 1)
        first, second = a[:, :-1], a[:, 1:]
        total = first + second
        expected = np.moveaxis(np.where(total > 0, first * second / np.where(total > 0, total, 1.0), 0.0), 1, axis + 1)
        assert got.shape == expected.shape
        np.testing.assert_allclose(got, expected, rtol=1e-15, atol=0)   # the same three operations: rounding


def test_check_faces_returns_floats_and_names_the_axis_of_a_bad_array():
    shape = (3, 2, 2)
    good = [np.ones((2, 2, 2), dtype=int), np.ones((3, 1, 2), dtype=int), np.ones((3, 2, 1), dtype=int)]
    faces = check_faces(good, shape)
    assert all(f.dtype == np.float64 for f in faces)
    with pytest.raises(ValueError, match=r"needs three arrays \(x, y, z faces\), got 2"):
        check_faces(good[:2], shape)
    bad_shape = good[:2] + [np.ones((3, 2, 2))]
    with pytest.raises(ValueError, match=r"along z have shape \(3, 2, 2\), expected \(3, 2, 1\) for a grid of "
                                         r"\(3, 2, 2\)"):
        check_faces(bad_shape, shape)
    for value in (-1.0, np.nan, np.inf):
        bad_value = [good[0], np.full((3, 1, 2), value), good[2]]
        with pytest.raises(ValueError, match="along y must be finite and >= 0"):
            check_faces(bad_value, shape)
