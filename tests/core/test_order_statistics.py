"""Exact percentiles of samples fed slab by slab (upscale.core.order_statistics) against
numpy's own percentiles of all the samples sorted at once."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from upscale.core.order_statistics import Percentiles, key_values, sort_keys

Q = (0.0, 10.0, 15.9, 50.0, 90.0, 100.0)


def _fed(measure, values, weights, cuts):
    """Run ``measure`` feeding ``values`` (and ``weights``) cut at ``cuts`` each pass; its passes."""
    pieces = np.split(np.arange(values.size), cuts)
    while not measure.done:
        for piece in pieces:
            measure.feed(values[piece], None if weights is None else weights[piece])
        measure.end_pass()
    return measure


def _hazen(values, weights, q):
    """The weighted percentile written from its definition (midpoint plotting positions of
    the weighted CDF, Hazen's rule; Jensen, Lake, Corbett & Goggin 2000, from memory): the
    distinct values u_j of weight W_j at (C_j - W_j / 2) / W, linear in between."""
    distinct, index = np.unique(values, return_inverse=True)
    weight = np.zeros(distinct.size)
    np.add.at(weight, index, weights)
    position = (np.cumsum(weight) - weight / 2) / weight.sum()
    return np.interp(np.asarray(q) / 100, position, distinct)


floats = st.floats(allow_nan=False, width=64)


@given(st.lists(floats, min_size=2, max_size=50))
def test_keys_sort_as_the_values_do_and_come_back(values):
    values = np.array(values)
    keys = sort_keys(values)
    order = np.argsort(values, kind="stable")
    assert np.all(np.diff(keys[order].astype(object)) >= 0)   # non-decreasing in value order
    assert np.all((keys[:, None] < keys[None, :]) == (values[:, None] < values[None, :]))
    np.testing.assert_array_equal(key_values(keys), values + 0.0)   # -0.0 comes back as 0.0


def _samples(kind, n, seed):
    rng = np.random.default_rng(seed)
    if kind == "lognormal":
        return np.exp(rng.normal(3.0, 2.0, n))
    if kind == "ties":          # like net-to-gross: most cells exactly 1, the rest spread
        return np.where(rng.random(n) < 0.6, 1.0, rng.uniform(0.1, 1.0, n))
    if kind == "few values":    # a handful of distinct values, each many times
        return rng.choice([0.0, 0.05, 0.2, 0.2000000000000001, 3.0], n)
    return rng.normal(0.0, 1.0, n).astype(np.float32).astype(float)   # float32 data, signs


@pytest.mark.parametrize("kind", ["lognormal", "ties", "few values", "float32"])
@pytest.mark.parametrize("limit", [3, 1000, None])
def test_linear_percentiles_in_slabs_equal_numpy_exactly(kind, limit):
    # The same floating-point number as numpy.percentile of all the samples at once (its
    # default 'linear' method): the order statistics are found exactly and interpolated with
    # numpy's own arithmetic; slabs of several sizes and a tiny collection limit (many passes).
    values = _samples(kind, 20_000, seed=3)
    expected = np.percentile(values, Q)
    for cuts in ([], [1, 2, 3], list(range(997, 20_000, 997)), [19_999]):
        measure = _fed(Percentiles(Q, "linear", limit=limit), values, None, cuts)
        np.testing.assert_array_equal(measure.result(), expected, err_msg=f"{kind} {limit} {len(cuts)}")
        assert measure.minimum == values.min() and measure.maximum == values.max() and measure.count == values.size
        assert measure.passes <= (2 if limit is None else 6)
        if kind == "lognormal" and limit == 3:
            assert measure.passes >= 3   # the bins were narrowed, not collected at once


@pytest.mark.parametrize("kind", ["lognormal", "ties", "few values"])
@pytest.mark.parametrize("limit", [3, None])
def test_weighted_percentiles_in_slabs_equal_the_definition(kind, limit):
    # Weights act as frequencies; against the definition written above from all samples
    # sorted. The cumulative weights are float sums in another order: round-off, 1e-12.
    rng = np.random.default_rng(8)
    values = _samples(kind, 5_000, seed=4)
    weights = rng.uniform(0.1, 3.0, values.size)
    expected = _hazen(values, weights, Q)
    for cuts in ([], list(range(333, 5_000, 333))):
        measure = _fed(Percentiles(Q, "hazen", weighted=True, limit=limit), values, weights, cuts)
        np.testing.assert_allclose(measure.result(), expected, rtol=1e-12, atol=0, err_msg=kind)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(0, 1e6, allow_nan=False), min_size=1, max_size=40), st.integers(1, 5),
       st.lists(st.integers(0, 40), max_size=4))
def test_any_samples_any_slabs_any_limit(values, limit, cuts):
    values = np.array(values)
    cuts = sorted({c for c in cuts if 0 < c < values.size})
    measure = _fed(Percentiles(Q, "linear", limit=limit), values, None, cuts)
    np.testing.assert_array_equal(measure.result(), np.percentile(values, Q))


def test_without_samples_every_percentile_is_nan():
    measure = _fed(Percentiles(Q, "linear"), np.zeros(0), None, [])
    assert np.all(np.isnan(measure.result())) and measure.count == 0
