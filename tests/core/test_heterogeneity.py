"""Tests of upscale.heterogeneity against closed forms for lognormal permeability."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import norm

from upscale.core.heterogeneity import (
    DP_LOW_PERCENTILE,
    LORENZ_BINS,
    CoefficientOfVariation,
    DykstraParsons,
    LorenzCurve,
    coefficient_of_variation,
    dykstra_parsons,
    lorenz,
    weighted_percentile,
)
from upscale.core.order_statistics import in_one_slab

N = 200_000
BATCHES = 20


def lognormal(sigma, seed=12345):
    return np.exp(np.random.default_rng(seed).normal(3.0, sigma, N))


def batch_standard_error(estimate, *samples):
    """Standard error of ``estimate`` on the full sample, from its spread over equal batches.

    Each of the BATCHES batches has N / BATCHES samples, so the spread of the batch estimates
    is sqrt(BATCHES) times the standard error of the full-sample estimate.
    """
    parts = [np.array_split(s, BATCHES) for s in samples]
    values = [estimate(*(p[i] for p in parts)) for i in range(BATCHES)]
    return float(np.std(values, ddof=1) / math.sqrt(BATCHES))


@pytest.mark.parametrize("sigma", [0.5, 1.0, 2.0])
def test_dykstra_parsons_of_lognormal(sigma):
    k = lognormal(sigma)
    # Dykstra & Parsons 1950; Jensen, Lake, Corbett & Goggin 2000, Statistics for Petroleum
    # Engineers and Geoscientists: for lognormal k, V = 1 - exp(-sigma_lnk).
    expected = 1.0 - math.exp(-sigma)
    # Sampling error: the sample p-quantile of a standard normal has asymptotic variance
    # p (1 - p) / (n phi(z_p)^2), and two quantiles p1 < p2 covariance p1 (1 - p2) /
    # (n phi(z_p1) phi(z_p2)). V = 1 - exp(sigma (z_a - z_b)), a = 0.159, b = 0.5, so its
    # standard error is exp(sigma z_a) * sigma * sd(z_a - z_b) (delta method).
    a, b = DP_LOW_PERCENTILE / 100, 0.5
    za, zb = norm.ppf(a), norm.ppf(b)
    fa, fb = norm.pdf(za), norm.pdf(zb)
    var_diff = (a * (1 - a) / fa**2 + b * (1 - b) / fb**2 - 2 * a * (1 - b) / (fa * fb)) / N
    standard_error = math.exp(sigma * za) * sigma * math.sqrt(var_diff)
    # "k84.1" is the 15.9th percentile, not exactly Phi(-1) = 15.87 %: a known small offset.
    offset = abs(math.exp(sigma * za) - math.exp(-sigma))
    assert dykstra_parsons(k) == pytest.approx(expected, abs=5 * standard_error + offset)


@pytest.mark.parametrize("sigma", [0.5, 1.0, 2.0])
def test_lorenz_of_lognormal_is_its_gini(sigma):
    k = lognormal(sigma)
    porosity = np.full(N, 0.2)
    # Schmalz & Rahme 1950 (Lorenz coefficient); with uniform porosity it is the Gini
    # coefficient of k, which for a lognormal is erf(sigma / 2) (Aitchison & Brown 1957,
    # The Lognormal Distribution).
    expected = math.erf(sigma / 2)
    # Tolerance: 5 standard errors of the estimate, from the spread over batches (the
    # O(1/n) bias of the sample Lorenz coefficient, ~1e-5 here, is far below that).
    standard_error = batch_standard_error(lorenz, k, porosity)
    assert 0 < standard_error < 0.01
    assert lorenz(k, porosity) == pytest.approx(expected, abs=5 * standard_error)


@pytest.mark.parametrize("sigma", [0.25, 0.5])
def test_coefficient_of_variation_of_lognormal(sigma):
    # Only modest sigma: the sample CV involves the 4th moment, E[k^4] / E[k]^4 = exp(6 sigma^2),
    # so for sigma >= 1 it converges far too slowly for a test of this size.
    k = lognormal(sigma)
    # Standard lognormal moment (Aitchison & Brown 1957, The Lognormal Distribution):
    # CV = sqrt(exp(sigma^2) - 1).
    expected = math.sqrt(math.exp(sigma**2) - 1)
    standard_error = batch_standard_error(coefficient_of_variation, k)
    assert coefficient_of_variation(k) == pytest.approx(expected, abs=5 * standard_error)


def test_lognormal_with_independent_weights_keeps_its_distribution():
    # Weights drawn independently of k leave the weighted distribution lognormal(sigma = 1),
    # so the same closed forms hold (sources as in the three tests above); tolerance again
    # 5 batch standard errors, plus the 15.9 % vs Phi(-1) offset for Dykstra-Parsons.
    sigma = 1.0
    k = lognormal(sigma)
    weight = np.random.default_rng(7).choice([1.0, 2.0, 5.0], N)
    porosity = np.full(N, 0.2)
    offset = abs(math.exp(sigma * norm.ppf(DP_LOW_PERCENTILE / 100)) - math.exp(-sigma))
    checks = [
        (dykstra_parsons, (k, weight), 1 - math.exp(-sigma), offset),  # Dykstra & Parsons 1950
        (lorenz, (k, porosity, weight), math.erf(sigma / 2), 0.0),  # Aitchison & Brown 1957
    ]
    for estimate, samples, expected, extra in checks:
        standard_error = batch_standard_error(estimate, *samples)
        assert estimate(*samples) == pytest.approx(expected, abs=5 * standard_error + extra), estimate.__name__


def test_uniform_sample_gives_zero():
    k = np.full(50, 123.0)
    weight = np.linspace(1, 5, 50)
    assert coefficient_of_variation(k) == 0.0
    assert coefficient_of_variation(k, weight) == 0.0
    assert dykstra_parsons(k, weight) == 0.0
    assert lorenz(k, np.full(50, 0.25), weight) == 0.0
    assert coefficient_of_variation(np.zeros(5)) == 0.0
    assert dykstra_parsons(np.zeros(5)) == 0.0
    # Lorenz sees only k / porosity: proportional k and porosity are homogeneous.
    porosity = np.linspace(0.1, 0.3, 50)
    assert lorenz(100 * porosity, porosity, weight) == 0.0
    assert lorenz(np.zeros(5), np.full(5, 0.2)) == 0.0


def test_empty_or_zero_weight_gives_nan():
    assert math.isnan(coefficient_of_variation([]))
    assert math.isnan(dykstra_parsons([]))
    assert math.isnan(lorenz([], []))
    assert math.isnan(weighted_percentile([], None, 50))
    zero = np.zeros(3)
    assert math.isnan(coefficient_of_variation([1, 2, 3], zero))
    assert math.isnan(dykstra_parsons([1, 2, 3], zero))
    assert math.isnan(lorenz([1, 2, 3], [0.1, 0.2, 0.3], zero))
    assert np.all(np.isnan(weighted_percentile([1, 2, 3], zero, [10, 90])))
    # No storage capacity at all: undefined.
    assert math.isnan(lorenz([1.0, 2.0], [0.0, 0.0]))


def test_zero_weight_samples_are_ignored():
    k = np.array([10.0, 50.0, 200.0, 7.0])
    phi = np.array([0.1, 0.2, 0.25, 0.15])
    w = np.array([1.0, 2.0, 1.0, 3.0])
    padded_k = np.append(k, [np.nan, 1e9])
    padded_phi = np.append(phi, [np.nan, 0.01])
    padded_w = np.append(w, [0.0, 0.0])
    assert coefficient_of_variation(padded_k, padded_w) == coefficient_of_variation(k, w)
    assert dykstra_parsons(padded_k, padded_w) == dykstra_parsons(k, w)
    assert lorenz(padded_k, padded_phi, padded_w) == lorenz(k, phi, w)
    assert weighted_percentile(padded_k, padded_w, 37) == weighted_percentile(k, w, 37)


def test_bad_weights_are_refused():
    with pytest.raises(ValueError):
        coefficient_of_variation([1.0, 2.0], [1.0, -1.0])
    with pytest.raises(ValueError):
        dykstra_parsons([1.0, np.nan], [1.0, 1.0])
    with pytest.raises(ValueError):
        lorenz([1.0, 2.0], [0.1])
    with pytest.raises(ValueError):
        weighted_percentile([1.0, 2.0], None, 101)


def test_weighted_percentile_definition():
    values = np.array([4.0, 1.0, 3.0, 2.0, 9.0])
    q = np.array([0, 5, 10, 25, 50, 75, 90, 95, 100])
    # Unit weights, distinct values: numpy's "hazen" method.
    np.testing.assert_allclose(weighted_percentile(values, None, q),
                               np.percentile(values, q, method="hazen"), rtol=1e-12)
    # Values 1 and 2 with weights 3 and 1 sit at P = 1.5/4 and 3.5/4 of the weighted CDF.
    assert weighted_percentile([1.0, 2.0], [3.0, 1.0], 50) == pytest.approx(1.25, rel=1e-12)
    assert weighted_percentile([1.0, 2.0], [3.0, 1.0], 30) == 1.0
    assert weighted_percentile([1.0, 2.0], [3.0, 1.0], 90) == 2.0
    assert isinstance(weighted_percentile(values, None, 50), float)


def test_dykstra_parsons_by_hand():
    # Ten equal-weight values 1..10: P_j = (j - 0.5) / 10, so k50 = 5.5 and the 15.9th
    # percentile lies between P_2 = 0.15 and P_3 = 0.25: 2 + (0.159 - 0.15) / 0.1 = 2.09.
    k = np.arange(1.0, 11.0)
    assert dykstra_parsons(k) == pytest.approx((5.5 - 2.09) / 5.5, rel=1e-12)


def test_lorenz_by_hand():
    # Two equal layers, k 3 and 1: curve (0, 0), (0.5, 0.75), (1, 1); area 0.625.
    assert lorenz([1.0, 3.0], [0.2, 0.2]) == pytest.approx(0.25, rel=1e-12)
    # Thickness weights: layer k=3 twice as thick -> (0, 0), (2/3, 6/7), (1, 1).
    area = (2 / 3) * (6 / 7) / 2 + (1 / 3) * (6 / 7 + 1) / 2
    assert lorenz([1.0, 3.0], [0.2, 0.2], [1.0, 2.0]) == pytest.approx(2 * (area - 0.5), rel=1e-12)


positive = st.floats(min_value=1e-3, max_value=1e4, allow_nan=False, allow_infinity=False)
weights = st.floats(min_value=0.1, max_value=10.0, allow_nan=False, allow_infinity=False)
porosities = st.floats(min_value=0.01, max_value=0.4, allow_nan=False, allow_infinity=False)


@st.composite
def weighted_samples(draw):
    n = draw(st.integers(1, 30))
    k = np.array(draw(st.lists(positive, min_size=n, max_size=n)))
    phi = np.array(draw(st.lists(porosities, min_size=n, max_size=n)))
    w = np.array(draw(st.lists(weights, min_size=n, max_size=n)))
    j = draw(st.integers(0, n - 1))
    return k, phi, w, j


def close(a, b):
    return math.isclose(a, b, rel_tol=1e-9, abs_tol=1e-9)


@settings(max_examples=150, deadline=None)
@given(weighted_samples(), st.floats(min_value=0, max_value=100))
def test_duplicating_a_sample_equals_weight_two(sample, q):
    k, phi, w, j = sample
    dup_k, dup_phi, dup_w = np.append(k, k[j]), np.append(phi, phi[j]), np.append(w, w[j])
    doubled = w.copy()
    doubled[j] *= 2
    ones, twos = np.ones(k.size + 1), np.ones(k.size)
    twos[j] = 2
    for weight, weight_dup, name in ((doubled, dup_w, "weights"), (twos, ones, "unit")):
        assert close(coefficient_of_variation(dup_k, weight_dup), coefficient_of_variation(k, weight)), name
        assert close(dykstra_parsons(dup_k, weight_dup), dykstra_parsons(k, weight)), name
        assert close(lorenz(dup_k, dup_phi, weight_dup), lorenz(k, phi, weight)), name
        assert close(weighted_percentile(dup_k, weight_dup, q), weighted_percentile(k, weight, q)), name


@settings(max_examples=150, deadline=None)
@given(weighted_samples(), st.floats(min_value=1e-3, max_value=1e3))
def test_lorenz_range_and_scale_invariance(sample, scale):
    k, phi, w, _ = sample
    value = lorenz(k, phi, w)
    assert 0.0 <= value < 1.0
    assert close(lorenz(scale * k, phi, w), value)


def _sorted_lorenz(flow, storage):
    """Schmalz & Rahme (1950): samples sorted by flow over storage capacity, largest first;
    cumulative fractions of flow against storage from the origin; 2 (area - 1/2)."""
    order = np.argsort(-flow / storage)
    f = np.concatenate([[0.0], np.cumsum(flow[order]) / flow.sum()])
    s = np.concatenate([[0.0], np.cumsum(storage[order]) / storage.sum()])
    return float(2 * (np.trapezoid(f, s) - 0.5))


@pytest.mark.parametrize("bins", [16, 1 << 10, LORENZ_BINS])
def test_binned_lorenz_is_below_the_sorted_one_by_at_most_its_bound(bins):
    # The curve through the bins' totals lies below the concave curve of the sorted samples;
    # the bound (a triangle per bin) must cover the gap. A cluster of nearly equal ratios
    # shares one bin even when bins are fine, and coarse bins make the bound large.
    rng = np.random.default_rng(21)
    k = np.concatenate([np.exp(rng.normal(3.0, 2.0, 40_000)), 100.0 * (1 + 1e-7 * rng.random(5_000))])
    porosity = np.concatenate([rng.uniform(0.05, 0.3, 40_000), np.full(5_000, 0.2)])
    thickness = rng.uniform(0.5, 2.0, k.size)
    curve = in_one_slab(LorenzCurve(bins), k, porosity, thickness)
    value, bound = curve.result()
    exact = _sorted_lorenz(k * thickness, porosity * thickness)
    # 1e-12: rounding of the two areas (sums of 45,000 terms of order 1)
    assert value <= exact + 1e-12 and exact <= value + bound + 1e-12, (value, exact, bound)
    if bins == 16:
        assert bound > 1e-3 and exact - value > 0.01 * bound   # coarse bins: a real gap, still covered
    if bins == LORENZ_BINS:
        assert bound < 1e-6


def test_the_measures_in_slabs_equal_the_measures_in_memory():
    # Fed in slabs of several sizes, pass after pass, each measure gives its in-memory
    # value up to the round-off of sums in another order (1e-12).
    rng = np.random.default_rng(5)
    k, porosity, weight = np.exp(rng.normal(2.0, 1.5, 30_000)), rng.uniform(0.1, 0.3, 30_000), rng.uniform(1, 3, 30_000)
    for cuts in ([7], list(range(1000, 30_000, 1000)), [29_999]):
        pieces = np.split(np.arange(k.size), cuts)
        for measure, arrays, expected in ((CoefficientOfVariation(), (k, weight), coefficient_of_variation(k, weight)),
                                          (DykstraParsons(), (k, weight), dykstra_parsons(k, weight)),
                                          (LorenzCurve(), (k, porosity, weight), lorenz(k, porosity, weight))):
            while not measure.done:
                for piece in pieces:
                    measure.feed(*(a[piece] for a in arrays))
                measure.end_pass()
            got = measure.result()
            got = got[0] if isinstance(got, tuple) else got
            assert got == pytest.approx(expected, rel=1e-12), type(measure).__name__
