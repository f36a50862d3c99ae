"""Grouping fine layers into coarse layers: judging a grouping, and finding the best one.

A *grouping* of the ``nz`` fine layers (z counts layers from the top) into ``G`` coarse layers
is given by its *edges*: a strictly increasing integer sequence ``[0, e_1, ..., e_{G-1}, nz]``;
coarse layer ``g`` holds the fine layers ``edges[g] <= l < edges[g+1]``.

Everything is built on per-fine-layer statistics (:func:`layer_statistics`), so judging a
grouping or searching for the best one never goes back to the cells. The main quantity is
``ln kh`` with ``kh = kx * ntg`` in mD (logs of mD: "ln mD" below), weighted by cell bulk volume
(m3) over the active cells with ``kh > 0`` (a cell with ``kh = 0`` has no logarithm; it still
counts in the arithmetic and flow-capacity statistics).

* :func:`layer_statistics` -- per-layer arrays from a :class:`~upscale.core.grid.GridArrays`.
* :func:`judge_grouping` -- how much of the ln kh variance a grouping keeps between coarse
  layers, and per-group measures of what averaging inside each group hides.
* :func:`optimal_grouping` -- the exact minimiser of the within-group variance of ln kh
  (dynamic programme over layer boundaries, O(G * nz^2) with O(1) group costs).
* :func:`uniform_grouping`, :func:`compare_groupings`.

Reading a field slab by slab: :mod:`upscale.checks.layering`; the table and the figure:
:mod:`upscale.report`.
"""

from __future__ import annotations

import math
import numbers

import numpy as np

from ..errors import InputError
from .grid import GridArrays

#: Keys :func:`optimal_grouping` needs in ``stats``; :func:`judge_grouping` needs all of STAT_KEYS.
OPTIMAL_KEYS = ("weight", "lnk_mean", "lnk_var")


STAT_KEYS = ("bulk_volume", "weight", "thickness", "lnk_mean", "lnk_var", "kh_mean", "kz_harmonic",
             "porosity_mean", "capacity_x", "capacity_y", "flow_share_x", "flow_share_y")


OBJECTIVES = ("within_variance",)


def _layer_sum(values: np.ndarray) -> np.ndarray:
    """Sum over the cells of each layer, (nz,)."""
    return np.sum(values, axis=(0, 1))


def _ratio(numerator: np.ndarray, denominator: np.ndarray) -> np.ndarray:
    """numerator / denominator, NaN where the denominator is 0."""
    out = np.full(np.shape(numerator), np.nan)
    np.divide(numerator, denominator, out=out, where=denominator > 0)
    return out


def layer_statistics(cells: GridArrays) -> dict:
    """Per-fine-layer statistics, each a float array of shape (nz,).

    Statistics of an empty set (no active cell, or weight 0 for the ln kh ones) are NaN,
    except sums and thickness, which are 0. Every statistic is built from per-layer sums
    (:func:`layer_sums`), so that a field read slab by slab, its sums joined by
    :func:`combine_sums`, gives the same result (:func:`statistics_from_sums`,
    :func:`upscale.checks.layering.field_layer_statistics`).

    Parameters
    ----------
    cells : GridArrays

    Returns
    -------
    dict
        With ``b`` the cell bulk volume (m3), sums running over the cells of one layer:

        ``bulk_volume``   m3: sum of b over active cells.
        ``weight``        m3: sum of b over active cells with kh > 0 -- the weight of the layer in
                          every ln kh statistic (0 for a layer with no such cell, e.g. all pinched).
        ``thickness``     m: mean dz over active cells, area (dx*dy) weighted, i.e. active bulk
                          volume / active area (0 for a layer with no active cell).
        ``lnk_mean``      ln mD: bulk-weighted mean of ln kh over active cells with kh > 0.
        ``lnk_var``       (ln mD)^2: bulk-weighted (population) variance of ln kh over the same cells.
        ``kh_mean``       mD: bulk-weighted arithmetic mean of kh = kx*ntg over active cells.
        ``kz_harmonic``   mD: bulk-weighted harmonic mean of kz over active cells (0 if any is 0).
        ``porosity_mean`` 1: bulk-weighted mean of porosity*ntg over active cells.
        ``capacity_x``    mD*m2: flow capacity along x, sum over the layer's cells of
                          kx*ntg * dy*dz (cross-section area), averaged along x with dx weights
                          (sum of kx*ntg*dy*dz*dx / sum dx); ``capacity_y`` likewise with ky, dx*dz, dy.
        ``flow_share_x``  1: capacity_x / its sum over all layers (the layer's share of the flow
                          along x in a layer-cake); ``flow_share_y`` likewise.
    """
    return statistics_from_sums(layer_sums(cells))


def layer_sums(cells: GridArrays) -> dict:
    """Per-layer sums of a box of cells, from which :func:`statistics_from_sums` builds the statistics.

    Parameters
    ----------
    cells : GridArrays
        All columns of some x range.

    Returns
    -------
    dict
        Each (nz,); ``lnk_m2`` is the weighted sum of squared deviations of ln kh from
        ``lnk_mean`` (the mean of these cells).
    """
    active = np.asarray(cells.active, dtype=bool)
    bulk = cells.bulk_volume * active
    kh_x, kh_y, kz = cells.flow_permeability()
    has_log = active & (kh_x > 0)
    w = bulk * has_log
    lnk = np.log(np.where(has_log, kh_x, 1.0))
    weight = _layer_sum(w)
    lnk_mean = np.nan_to_num(_ratio(_layer_sum(w * lnk), weight))
    dz = cells.dz * active
    return {
        "bulk_volume": _layer_sum(bulk), "weight": weight, "lnk_mean": lnk_mean,
        "lnk_m2": _layer_sum(w * (lnk - lnk_mean[None, None, :]) ** 2),
        "area": _layer_sum((cells.dx[:, None, None] * cells.dy[None, :, None]) * active),
        "kh_volume": _layer_sum(bulk * kh_x),
        # harmonic mean of kz: any active cell with kz = 0 blocks it
        "kz_blocked": _layer_sum(active & (kz <= 0)).astype(float),
        "kz_inverse": _layer_sum(np.where(active & (kz > 0), bulk / np.where(kz > 0, kz, 1.0), 0.0)),
        "pore_volume": _layer_sum(bulk * cells.porosity * cells.ntg),
        "flow_x": _layer_sum(kh_x * cells.dy[None, :, None] * dz * cells.dx[:, None, None]),
        "flow_y": _layer_sum(kh_y * cells.dx[:, None, None] * dz * cells.dy[None, :, None]),
        "length_x": cells.dx.sum(), "length_y": cells.dy.sum(),  # slabs along x share the y extent
    }


def combine_sums(a: dict, b: dict) -> dict:
    """Sums of two boxes of whole columns side by side along x.

    Chan, Golub & LeVeque 1983 for the weighted mean and squared deviations of ln kh.

    Parameters
    ----------
    a, b : dict
        :func:`layer_sums` of the two boxes, ``a`` the one at lower x.

    Returns
    -------
    dict
        The sums of both boxes together.
    """
    out = {key: a[key] + b[key] for key in a if key not in ("lnk_mean", "lnk_m2", "length_y")}
    weight = out["weight"]
    share = np.divide(b["weight"], weight, out=np.zeros_like(weight), where=weight > 0)
    delta = b["lnk_mean"] - a["lnk_mean"]
    out["lnk_mean"] = a["lnk_mean"] + delta * share
    out["lnk_m2"] = a["lnk_m2"] + b["lnk_m2"] + delta ** 2 * a["weight"] * share
    out["length_y"] = a["length_y"]
    return out


def statistics_from_sums(sums: dict) -> dict:
    """The statistics of :func:`layer_statistics` from per-layer sums.

    Parameters
    ----------
    sums : dict
        From :func:`layer_sums` (or :func:`combine_sums`).

    Returns
    -------
    dict
        As :func:`layer_statistics`.
    """
    bulk_volume, weight = sums["bulk_volume"], sums["weight"]
    kz_harmonic = np.where(sums["kz_blocked"] > 0, 0.0, _ratio(bulk_volume, sums["kz_inverse"]))
    kz_harmonic[bulk_volume <= 0] = np.nan
    capacity_x = sums["flow_x"] / sums["length_x"]
    capacity_y = sums["flow_y"] / sums["length_y"]
    return {"bulk_volume": bulk_volume, "weight": weight,
            "thickness": np.nan_to_num(_ratio(bulk_volume, sums["area"])),
            "lnk_mean": np.where(weight > 0, sums["lnk_mean"], np.nan), "lnk_var": _ratio(sums["lnk_m2"], weight),
            "kh_mean": _ratio(sums["kh_volume"], bulk_volume), "kz_harmonic": kz_harmonic,
            "porosity_mean": _ratio(sums["pore_volume"], bulk_volume),
            "capacity_x": capacity_x, "capacity_y": capacity_y,
            "flow_share_x": _ratio(capacity_x, np.array(capacity_x.sum())),
            "flow_share_y": _ratio(capacity_y, np.array(capacity_y.sum()))}


def _layer_moments(stats: dict, keys=OPTIMAL_KEYS) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Checked weight w, mean m and variance v of ln kh per layer (m, v set to 0 where w = 0)."""
    missing = [k for k in keys if k not in stats]
    if missing:
        raise InputError(f"layer statistics lack {', '.join(missing)}; build them with layer_statistics()")
    w = np.asarray(stats["weight"], dtype=float)
    if w.ndim != 1 or w.size == 0:
        raise InputError(f"layer statistics: 'weight' must be a non-empty 1-D array, got shape {w.shape}")
    for name in keys:
        if np.shape(stats[name]) != w.shape:
            raise InputError(f"layer statistics: '{name}' has shape {np.shape(stats[name])}, "
                             f"expected {w.shape} like 'weight'")
    if not np.all(np.isfinite(w)) or np.any(w < 0):
        raise InputError("layer statistics: 'weight' must be finite and >= 0")
    positive = w > 0
    m = np.where(positive, np.asarray(stats["lnk_mean"], dtype=float), 0.0)
    v = np.where(positive, np.asarray(stats["lnk_var"], dtype=float), 0.0)
    if not (np.all(np.isfinite(m)) and np.all(np.isfinite(v))) or np.any(v < 0):
        raise InputError("layer statistics: 'lnk_mean' and 'lnk_var' must be finite (and the "
                         "variance >= 0) in layers of positive weight")
    return w, m, v


def _prefix_sums(w: np.ndarray, m: np.ndarray, v: np.ndarray):
    """Prefix sums (length nz+1) of w, w*m', w*(v + m'^2) with m' = m - overall mean.

    Centring on the overall mean keeps the differences S2 - S1^2/W free of cancellation
    (and makes them exactly blind to a constant shift of ln k, i.e. to scaling k).
    """
    total = w.sum()
    centre = float(np.sum(w * m) / total) if total > 0 else 0.0
    mc = np.where(w > 0, m - centre, 0.0)
    zero = np.zeros(1)
    p0 = np.concatenate([zero, np.cumsum(w)])
    p1 = np.concatenate([zero, np.cumsum(w * mc)])
    p2 = np.concatenate([zero, np.cumsum(w * (v + mc**2))])
    count = np.concatenate([[0], np.cumsum(w > 0)])
    return p0, p1, p2, count, centre


def _group_cost(p0, p1, p2, start, stop):
    """Within-group sum of w*(lnk - group mean)^2 for groups [start, stop), O(1) each; 0 if W = 0."""
    weight = p0[stop] - p0[start]
    first = p1[stop] - p1[start]
    second = p2[stop] - p2[start]
    square = np.zeros(np.broadcast(weight, first).shape)
    np.divide(first**2, weight, out=square, where=weight > 0)
    return np.maximum(second - square, 0.0)


def _check_count(n_groups, limit: int, what: str) -> int:
    """``n_groups`` as an int, checked to be a whole number from 1 to ``limit`` (InputError)."""
    if isinstance(n_groups, bool) or not isinstance(n_groups, numbers.Integral):
        raise InputError(f"number of groups must be a whole number, got {n_groups!r}")
    n_groups = int(n_groups)
    if n_groups < 1:
        raise InputError(f"number of groups must be at least 1, got {n_groups}")
    if n_groups > limit:
        raise InputError(f"number of groups {n_groups} exceeds the {limit} {what}; ask for at most {limit}")
    return n_groups


def check_edges(edges, nz: int) -> np.ndarray:
    """Layer edges, checked.

    Parameters
    ----------
    edges : sequence of int
        A grouping of ``nz`` fine layers (module notes).
    nz : int

    Returns
    -------
    ndarray of int

    Raises
    ------
    InputError
        Unless ``edges`` are whole numbers increasing strictly from 0 to ``nz``.
    """
    try:
        array = np.asarray(edges)
    except Exception:  # ragged input and the like
        raise InputError(f"layer edges must be a sequence of whole numbers, got {edges!r}") from None
    if array.ndim != 1 or array.size < 2:
        raise InputError(f"layer edges must list at least [0, {nz}], got {edges!r}")
    if not (np.issubdtype(array.dtype, np.integer)
            or (np.issubdtype(array.dtype, np.floating) and np.all(array == np.round(array)))):
        raise InputError(f"layer edges must be whole numbers, got {edges!r}")
    array = array.astype(int)
    if array[0] != 0 or array[-1] != nz:
        raise InputError(f"layer edges must start at 0 and end at nz = {nz}, got {array.tolist()}")
    if np.any(np.diff(array) <= 0):
        raise InputError(f"layer edges must increase strictly (no empty group), got {array.tolist()}")
    return array


def judge_grouping(stats: dict, edges) -> dict:
    """How well the grouping ``edges`` of the fine layers keeps the layering.

    Parameters
    ----------
    stats : dict
        From :func:`layer_statistics`.
    edges : sequence of int
        The grouping (module notes).

    Returns
    -------
    dict
        Per-group entries are float arrays of shape (G,):

        ``edges``             the checked edges (list of int); ``n_groups`` G.
        ``variance_total``    (ln mD)^2: bulk-weighted variance of ln kh over all active cells
                              with kh > 0.
        ``variance_kept``     1: share of that variance lying BETWEEN groups,
                              1 - (within-group sum) / (total sum). 1 when each group is
                              uniform in ln kh, 0 for a single group; 1.0 if the total variance
                              is 0 (nothing to lose).
        ``variance_ceiling``  1: the best any grouping can reach, the variance_kept of one layer
                              per group (the lateral variance inside fine layers cannot be kept).
        ``within_sum``        (ln mD)^2 * m3: sum over groups of sum of b*(ln kh - group mean)^2,
                              the objective :func:`optimal_grouping` minimises.
        ``n_layers``          fine layers per group; ``thickness`` m: sum of the layer thicknesses.
        ``group_weight``      m3: bulk volume carrying ln kh; ``lnk_mean`` ln mD: group mean.
        ``within_group_std``  ln mD: bulk-weighted standard deviation of ln kh inside the group
                              (NaN for a group with no weight).
        ``worst_group``, ``worst_std``: index and within_group_std of the group with the largest
                              within_group_std (first if tied; -1 and NaN if none is defined).
        ``kz_ratio``          1: vertical averaging error. With the layer values kz_l = ``kz_harmonic`` and
                              h_l = ``thickness``, the series (harmonic, thickness-weighted) mean
                              sum h / sum(h/kz_l) -- the kz the stacked fine layers really give -- divided by
                              the arithmetic mean sum(h kz_l) / sum h that a naive average would report. 1 when
                              all layers of the group have the same kz, towards 0 when a tight layer is hidden
                              in the group; NaN if the arithmetic mean is 0 or no layer has thickness.
        ``front_speedup``     1: how much earlier the fastest fine layer of the group breaks through than its
                              coarse layer predicts, for flow along the layers in a layer-cake: max over layers
                              of (kh_l / phi_l) divided by the group's (kh / phi), with kh and phi =
                              porosity*ntg bulk-weighted means (speed of a front is proportional to k / phi at
                              equal pressure gradient). >= 1 when all layers have pore space; NaN if the group
                              has no flow.
        ``flow_share_x``, ``flow_share_y``: 1, the group's share of the layer-cake flow capacity along x and
                              y; exact under arithmetic averaging along the layers, so shown for reference and
                              not as an error.
    """
    w, m, v = _layer_moments(stats, STAT_KEYS)
    edges = check_edges(edges, w.size)
    start, stop = edges[:-1], edges[1:]
    # ln kh variance between and inside the groups from prefix sums, then the per-group contrasts
    p0, p1, p2, _, centre = _prefix_sums(w, m, v)
    within = _group_cost(p0, p1, p2, start, stop)  # sum of squares inside each group
    total = float(_group_cost(p0, p1, p2, 0, w.size))
    kz_ratio, speedup = _group_contrasts(stats, start, stop)
    return {"edges": edges.tolist(), "n_groups": int(start.size), **_variance_shares(w, v, within, total, centre),
            "n_layers": (stop - start).astype(int),
            "thickness": np.add.reduceat(np.asarray(stats["thickness"], dtype=float), start),
            **_group_spread(p0[stop] - p0[start], p1[stop] - p1[start], within, centre),
            "kz_ratio": kz_ratio, "front_speedup": speedup, **_flow_shares(stats, start)}


def _variance_shares(w, v, within, total: float, centre: float) -> dict:
    """'variance_total', 'variance_kept', 'variance_ceiling' and 'within_sum' of :func:`judge_grouping`."""
    layers_within = float(np.sum(w * v))
    # Rounding leaves a few ulp of "variance" in a uniform field: below this it counts as none.
    negligible = float(w.sum()) * (1e-12 * max(1.0, abs(centre))) ** 2
    if total > negligible:
        kept = 1.0 - float(within.sum()) / total
        ceiling = 1.0 - min(layers_within / total, 1.0)
    else:
        kept, ceiling = 1.0, 1.0
    return {"variance_total": total / float(w.sum()) if w.sum() > 0 else math.nan,
            "variance_kept": min(max(kept, 0.0), 1.0), "variance_ceiling": ceiling, "within_sum": float(within.sum())}


def _group_spread(group_weight, group_first, within, centre: float) -> dict:
    """'group_weight', 'lnk_mean', 'within_group_std', 'worst_group' and 'worst_std' of
    :func:`judge_grouping`, from each group's weight, centred first moment and sum of squares."""
    within_std = np.sqrt(_ratio(within, group_weight))
    lnk_mean = _ratio(group_first, group_weight) + centre
    if np.any(np.isfinite(within_std)):
        worst = int(np.nanargmax(within_std))
        worst_std = float(within_std[worst])
    else:
        worst, worst_std = -1, math.nan
    return {"group_weight": group_weight, "lnk_mean": lnk_mean, "within_group_std": within_std,
            "worst_group": worst, "worst_std": worst_std}


def _group_contrasts(stats: dict, start, stop) -> tuple[np.ndarray, np.ndarray]:
    """'kz_ratio' and 'front_speedup' of :func:`judge_grouping` (G,) each."""
    thickness = np.asarray(stats["thickness"], dtype=float)
    kz = np.asarray(stats["kz_harmonic"], dtype=float)
    bulk = np.asarray(stats["bulk_volume"], dtype=float)
    kh = np.nan_to_num(np.asarray(stats["kh_mean"], dtype=float))
    phi = np.nan_to_num(np.asarray(stats["porosity_mean"], dtype=float))
    present = (thickness > 0) & np.isfinite(kz)
    h = np.where(present, thickness, 0.0)
    kz0 = np.where(present, kz, 0.0)
    blocked = present & (kz0 <= 0)
    inverse = np.where(present & ~blocked, h / np.where(kz0 > 0, kz0, 1.0), 0.0)
    speed = np.where((bulk > 0) & (phi > 0), kh / np.where(phi > 0, phi, 1.0), -np.inf)
    kz_ratio, speedup = np.full(start.size, np.nan), np.full(start.size, np.nan)
    for g, (a, b) in enumerate(zip(start, stop)):  # loops over groups only; each step is O(layers)
        kz_ratio[g] = _kz_ratio(h[a:b], kz0[a:b], blocked[a:b], inverse[a:b])
        speedup[g] = _front_speedup(bulk[a:b], kh[a:b], phi[a:b], speed[a:b])
    return kz_ratio, speedup


def _flow_shares(stats: dict, start) -> dict:
    """'flow_share_x' and 'flow_share_y' of :func:`judge_grouping`: the layers' shares summed per group."""
    return {f"flow_share_{axis}": np.add.reduceat(np.nan_to_num(np.asarray(stats[f"flow_share_{axis}"], dtype=float)),
                                                  start) for axis in ("x", "y")}


def _kz_ratio(h, kz, blocked, inverse) -> float:
    """Series over arithmetic mean kz of one group's layers (NaN without an arithmetic mean)."""
    height = h.sum()
    arithmetic = np.sum(h * kz) / height if height > 0 else 0.0
    if not arithmetic > 0:
        return math.nan
    harmonic = 0.0 if blocked.any() else height / inverse.sum()
    return harmonic / arithmetic


def _front_speedup(bulk, kh, phi, speed) -> float:
    """The fastest layer's k / phi over the group's (NaN if the group has no flow)."""
    group_bulk = bulk.sum()
    group_speed = (np.sum(bulk * kh) / np.sum(bulk * phi)
                   if group_bulk > 0 and np.sum(bulk * phi) > 0 else 0.0)
    if group_speed > 0 and np.isfinite(speed).any():
        return np.max(speed) / group_speed
    return math.nan


def optimal_grouping(stats: dict, n_groups: int, objective: str = "within_variance") -> list[int]:
    """The grouping into exactly ``n_groups`` contiguous groups that minimises the objective.

    Objective ``"within_variance"`` (the only one): the total within-group, bulk-weighted
    sum of squares of ln kh over all active cells with kh > 0,

        J(edges) = sum over groups g of sum over cells c in g of b_c * (ln kh_c - mean_g)^2,

    (ln mD)^2 * m3, with mean_g the bulk-weighted group mean. Minimising J is maximising
    ``variance_kept`` of :func:`judge_grouping`. Only ``weight`` (w), ``lnk_mean`` (m) and
    ``lnk_var`` (v) of ``stats`` are used: with prefix sums of w, w*m and w*(v + m^2) the cost
    of a group [i, j) is S2 - S1^2 / S0 in O(1). The minimum is found exactly by dynamic
    programming over layer boundaries, D_g(j) = min_i D_{g-1}(i) + cost(i, j): O(n_groups * nz^2)
    time, O(nz^2) memory. Layers of zero weight (no active cell with kh > 0, e.g. all pinched)
    cost nothing and join a neighbouring group; every group holds at least one layer of
    positive weight. Ties go to the grouping whose boundaries lie highest (smallest index).

    Parameters
    ----------
    stats : dict
        From :func:`layer_statistics` (:data:`OPTIMAL_KEYS` suffice).
    n_groups : int
    objective : str

    Returns
    -------
    list of int
        The edges [0, ..., nz].

    Raises
    ------
    InputError
        If n_groups < 1, n_groups > nz, n_groups > the number of layers of positive weight,
        or for an unknown objective.
    """
    if objective not in OBJECTIVES:
        raise InputError(f"unknown grouping objective '{objective}'; use one of {', '.join(OBJECTIVES)}")
    w, m, v = _layer_moments(stats)
    nz = w.size
    _check_count(n_groups, nz, "fine layers")
    n_groups = _check_count(n_groups, int(np.count_nonzero(w > 0)), "fine layers holding ln kh (weight > 0)")
    p0, p1, p2, count, _ = _prefix_sums(w, m, v)
    index = np.arange(nz + 1)
    start, stop = index[:, None], index[None, :]
    cost = _group_cost(p0, p1, p2, start, stop)  # cost[i, j] of the group [i, j)
    cost[(count[stop] - count[start]) < 1] = np.inf  # empty or weightless groups are not allowed
    return _cheapest_edges(cost, n_groups)


def _cheapest_edges(cost: np.ndarray, n_groups: int) -> list[int]:
    """Edges of the ``n_groups`` groups of least total cost, given cost[i, j] of a group
    [i, j) (dynamic programme; ties to the smallest boundaries)."""
    nz = cost.shape[0] - 1
    index = np.arange(nz + 1)
    best = np.full(nz + 1, np.inf)
    best[0] = 0.0  # zero groups cover zero layers
    choice = np.zeros((n_groups + 1, nz + 1), dtype=int)
    for g in range(1, n_groups + 1):
        total = best[:, None] + cost
        choice[g] = np.argmin(total, axis=0)
        best = total[choice[g], index]
    edges = [nz]
    for g in range(n_groups, 0, -1):
        edges.append(int(choice[g, edges[-1]]))
    return edges[::-1]


def uniform_grouping(nz: int, n_groups: int) -> list[int]:
    """Edges of ``n_groups`` groups of consecutive layers as even as possible.

    Sizes differ by at most one, larger groups last: edges[g] = floor(g * nz / n_groups).

    Parameters
    ----------
    nz : int
        Number of fine layers, >= 1.
    n_groups : int
        From 1 to nz.

    Returns
    -------
    list of int
        The edges [0, ..., nz]; InputError for bad counts.
    """
    if isinstance(nz, bool) or not isinstance(nz, numbers.Integral) or nz < 1:
        raise InputError(f"number of fine layers must be a whole number >= 1, got {nz!r}")
    n_groups = _check_count(n_groups, int(nz), "fine layers")
    return [int(g * int(nz) // n_groups) for g in range(n_groups + 1)]


def compare_groupings(cells, n_groups: int, edges=None) -> dict:
    """Judge the optimal and the uniform grouping into ``n_groups`` (and ``edges`` if given).

    Parameters
    ----------
    cells : GridArrays or dict
        A field, or its statistics (the dict :func:`layer_statistics` returns).
    n_groups : int
    edges : sequence of int, optional
        A grouping with any number of groups.

    Returns
    -------
    dict
        ``{"optimal": judge, "uniform": judge[, "given": judge]}`` with the dicts of
        :func:`judge_grouping`.
    """
    stats = cells if isinstance(cells, dict) else layer_statistics(cells)
    nz = stats["weight"].size
    result = {"optimal": judge_grouping(stats, optimal_grouping(stats, n_groups)),
              "uniform": judge_grouping(stats, uniform_grouping(nz, n_groups))}
    if edges is not None:
        result["given"] = judge_grouping(stats, edges)
    return result
