"""Grouping fine layers into coarse layers: judging a grouping, and finding the best one.

A *grouping* of the ``nz`` fine layers (z counts layers from the top) into ``G`` coarse layers
is given by its *edges*: a strictly increasing integer sequence ``[0, e_1, ..., e_{G-1}, nz]``;
coarse layer ``g`` holds the fine layers ``edges[g] <= l < edges[g+1]``.

Everything is built on per-fine-layer statistics (:func:`layer_statistics`), so judging a
grouping or searching for the best one never goes back to the cells. The main quantity is
``ln kh`` with ``kh = kx * ntg`` in mD (logs of mD: "ln mD" below), weighted by cell bulk volume
(m3) over the active cells with ``kh > 0`` (a cell with ``kh = 0`` has no logarithm; it still
counts in the arithmetic and flow-capacity statistics).

* :func:`layer_statistics` -- per-layer arrays from a :class:`~upscale.field.FineArrays`.
* :func:`judge_grouping` -- how much of the ln kh variance a grouping keeps between coarse
  layers, and per-group measures of what averaging inside each group hides.
* :func:`optimal_grouping` -- the exact minimiser of the within-group variance of ln kh
  (dynamic programme over layer boundaries, O(G * nz^2) with O(1) group costs).
* :func:`uniform_grouping`, :func:`compare_groupings`, :func:`format_comparison`,
  :func:`plot_layer_profile`.
"""

from __future__ import annotations

import math
import numbers
import os
from pathlib import Path

import numpy as np

from .errors import InputError
from matplotlib.figure import Figure

from .field import FineArrays, check_output_path
from .figures import save

#: Keys :func:`optimal_grouping` needs in ``stats``; :func:`judge_grouping` needs all of STAT_KEYS.
OPTIMAL_KEYS = ("weight", "lnk_mean", "lnk_var")
STAT_KEYS = ("bulk_volume", "weight", "thickness", "lnk_mean", "lnk_var", "kh_mean", "kz_harmonic",
             "porosity_mean", "capacity_x", "capacity_y", "flow_share_x", "flow_share_y")
OBJECTIVES = ("within_variance",)


# --------------------------------------------------------------------------------------------
# per-layer statistics


def _layer_sum(values: np.ndarray) -> np.ndarray:
    return np.sum(values, axis=(0, 1))


def _ratio(numerator: np.ndarray, denominator: np.ndarray) -> np.ndarray:
    """numerator / denominator, NaN where the denominator is 0."""
    out = np.full(np.shape(numerator), np.nan)
    np.divide(numerator, denominator, out=out, where=denominator > 0)
    return out


def layer_statistics(cells) -> dict:
    """Per-fine-layer statistics, each a float array of shape (nz,).

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

    Statistics of an empty set (no active cell, or weight 0 for the ln kh ones) are NaN,
    except sums and thickness, which are 0. ``cells`` is a FineArrays, or a lazy field
    (``open_field(path, chunks=...)``), read one slab along x at a time: every statistic is
    built from per-layer sums over slabs (the ln kh variance by the pairwise update of
    Chan, Golub & LeVeque 1983), so the result does not depend on the slabs.
    """
    if isinstance(cells, FineArrays):
        sums = _layer_sums(cells)
    else:
        from .field import arrays

        slabs = cells.chunks.get("x") or (cells.sizes["x"],)
        starts = np.concatenate([[0], np.cumsum(slabs)])
        sums = None
        for lo, hi in zip(starts[:-1], starts[1:]):
            part = _layer_sums(arrays(cells.isel(x=slice(int(lo), int(hi)))))
            sums = part if sums is None else _combine(sums, part)
    return _statistics(sums)


def _layer_sums(cells: FineArrays) -> dict:
    """Per-layer sums of a box of cells (all columns of some x range), each (nz,), from
    which :func:`_statistics` builds the statistics; ``lnk_m2`` is the weighted sum of
    squared deviations of ln kh from ``lnk_mean`` (the mean of these cells)."""
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


def _combine(a: dict, b: dict) -> dict:
    """Sums of two boxes of whole columns side by side along x (Chan, Golub & LeVeque 1983
    for the weighted mean and squared deviations of ln kh)."""
    out = {key: a[key] + b[key] for key in a if key not in ("lnk_mean", "lnk_m2", "length_y")}
    weight = out["weight"]
    share = np.divide(b["weight"], weight, out=np.zeros_like(weight), where=weight > 0)
    delta = b["lnk_mean"] - a["lnk_mean"]
    out["lnk_mean"] = a["lnk_mean"] + delta * share
    out["lnk_m2"] = a["lnk_m2"] + b["lnk_m2"] + delta ** 2 * a["weight"] * share
    out["length_y"] = a["length_y"]
    return out


def _statistics(sums: dict) -> dict:
    """The statistics of :func:`layer_statistics` from per-layer sums."""
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


# --------------------------------------------------------------------------------------------
# prefix sums shared by the judge and the dynamic programme


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
    if isinstance(n_groups, bool) or not isinstance(n_groups, numbers.Integral):
        raise InputError(f"number of groups must be a whole number, got {n_groups!r}")
    n_groups = int(n_groups)
    if n_groups < 1:
        raise InputError(f"number of groups must be at least 1, got {n_groups}")
    if n_groups > limit:
        raise InputError(f"number of groups {n_groups} exceeds the {limit} {what}; ask for at most {limit}")
    return n_groups


def _check_edges(edges, nz: int) -> np.ndarray:
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


# --------------------------------------------------------------------------------------------
# judging a grouping


def judge_grouping(stats: dict, edges) -> dict:
    """How well the grouping ``edges`` of the fine layers keeps the layering.

    ``stats`` from :func:`layer_statistics`. Returns a dict; per-group entries are float
    arrays of shape (G,):

    ``edges``             the checked edges (list of int); ``n_groups`` G.
    ``variance_total``    (ln mD)^2: bulk-weighted variance of ln kh over all active cells
                          with kh > 0.
    ``variance_kept``     1: share of that variance lying BETWEEN groups,
                          1 - (within-group sum) / (total sum). 1 when each group is
                          uniform in ln kh, 0 for a single group; 1.0 if the total variance is 0
                          (nothing to lose).
    ``variance_ceiling``  1: the best any grouping can reach, the variance_kept of one layer per
                          group (the lateral variance inside fine layers cannot be kept).
    ``within_sum``        (ln mD)^2 * m3: sum over groups of sum of b*(ln kh - group mean)^2,
                          the objective :func:`optimal_grouping` minimises.
    ``n_layers``          fine layers per group; ``thickness`` m: sum of the layer thicknesses.
    ``group_weight``      m3: bulk volume carrying ln kh; ``lnk_mean`` ln mD: group mean.
    ``within_group_std``  ln mD: bulk-weighted standard deviation of ln kh inside the group
                          (NaN for a group with no weight).
    ``worst_group``, ``worst_std``: index and within_group_std of the group with the largest
                          within_group_std (first if tied; -1 and NaN if none is defined).
    ``kz_ratio``          1: vertical averaging error. With the layer values kz_l =
                          ``kz_harmonic`` and h_l = ``thickness``, the series (harmonic,
                          thickness-weighted) mean sum h / sum(h/kz_l) -- the kz the stacked
                          fine layers really give -- divided by the arithmetic mean
                          sum(h kz_l) / sum h that a naive average would report. 1 when all
                          layers of the group have the same kz, towards 0 when a tight layer
                          is hidden in the group; NaN if the arithmetic mean is 0 or no layer
                          has thickness.
    ``front_speedup``     1: how much earlier the fastest fine layer of the group breaks
                          through than its coarse layer predicts, for flow along the layers in a
                          layer-cake: max over layers of (kh_l / phi_l) divided by the group's
                          (kh / phi), with kh and phi = porosity*ntg bulk-weighted means (speed
                          of a front is proportional to k / phi at equal pressure gradient).
                          >= 1 when all layers have pore space; NaN if the group has no flow.
    ``flow_share_x``, ``flow_share_y``: 1, the group's share of the layer-cake flow capacity
                          along x and y; exact under arithmetic averaging along the layers, so
                          shown for reference and not as an error.
    """
    w, m, v = _layer_moments(stats, STAT_KEYS)
    nz = w.size
    edges = _check_edges(edges, nz)
    start, stop = edges[:-1], edges[1:]
    p0, p1, p2, _, centre = _prefix_sums(w, m, v)

    group_weight = p0[stop] - p0[start]
    within = _group_cost(p0, p1, p2, start, stop)
    total = float(_group_cost(p0, p1, p2, 0, nz))
    layers_within = float(np.sum(w * v))
    # Rounding leaves a few ulp of "variance" in a uniform field: below this it counts as none.
    negligible = float(w.sum()) * (1e-12 * max(1.0, abs(centre))) ** 2
    if total > negligible:
        kept = 1.0 - float(within.sum()) / total
        ceiling = 1.0 - min(layers_within / total, 1.0)
    else:
        kept, ceiling = 1.0, 1.0
    kept = min(max(kept, 0.0), 1.0)
    within_std = np.sqrt(_ratio(within, group_weight))
    lnk_mean = _ratio(p1[stop] - p1[start], group_weight) + centre
    if np.any(np.isfinite(within_std)):
        worst = int(np.nanargmax(within_std))
        worst_std = float(within_std[worst])
    else:
        worst, worst_std = -1, math.nan

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
        height = h[a:b].sum()
        arithmetic = np.sum(h[a:b] * kz0[a:b]) / height if height > 0 else 0.0
        if arithmetic > 0:
            harmonic = 0.0 if blocked[a:b].any() else height / inverse[a:b].sum()
            kz_ratio[g] = harmonic / arithmetic
        group_bulk = bulk[a:b].sum()
        group_speed = (np.sum(bulk[a:b] * kh[a:b]) / np.sum(bulk[a:b] * phi[a:b])
                       if group_bulk > 0 and np.sum(bulk[a:b] * phi[a:b]) > 0 else 0.0)
        if group_speed > 0 and np.isfinite(speed[a:b]).any():
            speedup[g] = np.max(speed[a:b]) / group_speed

    shares = {}
    for axis in ("x", "y"):
        share = np.nan_to_num(np.asarray(stats[f"flow_share_{axis}"], dtype=float))
        shares[f"flow_share_{axis}"] = np.add.reduceat(share, start)
    return {"edges": edges.tolist(), "n_groups": int(start.size),
            "variance_total": total / float(w.sum()) if w.sum() > 0 else math.nan,
            "variance_kept": kept, "variance_ceiling": ceiling, "within_sum": float(within.sum()),
            "n_layers": (stop - start).astype(int), "thickness": np.add.reduceat(thickness, start),
            "group_weight": group_weight, "lnk_mean": lnk_mean, "within_group_std": within_std,
            "worst_group": worst, "worst_std": worst_std, "kz_ratio": kz_ratio,
            "front_speedup": speedup, **shares}


# --------------------------------------------------------------------------------------------
# finding groupings


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

    Returns the edges [0, ..., nz] (list of int). Raises :class:`InputError` if n_groups < 1,
    n_groups > nz, n_groups > the number of layers of positive weight, or for an unknown
    objective.
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
    """Edges of ``n_groups`` groups of consecutive layers as even as possible (sizes differ by
    at most one, larger groups last): edges[g] = floor(g * nz / n_groups)."""
    if isinstance(nz, bool) or not isinstance(nz, numbers.Integral) or nz < 1:
        raise InputError(f"number of fine layers must be a whole number >= 1, got {nz!r}")
    n_groups = _check_count(n_groups, int(nz), "fine layers")
    return [int(g * int(nz) // n_groups) for g in range(n_groups + 1)]


def compare_groupings(cells, n_groups: int, edges=None) -> dict:
    """Judge the optimal and the uniform grouping into ``n_groups`` (and ``edges`` if given)
    of a field (FineArrays or lazy, as :func:`layer_statistics` takes) or of its
    statistics (the dict :func:`layer_statistics` returns).

    Returns ``{"optimal": judge, "uniform": judge[, "given": judge]}`` with the dicts of
    :func:`judge_grouping`; ``edges`` may have any number of groups.
    """
    stats = cells if isinstance(cells, dict) else layer_statistics(cells)
    nz = stats["weight"].size
    result = {"optimal": judge_grouping(stats, optimal_grouping(stats, n_groups)),
              "uniform": judge_grouping(stats, uniform_grouping(nz, n_groups))}
    if edges is not None:
        result["given"] = judge_grouping(stats, edges)
    return result


# --------------------------------------------------------------------------------------------
# output


def _number(value, digits: int = 3) -> str:
    value = float(value)
    if math.isnan(value):
        return "-"
    return f"{value:.{digits}f}"


def _nan_extreme(values, pick) -> float:
    values = np.asarray(values, dtype=float)
    values = values[np.isfinite(values)]
    return float(pick(values)) if values.size else math.nan


def format_comparison(result: dict) -> str:
    """Plain-text tables of a :func:`compare_groupings` result (or any dict name -> judge).

    First a side-by-side summary, one column per grouping; then, per grouping, one row per
    coarse layer.
    """
    names = list(result)
    rows = [
        ("coarse layers", lambda r: str(r["n_groups"])),
        ("variance of ln kh kept between groups", lambda r: _number(r["variance_kept"])),
        ("  best possible (one layer per group)", lambda r: _number(r["variance_ceiling"])),
        ("within-group sum, (ln mD)^2 m3", lambda r: f"{r['within_sum']:.4g}"),
        ("worst group (top = 0)", lambda r: str(r["worst_group"]) if r["worst_group"] >= 0 else "-"),
        ("  its std of ln kh, ln mD", lambda r: _number(r["worst_std"])),
        ("lowest kz ratio (series / arithmetic)", lambda r: _number(_nan_extreme(r["kz_ratio"], np.min))),
        ("largest front speed-up", lambda r: _number(_nan_extreme(r["front_speedup"], np.max), 2)),
    ]
    cells = [[label] + [cell(result[n]) for n in names] for label, cell in rows]
    header = ["grouping"] + names
    widths = [max(len(str(line[i])) for line in [header] + cells) for i in range(len(header))]

    def line(parts):
        return "  ".join([str(parts[0]).ljust(widths[0])]
                         + [str(p).rjust(wd) for p, wd in zip(parts[1:], widths[1:])]).rstrip()

    out = [line(header), line(["-" * wd for wd in widths])] + [line(c) for c in cells]
    columns = ("group", "layers", "thick m", "mean ln kh", "std ln kh", "kz ratio", "speed-up",
               "share x", "share y")
    for name in names:
        r = result[name]
        out += ["", f"{name}: edges {r['edges']}"]
        table = [columns]
        for g in range(r["n_groups"]):
            a, b = r["edges"][g], r["edges"][g + 1]
            table.append((str(g), f"{a}-{b - 1}", _number(r["thickness"][g], 2),
                          _number(r["lnk_mean"][g]), _number(r["within_group_std"][g]),
                          _number(r["kz_ratio"][g]), _number(r["front_speedup"][g], 2),
                          _number(r["flow_share_x"][g]), _number(r["flow_share_y"][g])))
        wide = [max(len(row[i]) for row in table) for i in range(len(columns))]
        out += ["  ".join(cell.rjust(wd) for cell, wd in zip(row, wide)) for row in table]
    return "\n".join(out) + "\n"


LINE_STYLES = ("--", ":", "-.", (0, (5, 1, 1, 1, 1, 1)), (0, (8, 3)), (0, (1, 3)))


def plot_layer_profile(stats: dict, groupings: dict, path: str | os.PathLike) -> Path:
    """Write :func:`layer_profile_figure` as PNG, atomically. Returns the path."""
    figure = layer_profile_figure(stats, groupings)
    return save(figure, check_output_path(path))


def layer_profile_figure(stats: dict, groupings: dict):
    """A depth profile of the layering with the group boundaries of each grouping.

    Left panel: the fine-layer bulk-weighted mean of ln kh as a step curve against depth
    (cumulative layer thickness from the top, m, increasing downward); right panel: the
    standard deviation of ln kh inside each fine layer. Each grouping in ``groupings`` (name ->
    edges) draws its inner boundaries as horizontal lines in its own line style. Layers without
    ln kh leave a gap. Returns a matplotlib Figure (no global backend is touched).
    """

    missing = [k for k in ("thickness", "lnk_mean", "lnk_var", "weight") if k not in stats]
    if missing:
        raise InputError(f"layer statistics lack {', '.join(missing)}; build them with layer_statistics()")
    thickness = np.asarray(stats["thickness"], dtype=float)
    nz = thickness.size
    checked = {str(name): _check_edges(e, nz) for name, e in groupings.items()}
    has_log = np.asarray(stats["weight"], dtype=float) > 0
    mean = np.where(has_log, np.asarray(stats["lnk_mean"], dtype=float), np.nan)
    std = np.where(has_log, np.sqrt(np.maximum(np.asarray(stats["lnk_var"], dtype=float), 0)), np.nan)
    depth = np.concatenate([[0.0], np.cumsum(thickness)])

    def steps(values):  # vertical step curve: each layer a vertical segment, joined at its edges
        return np.repeat(values, 2), np.column_stack([depth[:-1], depth[1:]]).ravel()

    figure = Figure(figsize=(9, 7), layout="constrained")
    left, right = figure.subplots(1, 2, sharey=True, width_ratios=(3, 2))
    left.plot(*steps(mean), color="tab:blue", linewidth=1.5, label="fine layers")
    right.plot(*steps(std), color="tab:gray", linewidth=1.5, label="fine layers")
    colours = ("tab:red", "tab:green", "tab:purple", "tab:orange", "tab:brown", "tab:olive")
    for n, (name, edges) in enumerate(checked.items()):
        style = dict(color=colours[n % len(colours)], linestyle=LINE_STYLES[n % len(LINE_STYLES)],
                     linewidth=max(2.6 - 0.5 * n, 0.9))  # wider first: identical groupings stay visible
        for k, edge in enumerate(edges[1:-1]):
            label = f"{name} ({edges.size - 1} groups)" if k == 0 else None
            left.axhline(depth[edge], label=label, **style)
            right.axhline(depth[edge], **style)
        if edges.size == 2:  # a single group has no inner boundary: still name it
            left.plot([], [], label=f"{name} (1 group)", **style)
    if depth[-1] > 0:
        left.set_ylim(depth[-1], 0.0)  # depth increases downward
    else:
        left.invert_yaxis()
    left.set_xlabel("mean ln(kh / 1 mD) in the layer, kh = kx * ntg")
    left.set_ylabel("depth below the top of the model, m (sum of mean layer thicknesses)")
    right.set_xlabel("std of ln(kh / 1 mD) within the layer")
    left.set_title("fine-layer permeability and coarse-layer boundaries")
    right.set_title("spread inside each fine layer")
    left.grid(True, alpha=0.3)
    right.grid(True, alpha=0.3)
    right.set_xlim(left=0.0)
    left.legend(loc="best", fontsize="small")
    return figure
