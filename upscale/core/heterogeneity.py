"""Heterogeneity measures of permeability samples.

Coefficient of variation, Dykstra-Parsons coefficient and Lorenz coefficient, plus the
weighted percentile they rely on. Each is a measure that reads its samples slab by slab,
in two passes or a few (:class:`CoefficientOfVariation`, :class:`DykstraParsons`,
:class:`LorenzCurve`, :class:`upscale.core.order_statistics.Percentiles`), so that a field
larger than memory gets the numbers it would get in memory; the functions of the same
names run them on samples held in memory. Samples are 1-D (anything array-like is
flattened), with optional non-negative weights, e.g. cell bulk volume (m3) or cell
thickness (m). Permeability in any consistent unit (mD in this package); the coefficients
are dimensionless.

Conventions shared by every measure:

* samples with zero weight are ignored (so inactive cells can be passed with weight 0, and
  their values may even be NaN);
* weights act as frequencies: a sample of weight 2 counts exactly as two copies of it, and
  scaling all weights by the same positive factor changes nothing;
* all samples equal -> 0.0; no sample of positive weight (empty input, or zero total
  weight) -> NaN;
* negative or non-finite weights, and non-finite values of positive weight, raise
  ``ValueError``.

Exactness: the percentiles are exact (the sorted samples around them are found in passes,
:mod:`upscale.core.order_statistics`), so is the coefficient of variation (two passes:
the mean, then the squared deviations), both to the round-off of sums. The Lorenz
coefficient is that of the Lorenz curve through 2^18 logarithmic bins of k / porosity
(:data:`LORENZ_BINS`); its distance from the curve of the sorted samples is at most the
bound :meth:`LorenzCurve.result` returns with it (0 when no bin holds two different ratios).
"""

from __future__ import annotations

import numpy as np

from .order_statistics import Percentiles, in_one_slab

#: Percentile used for "k84.1", the value exceeded by 84.1 % of the samples.
DP_LOW_PERCENTILE = 15.9


def _samples(values, weight) -> tuple[np.ndarray, np.ndarray]:
    """Flattened values and weights, restricted to samples of positive weight."""
    values = np.ravel(np.asarray(values, dtype=float))
    if weight is None:
        weight = np.ones(values.shape)
    else:
        weight = np.ravel(np.asarray(weight, dtype=float))
        if weight.shape != values.shape:
            raise ValueError(f"weight has {weight.size} samples, values have {values.size}")
        if not np.all(np.isfinite(weight)) or np.any(weight < 0):
            raise ValueError("weights must be finite and >= 0")
    keep = weight > 0
    if not keep.all():
        values, weight = values[keep], weight[keep]
    if not np.all(np.isfinite(values)):
        raise ValueError("values must be finite where the weight is positive")
    return values, weight


def weighted_percentile(values, weight, q):
    """Weighted percentile(s) ``q`` (in percent, 0..100) of ``values``.

    Definition (a midpoint, or "Hazen", weighted CDF with linear interpolation): equal values
    are merged into distinct values u_1 < ... < u_m with total weights W_1..W_m; with
    C_j = W_1 + ... + W_j and W = C_m, value u_j is placed at cumulative probability
    P_j = (C_j - W_j / 2) / W, i.e. in the middle of its step of the weighted CDF. The
    percentile q is the linear interpolation of (P_j, u_j) at q / 100, and u_1 (u_m) below
    P_1 (above P_m). For unit weights and distinct values this is
    ``numpy.percentile(values, q, method="hazen")``. The definition depends only on the
    weighted distribution, so duplicating a sample equals doubling its weight.

    Parameters
    ----------
    values : array_like
    weight : array_like or None
        Like ``values``; None means all 1.
    q : float or array_like
        Percent, 0..100.

    Returns
    -------
    float or ndarray
        A float for scalar ``q``, else an array like ``q``; NaN if no sample has positive weight.
    """
    q = np.asarray(q, dtype=float)
    if np.any(~np.isfinite(q)) or np.any((q < 0) | (q > 100)):
        raise ValueError("percentiles q must be within 0..100")
    counted = weight is None
    values, weight = _samples(values, weight)
    measure = in_one_slab(Percentiles(q.ravel(), "hazen", weighted=not counted), values, None if counted else weight)
    result = measure.result().reshape(q.shape)
    return float(result) if result.ndim == 0 else result


def coefficient_of_variation(k, weight=None) -> float:
    """Weighted coefficient of variation of ``k``: weighted std / weighted mean.

    The std is the weighted population std sqrt(sum w (k - mean)^2 / sum w) (no n - 1
    correction, so that weights act as frequencies).

    Parameters
    ----------
    k : array_like
    weight : array_like, optional

    Returns
    -------
    float
        Dimensionless. All equal -> 0; no positive weight, or a zero mean of unequal
        samples -> NaN.
    """
    return in_one_slab(CoefficientOfVariation(), k, weight).result()


class CoefficientOfVariation:
    """:func:`coefficient_of_variation` of samples read slab by slab: the weighted mean in a
    first pass, the squared deviations from it in a second. Each pass, :meth:`feed` every
    slab, then :meth:`end_pass`, until :attr:`done`."""

    def __init__(self):
        self.passes, self.total, self.weighted, self.squares = 0, 0.0, 0.0, 0.0
        self.minimum = self.maximum = None

    def feed(self, k, weight=None) -> None:
        """One slab's samples and weights (as for :func:`coefficient_of_variation`)."""
        k, weight = _samples(k, weight)
        if k.size == 0:
            return
        if self.passes == 0:
            self.total += float(weight.sum())
            self.weighted += float(np.dot(weight, k))
            low, high = float(k.min()), float(k.max())
            self.minimum = low if self.minimum is None else min(self.minimum, low)
            self.maximum = high if self.maximum is None else max(self.maximum, high)
        else:
            self.squares += float(np.dot(weight, (k - self.mean) ** 2))

    def end_pass(self) -> None:
        self.passes += 1

    @property
    def mean(self) -> float:
        return self.weighted / self.total

    @property
    def done(self) -> bool:
        settled = self.minimum is None or self.minimum == self.maximum or self.mean == 0
        return self.passes >= 2 or (self.passes == 1 and settled)

    def result(self) -> float:
        """The coefficient (see :func:`coefficient_of_variation`)."""
        if self.minimum is None:
            return float("nan")
        if self.minimum == self.maximum:
            return 0.0
        if self.mean == 0:
            return float("nan")
        return float(np.sqrt(self.squares / self.total) / self.mean)


def dykstra_parsons(k, weight=None) -> float:
    """Dykstra-Parsons permeability variation V = (k50 - k84.1) / k50.

    k50 is the weighted median and k84.1 the value exceeded by 84.1 % of the (weighted)
    samples, i.e. the 15.9th weighted percentile (:func:`weighted_percentile`). For lognormal
    k, V = 1 - exp(-sigma_lnk).

    Parameters
    ----------
    k : array_like
    weight : array_like, optional

    Returns
    -------
    float
        Dimensionless, 0 <= V <= 1 for k >= 0. All equal -> 0; no positive weight, or a
        zero median of unequal samples -> NaN.
    """
    return in_one_slab(DykstraParsons(), k, weight).result()


class DykstraParsons:
    """:func:`dykstra_parsons` of samples read slab by slab: its two weighted percentiles
    found exactly in passes (:class:`~upscale.core.order_statistics.Percentiles`)."""

    def __init__(self):
        self.percentiles = Percentiles([50.0, DP_LOW_PERCENTILE], "hazen", weighted=True)

    def feed(self, k, weight=None) -> None:
        """One slab's samples and weights (as for :func:`dykstra_parsons`)."""
        k, weight = _samples(k, weight)
        self.percentiles.feed(k, weight)

    def end_pass(self) -> None:
        self.percentiles.end_pass()

    @property
    def done(self) -> bool:
        return self.percentiles.done

    def result(self) -> float:
        """The coefficient (see :func:`dykstra_parsons`)."""
        p = self.percentiles
        if p.minimum is None:
            return float("nan")
        if p.minimum == p.maximum:
            return 0.0
        k50, k841 = p.result()
        if k50 == 0:
            return float("nan")
        return float((k50 - k841) / k50)


def lorenz(k, porosity, thickness=None) -> float:
    """Lorenz coefficient of samples with permeability ``k``, ``porosity`` and ``thickness`` h.

    Samples are sorted by k / porosity, largest first; the cumulative flow capacity
    sum(k h) is plotted against the cumulative storage capacity sum(porosity h), both
    normalised to 1 and starting at the origin. Within a sample both grow in proportion, so
    the curve is exactly piecewise linear and the trapezoid rule gives its area A exactly;
    the coefficient is 2 (A - 0.5): 0 for a homogeneous set, approaching 1 when a vanishing
    part of the storage carries all the flow. Samples of zero thickness, and samples with
    neither flow nor storage capacity, are ignored; a sample with zero porosity and k > 0
    comes first (infinite k / porosity).

    Parameters
    ----------
    k, porosity : array_like
        Same number of samples, >= 0.
    thickness : array_like, optional
        >= 0, any unit; None means all 1.

    Returns
    -------
    float
        In [0, 1] (below 1 whenever every porosity is positive). All k / porosity equal, or
        no flow capacity at all (all k = 0) -> 0; no sample of positive thickness, or no
        storage capacity -> NaN.
    """
    return in_one_slab(LorenzCurve(), k, porosity, thickness).result()[0]


#: logarithmic bins of k / porosity between the least and the largest positive ratio
LORENZ_BINS = 1 << 18


class LorenzCurve:
    """:func:`lorenz` of samples read slab by slab, in two passes, with a bound on its error.

    First pass: the total flow and storage capacities, the range of the positive finite
    ratios r = flow / storage, the flow of the samples of no storage (infinite r, first)
    and the storage of those of no flow (r = 0, last). Second pass: per logarithmic bin of
    r (:data:`LORENZ_BINS` between the least and the largest), the flow and storage
    capacities and the least and largest r. The curve through the bins' totals, sorted by
    r, lies below the curve of the sorted samples (that one is concave) by at most
    s_B^2 (r_max - r_min) / 8 of area per bin (the triangle between a bin's chord and the
    lines of its extreme slopes), which bounds the error of the coefficient
    2 (A - 1/2) by sum over bins of s_B^2 (r_max - r_min) / (4 S F), S and F the totals.
    """

    def __init__(self, bins: int = LORENZ_BINS):
        self.bins, self.passes = bins, 0
        self.count, self.flow, self.storage = 0, 0.0, 0.0
        self.first_flow, self.last_storage = 0.0, 0.0
        self.low = self.high = None
        self.bin_flow = self.bin_storage = self.bin_low = self.bin_high = None

    def feed(self, k, porosity, thickness=None) -> None:
        """One slab's samples (as for :func:`lorenz`)."""
        flow, storage = _capacities(k, porosity, thickness)
        positive = (flow > 0) & (storage > 0)
        ratio = flow[positive] / storage[positive]
        if self.passes == 0:
            self.count += flow.size
            self.flow += float(flow.sum())
            self.storage += float(storage.sum())
            self.first_flow += float(flow[storage == 0].sum())
            self.last_storage += float(storage[flow == 0].sum())
            if ratio.size:
                low, high = float(ratio.min()), float(ratio.max())
                self.low = low if self.low is None else min(self.low, low)
                self.high = high if self.high is None else max(self.high, high)
            return
        if self.low is None:  # no positive finite ratio: nothing to bin
            return
        if self.bin_flow is None:
            self.bin_flow, self.bin_storage = np.zeros(self.bins), np.zeros(self.bins)
            self.bin_low, self.bin_high = np.full(self.bins, np.inf), np.full(self.bins, -np.inf)
        index = self._bin(ratio)
        self.bin_flow += np.bincount(index, weights=flow[positive], minlength=self.bins)
        self.bin_storage += np.bincount(index, weights=storage[positive], minlength=self.bins)
        np.minimum.at(self.bin_low, index, ratio)
        np.maximum.at(self.bin_high, index, ratio)

    def _bin(self, ratio: np.ndarray) -> np.ndarray:
        """The bin of each ratio (logarithmic between the least and the largest)."""
        span = np.log(self.high) - np.log(self.low)
        if span == 0:
            return np.zeros(ratio.size, dtype=np.intp)
        index = np.floor((np.log(ratio) - np.log(self.low)) * (self.bins / span)).astype(np.intp)
        return np.clip(index, 0, self.bins - 1)

    def end_pass(self) -> None:
        self.passes += 1

    def _settled(self):
        """The coefficient when the first pass decides it (NaN, or 0), else None."""
        if self.count == 0 or self.storage == 0:
            return float("nan")
        one_ratio = self.low is not None and self.low == self.high and self.first_flow == 0 and self.last_storage == 0
        if self.flow == 0 or one_ratio:
            return 0.0
        return None

    @property
    def done(self) -> bool:
        return self.passes >= 2 or (self.passes == 1 and self._settled() is not None)

    def result(self) -> tuple[float, float]:
        """(coefficient, bound): the coefficient of the binned curve and the most by which
        that of the sorted samples can exceed it (see the class notes)."""
        settled = self._settled()
        if settled is not None:
            return settled, 0.0
        filled = np.flatnonzero(self.bin_storage > 0)[::-1] if self.bin_storage is not None else np.zeros(0, int)
        storage = np.concatenate([[0.0], self.bin_storage[filled] if filled.size else [], [self.last_storage]])
        flow = np.concatenate([[self.first_flow], self.bin_flow[filled] if filled.size else [], [0.0]])
        total_flow, total_storage = flow.sum(), storage.sum()
        area = np.sum(storage * (np.cumsum(flow) - flow / 2)) / (total_flow * total_storage)
        width = self.bin_high[filled] - self.bin_low[filled] if filled.size else np.zeros(0)
        bound = float(np.sum(storage[1:-1] ** 2 * width) / (4 * total_flow * total_storage))
        # The binned curve is concave, so A >= 0.5 up to rounding; clip only rounding noise.
        return float(np.clip(2.0 * (area - 0.5), 0.0, 1.0)), bound


def _capacities(k, porosity, thickness) -> tuple[np.ndarray, np.ndarray]:
    """Flow (k h) and storage (porosity h) capacities of the samples that carry either."""
    k, porosity, thickness = _lorenz_samples(k, porosity, thickness)
    flow, storage = k * thickness, porosity * thickness
    carries = (flow > 0) | (storage > 0)
    return flow[carries], storage[carries]


def _lorenz_samples(k, porosity, thickness) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Flattened k, porosity and thickness of the samples of positive thickness, checked (ValueError)."""
    k = np.ravel(np.asarray(k, dtype=float))
    porosity = np.ravel(np.asarray(porosity, dtype=float))
    if porosity.shape != k.shape:
        raise ValueError(f"porosity has {porosity.size} samples, k has {k.size}")
    if thickness is None:
        thickness = np.ones(k.shape)
    thickness = np.ravel(np.asarray(thickness, dtype=float))
    if thickness.shape != k.shape:
        raise ValueError(f"thickness has {thickness.size} samples, k has {k.size}")
    if not np.all(np.isfinite(thickness)) or np.any(thickness < 0):
        raise ValueError("thickness must be finite and >= 0")
    keep = thickness > 0
    if not keep.all():
        k, porosity, thickness = k[keep], porosity[keep], thickness[keep]
    if not (np.all(np.isfinite(k)) and np.all(np.isfinite(porosity))):
        raise ValueError("k and porosity must be finite where the thickness is positive")
    if np.any(k < 0) or np.any(porosity < 0):
        raise ValueError("k and porosity must be >= 0")
    return k, porosity, thickness
