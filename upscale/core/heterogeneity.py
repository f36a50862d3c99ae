"""Heterogeneity measures of permeability samples.

Coefficient of variation, Dykstra-Parsons coefficient and Lorenz coefficient, plus the
weighted percentile they rely on. All functions are plain numpy and take 1-D sample arrays
(anything array-like; it is flattened) with optional non-negative weights, e.g. cell bulk
volume (m3) or cell thickness (m). Permeability in any consistent unit (mD in this package);
the coefficients are dimensionless.

Conventions shared by every function:

* samples with zero weight are ignored (so inactive cells can be passed with weight 0, and
  their values may even be NaN);
* weights act as frequencies: a sample of weight 2 counts exactly as two copies of it, and
  scaling all weights by the same positive factor changes nothing;
* all samples equal -> 0.0; no sample of positive weight (empty input, or zero total
  weight) -> NaN;
* negative or non-finite weights, and non-finite values of positive weight, raise
  ``ValueError``.
"""

from __future__ import annotations

import numpy as np

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
    values, weight = values[keep], weight[keep]
    if not np.all(np.isfinite(values)):
        raise ValueError("values must be finite where the weight is positive")
    return values, weight


def _all_equal(values: np.ndarray) -> bool:
    """Whether there are samples and all are equal."""
    return values.size > 0 and values.min() == values.max()


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
    values, weight = _samples(values, weight)
    if values.size == 0:
        result = np.full(q.shape, np.nan)
    else:
        distinct, index = np.unique(values, return_inverse=True)
        step = np.bincount(index.ravel(), weights=weight, minlength=distinct.size)
        cumulative = np.cumsum(step)
        position = (cumulative - step / 2) / cumulative[-1]
        result = np.interp(q / 100.0, position, distinct)
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
    k, weight = _samples(k, weight)
    if k.size == 0:
        return float("nan")
    if _all_equal(k):
        return 0.0
    total = weight.sum()
    mean = np.dot(weight, k) / total
    if mean == 0:
        return float("nan")
    variance = np.dot(weight, (k - mean) ** 2) / total
    return float(np.sqrt(variance) / mean)


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
    k, weight = _samples(k, weight)
    if k.size == 0:
        return float("nan")
    if _all_equal(k):
        return 0.0
    k50, k841 = weighted_percentile(k, weight, [50.0, DP_LOW_PERCENTILE])
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
    k, porosity, thickness = _lorenz_samples(k, porosity, thickness)
    flow = k * thickness
    storage = porosity * thickness
    carries = (flow > 0) | (storage > 0)
    flow, storage = flow[carries], storage[carries]
    if flow.size == 0:
        return float("nan")
    total_flow, total_storage = flow.sum(), storage.sum()
    if total_storage == 0:
        return float("nan")
    if total_flow == 0:
        return 0.0
    ratio = np.full(flow.shape, np.inf)
    np.divide(flow, storage, out=ratio, where=storage > 0)
    if _all_equal(ratio):
        return 0.0
    order = np.argsort(-ratio, kind="stable")
    flow_curve = np.concatenate(([0.0], np.cumsum(flow[order]) / total_flow))
    storage_curve = np.concatenate(([0.0], np.cumsum(storage[order]) / total_storage))
    area = np.sum(np.diff(storage_curve) * (flow_curve[1:] + flow_curve[:-1]) / 2)
    # Sorting makes the curve concave, so A >= 0.5 exactly; clip only rounding noise.
    return float(np.clip(2.0 * (area - 0.5), 0.0, 1.0))


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
    k, porosity, thickness = k[keep], porosity[keep], thickness[keep]
    if not (np.all(np.isfinite(k)) and np.all(np.isfinite(porosity))):
        raise ValueError("k and porosity must be finite where the thickness is positive")
    if np.any(k < 0) or np.any(porosity < 0):
        raise ValueError("k and porosity must be >= 0")
    return k, porosity, thickness
