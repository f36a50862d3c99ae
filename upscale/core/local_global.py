"""Local-global transmissibilities: coarse faces fitted to flows of the whole model.

A local problem only sees its own blocks, so it must guess how the flow enters them;
on channels and barriers that guess is what makes local upscaling miss (Chen, Durlofsky,
Gerritsen & Wen 2003). Local-global upscaling takes the guess from the coarse model
itself, and iterates:

1. solve the coarse model (current face transmissibilities T, coarse k at the model
   faces) for three generic flows: a unit pressure drop along x, along y and along z,
   no flow on the other sides;
2. for every coarse face, solve the fine cells of its two blocks plus ``ring`` fine cells
   around them, each flow with Dirichlet pressures on the region's outer boundary taken
   from the coarse pressures; where the region meets the model edge, the flow's own
   conditions apply (its constant pressure on the faces normal to the flow, no flow on
   the others);
3. fit T per face to the fine flux q_i through the face (over the two blocks' own cross
   section) against the coarse pressure difference dP_i that drove the local problem:
   at a fixed point the coarse model's face fluxes T dP_i reproduce the fine ones;
4. repeat until the coarse axis rates change less than a tolerance.

Two choices depart from the plain method, both chosen on channelised, draped and
lognormal fields (DEVELOPERS.md gives the figures): the coarse pressure difference instead of the blocks'
averaged fine pressures (the averaged fine pressure is not the pressure a two-point
coarse cell carries), and boundary pressures interpolated between coarse cell centres
with weights that follow the fine resistance along each axis, sum l / k, rather than the
distance (so that a pressure jump sits at a shale and a channel stays flat; in the
spirit of the oscillatory boundary conditions of Hou & Wu 1997).

The global variant fits the same way to fine whole-model solutions of the three flows
instead of local problems (Holden & Nielsen 2000; Branets, Ghai, Lyons & Wu 2009): the
fine fluxes through each coarse face stay fixed, and only the coarse pressures are
iterated.

Transmissibilities here are geometric, mD*m; pressures are dimensionless (unit drop).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .banded import solve_batch
from .block_problems import BATCH_BYTES, LocalProblem, local_domains
from .grid import GridArrays
from .partition import Partition
from .pressure import boundary_half, fine_model_check, whole_model_permeability
from .two_point import cell_geometry, pinch_out_faces, run_ends, transmissibilities

#: a face whose largest coarse pressure difference over the flows is below this (of the
#: unit drop) has no flow to fit: it keeps its local value
DP_FLOOR = 1e-6
WEIGHTINGS = ("largest-drop", "flux")
GLOBAL_SOLVES = ("coarse", "fine")


@dataclass(frozen=True)
class CoarseModel:
    """A coarse two-point grid: cell sizes dx (NX,), dy (NY,), dz (NX, NY, NZ) in m, face
    transmissibilities per axis (N - 1 along it) and half-cell transmissibilities per axis
    (NX, NY, NZ), both mD*m; with ``pinch_connections``, vertical flow passes across cells
    of dz = 0 (:meth:`two_point`)."""

    dx: np.ndarray
    dy: np.ndarray
    dz: np.ndarray
    faces: list
    halves: list
    pinch_connections: bool = False

    def with_values(self, faces: list, halves: list) -> "CoarseModel":
        return CoarseModel(self.dx, self.dy, self.dz, faces, halves, self.pinch_connections)

    def two_point(self) -> tuple[list, list]:
        """The faces and halves solved: with pinch-out connections, the z faces beside a
        cell of dz = 0 and the halves of such cells at a column end are those of
        :func:`upscale.core.two_point.pinch_out_faces` of the halves (no face problem
        measures a block without volume); else the model's own."""
        pinched = self.dz == 0
        if not self.pinch_connections or not pinched.any() or self.dz.shape[2] < 2:
            return self.faces, self.halves
        z_faces, z_half = pinch_out_faces(self.halves[2], pinched)
        beside = pinched[..., :-1] | pinched[..., 1:]
        return self.faces[:2] + [np.where(beside, z_faces, self.faces[2])], self.halves[:2] + [z_half]

    def _on_pinch_outs(self, p: np.ndarray, z_faces: np.ndarray) -> np.ndarray:
        """Pressures with those of the cells of dz = 0 on a pinch-out connection set to the
        pressure on the face they stand for, between the real cells a above and b below:
        p_b + q / h_b (p_a - q / h_a at the column's bottom), q the flux down the run (the
        nodes' own pressures depend on how the run shares its resistance out)."""
        pinched = self.dz == 0
        if not self.pinch_connections or not pinched.any() or p.shape[2] < 2:
            return p
        above, below = run_ends(pinched)
        n, h = p.shape[2], self.halves[2]
        down = np.concatenate([z_faces * (p[..., :-1] - p[..., 1:]), np.zeros_like(p[..., :1])], axis=2)
        up = np.concatenate([np.zeros_like(p[..., :1]), down[..., :-1]], axis=2)   # the flux into each cell
        q = np.where(np.arange(n) < n - 1, down, up)
        side, sign = np.where(below < n, below, above), np.where(below < n, 1.0, -1.0)
        p_side = np.take_along_axis(p, np.clip(side, 0, n - 1), axis=2)
        h_side = np.take_along_axis(h, np.clip(side, 0, n - 1), axis=2)
        face = p_side + sign * np.divide(q, h_side, out=np.zeros_like(q), where=h_side > 0)
        return np.where(pinched & (side >= 0) & (side < n), face, p)

    def axis_flows(self, tolerance: float = 1e-10) -> tuple[list[np.ndarray], np.ndarray]:
        """Pressures (NX, NY, NZ) of the unit-drop flows along x, y, z (0 where a cell
        reaches neither constant-pressure face) and their rates (3,), mD*m."""
        pressures, rates = [], []
        faces, halves = self.two_point()
        for axis in range(3):
            result = whole_model_permeability(faces, boundary_half(halves[axis], axis), self.dx, self.dy,
                                              self.dz, axis, tolerance=tolerance)
            pressures.append(self._on_pinch_outs(np.nan_to_num(result["pressure"]), faces[2]))
            rates.append(result["rate"])
        return pressures, np.array(rates)


@dataclass
class GlobalOptions:
    """How the global stage runs: ``solves`` 'coarse' (local-global) or 'fine' (fitted to
    fine whole-model flows); ``ring`` fine cells around each face's two blocks (local-global);
    ``weighting`` of the flows in each face's fit; at most ``passes`` passes, stopping when
    the coarse axis rates change by less than ``tolerance`` (relative); ``adaptive``: after
    the first pass, re-solve only the faces whose T still moved by more than
    ``moving`` (relative), or that carry more than ``busy`` of the largest flux of their
    axis, and the faces at the model edge."""

    solves: str = "coarse"
    ring: int = 0
    weighting: str = "largest-drop"
    passes: int = 3
    tolerance: float = 2e-3
    adaptive: bool = True
    moving: float = 0.01
    busy: float = 0.1


@dataclass
class Measured:
    """Fine fluxes under the coarse pressures of the three axis flows: per face axis
    ``faces`` (flows, faces...) through the interior coarse faces; per axis ``low`` and
    ``high`` through the two model faces normal to it, per block of that face (its flow
    only; shape of the coarse face with 1 on the axis), or None where not measured."""

    faces: list
    low: list
    high: list

    def __add__(self, other: "Measured") -> "Measured":
        """The fluxes of two disjoint sets of faces (e.g. two boxes) together."""
        both = [None if a is None else a + b for a, b in zip(self.low, other.low)]
        return Measured([a + b for a, b in zip(self.faces, other.faces)], both,
                        [None if a is None else a + b for a, b in zip(self.high, other.high)])

    def update(self, new: "Measured", solved) -> "Measured":
        """These fluxes with those of ``new`` on the faces in ``solved`` (None: all)."""
        if solved is None:
            return new
        faces = [np.where(s, n, o) for s, n, o in zip(solved, new.faces, self.faces)]
        low, high = [], []
        for axis, s in enumerate(solved):
            n = s.shape[axis]
            if new.low[axis] is None:  # one block along the axis: no model-face fluxes measured
                low.append(None)
                high.append(None)
                continue
            edge_low, edge_high = np.take(s, [0], axis=axis), np.take(s, [n - 1], axis=axis)
            low.append(np.where(edge_low, new.low[axis], self.low[axis]))
            high.append(np.where(edge_high, new.high[axis], self.high[axis]))
        return Measured(faces, low, high)


@dataclass
class GlobalReport:
    """What the global stage did, per pass: the faces solved, the faces that kept their
    local value (per axis), the largest relative change of the coarse axis rates."""

    passes: int = 0
    faces_solved: list = field(default_factory=list)
    fallback: list = field(default_factory=list)
    rate_change: list = field(default_factory=list)


def fit_transmissibility(q: np.ndarray, dp: np.ndarray, weighting: str) -> tuple[np.ndarray, np.ndarray]:
    """Transmissibility of faces from several flows, and the faces where no fit exists.

    Parameters
    ----------
    q : ndarray
        (flows, faces...) fine flux through each face, positive from block I to I + 1, mD*m.
    dp : ndarray
        (flows, faces...) coarse pressure difference P_I - P_{I+1} of the same flows.
    weighting : str
        'largest-drop': the flow with the largest |dp| alone, T = q / dp; 'flux': least
        squares with each flow weighted by |q| over the face's largest |q|,
        T = sum w q dp / sum w dp^2.

    Returns
    -------
    T : ndarray
        (faces...), mD*m.
    no_fit : ndarray of bool
        Faces whose largest |dp| is below :data:`DP_FLOOR`, or where T is not positive.

    Examples
    --------
    >>> import numpy as np
    >>> q, dp = np.array([[2.0], [0.1]]), np.array([[0.5], [-0.01]])
    >>> fit_transmissibility(q, dp, "largest-drop")[0].tolist()
    [4.0]
    """
    size = np.abs(dp)
    if weighting == "largest-drop":
        pick = np.argmax(size, axis=0)[None]
        q, dp = np.take_along_axis(q, pick, 0), np.take_along_axis(dp, pick, 0)
        weight = np.ones_like(q)
    elif weighting == "flux":
        weight = np.abs(q) / np.maximum(np.abs(q).max(axis=0), np.finfo(float).tiny)
    else:
        raise ValueError(f"unknown weighting {weighting!r}; choose from {', '.join(WEIGHTINGS)}")
    numerator, denominator = (weight * q * dp).sum(axis=0), (weight * dp * dp).sum(axis=0)
    t = np.divide(numerator, denominator, out=np.zeros_like(numerator), where=denominator > 0)
    return t, (size.max(axis=0) < DP_FLOOR) | ~(t > 0) | ~np.isfinite(t)


def coarse_drops(pressures: list[np.ndarray]) -> list[np.ndarray]:
    """Per face axis, (flows, faces) differences P_I - P_{I+1} of coarse pressures."""
    out = []
    for axis in range(3):
        n = pressures[0].shape[axis]
        out.append(np.stack([np.take(p, np.arange(n - 1), axis=axis) - np.take(p, np.arange(1, n), axis=axis)
                             for p in pressures]))
    return out


def refit(model: CoarseModel, fluxes: list[np.ndarray], pressures: list[np.ndarray], local: list[np.ndarray],
          weighting: str, solved=None) -> tuple[list[np.ndarray], list[int]]:
    """New face transmissibilities from fluxes measured under the coarse ``pressures``:
    fitted where a fit exists, the ``local`` value elsewhere; faces closed in ``local``
    (no fine path) stay closed; faces not ``solved`` (per axis masks) keep the model's."""
    new, fallback = [], []
    for axis, (q, dp) in enumerate(zip(fluxes, coarse_drops(pressures))):
        t, no_fit = fit_transmissibility(q, dp, weighting)
        no_fit &= local[axis] > 0
        t = np.where(no_fit, local[axis], np.where(local[axis] > 0, t, 0.0))
        if solved is not None:
            t = np.where(solved[axis], t, model.faces[axis])
        new.append(t)
        fallback.append(int(no_fit.sum()))
    return new, fallback


def refit_boundary(model: CoarseModel, measured: Measured, pressures: list[np.ndarray]) -> list[np.ndarray]:
    """Half-cell transmissibilities of the blocks on the model faces, along each axis, such
    that the coarse boundary connection reproduces the measured flux of that axis's flow,
    T_b = q_b / (p_b - P) (p_b = 1 on the low face, 0 on the high one); the others, and
    blocks where the drop is below :data:`DP_FLOOR` or the fit is not positive, unchanged."""
    halves = []
    for axis, (half, p) in enumerate(zip(model.halves, pressures)):
        half = half.copy()
        n = half.shape[axis]
        for index, q, drop in ((0, measured.low[axis], 1.0 - np.take(p, [0], axis=axis)),
                               (n - 1, measured.high[axis], np.take(p, [n - 1], axis=axis))):
            if q is None:
                continue
            fitted = np.divide(q, drop, out=np.zeros_like(q), where=np.abs(drop) > DP_FLOOR)
            layer = [slice(None)] * 3
            layer[axis] = slice(index, index + 1)
            current = half[tuple(layer)]
            half[tuple(layer)] = np.where((fitted > 0) & np.isfinite(fitted) & (current > 0), fitted, current)
        halves.append(half)
    return halves


def iterate(model: CoarseModel, local: list[np.ndarray], measure, options: GlobalOptions
            ) -> tuple[list[np.ndarray], GlobalReport]:
    """The passes of the global stage.

    ``measure(pressures, solved)`` returns the :class:`Measured` fine fluxes under the
    coarse pressures of the three axis flows, for the faces in ``solved`` (per-axis masks,
    or None for all); ``local``: the local face transmissibilities, the starting point and
    the fallback. Returns the model of the last pass (its faces, and the half-cell
    transmissibilities of the blocks on the model faces) and a report.
    """
    report = GlobalReport()
    pressures, rates = model.axis_flows()
    solved, measured = None, None
    for _ in range(options.passes):
        new = measure(pressures, solved)
        measured = new if measured is None else measured.update(new, solved)
        faces, fallback = refit(model, measured.faces, pressures, local, options.weighting, solved)
        moved = [np.abs(a - b) / np.maximum(b, np.finfo(float).tiny) for a, b in zip(faces, model.faces)]
        model = model.with_values(faces, refit_boundary(model, measured, pressures))
        pressures, new_rates = model.axis_flows()
        change = float(np.max(np.abs(new_rates - rates) / np.maximum(np.abs(rates), np.finfo(float).tiny)))
        report.passes += 1
        report.faces_solved.append(int(sum(f.size if solved is None else s.sum() for f, s in
                                           zip(faces, solved or [None] * 3))))
        report.fallback.append(fallback)
        report.rate_change.append(change)
        rates = new_rates
        if change < options.tolerance:
            break
        if options.adaptive:
            solved = _still_moving(moved, measured.faces, options)
    return model, report


def _still_moving(moved: list[np.ndarray], fluxes: list[np.ndarray], options: GlobalOptions) -> list[np.ndarray]:
    """Faces to solve again (adaptive local-global, Chen & Durlofsky 2006): T still moving,
    or busy (a large share of the largest flux of the axis), or next to a model face."""
    out = []
    for axis, (change, q) in enumerate(zip(moved, fluxes)):
        size = np.abs(q).max(axis=0) if q.size else np.zeros(change.shape)
        busy = size > options.busy * (size.max() if size.size else 0.0)
        select = (change > options.moving) | busy
        edge = [slice(None)] * 3
        edge[axis] = [0, -1] if select.shape[axis] > 1 else [0]
        if select.shape[axis]:  # one block along the axis: no face at all
            select[tuple(edge)] = True
        out.append(select)
    return out


# ----------------------------------------------------------------------------- fine global flows

def fine_face_fluxes(cells: GridArrays, partition: Partition, tolerance: float = 1e-8) -> Measured:
    """The fine fluxes (mD*m) of the fine whole-model unit-drop flows along x, y and z
    through every interior coarse face, and through the model faces of each axis's own
    flow per coarse block, from fine solves."""
    _, fine_faces = transmissibilities(cells.flow_permeability(), cells.dx, cells.dy, cells.dz,
                                       cells.pinch_connections)
    solved = [fine_model_check(cells, axis, tolerance=tolerance) for axis in range(3)]
    pressures = [np.nan_to_num(s["pressure"]) for s in solved]
    faces = [np.stack([plane_fluxes(fine_faces[axis], p, partition, axis) for p in pressures]) for axis in range(3)]
    low, high = [], []
    for axis, s in enumerate(solved):
        inflow, outflow = s["face_flux"]
        low.append(_cross_sum(inflow, partition, axis))
        high.append(_cross_sum(outflow, partition, axis))
    return Measured(faces, low, high)


def _cross_sum(values: np.ndarray, partition: Partition, axis: int) -> np.ndarray:
    """Sum of a face-shaped fine array (1 along ``axis``) over each coarse block's cross-section."""
    for other in range(3):
        if other != axis:
            values = np.add.reduceat(values, partition.edges[other][:-1], axis=other)
    return values


def plane_fluxes(fine_face_t: np.ndarray, p: np.ndarray, partition: Partition, axis: int) -> np.ndarray:
    """Fine flux (+ direction) through each interior coarse face normal to ``axis``,
    summed over the face's fine cross-section: shape of the coarse faces."""
    planes = partition.edges[axis][1:-1] - 1  # fine face index between cells e - 1 and e
    lo = np.take(p, planes, axis=axis)
    hi = np.take(p, planes + 1, axis=axis)
    return _cross_sum(np.take(fine_face_t, planes, axis=axis) * (lo - hi), partition, axis)


# ----------------------------------------------------------------------------- local problems

def resistance_lines(cells: GridArrays, floor: float = 1e-6) -> list[np.ndarray]:
    """Cumulative fine resistance along each axis at the fine faces, R_a = sum l_a / k_a
    from the grid's low face (n_a + 1 along a), k floored at ``floor`` times the median of
    the positive values so that barriers stay finite."""
    _, lengths = cell_geometry(cells.dx, cells.dy, cells.dz)
    out = []
    for axis, k in enumerate(cells.flow_permeability()):
        positive = k[k > 0]
        least = floor * (float(np.median(positive)) if positive.size else 1.0)
        r = lengths[axis] / np.maximum(k, least)
        out.append(np.concatenate([np.zeros_like(np.take(r, [0], axis=axis)), np.cumsum(r, axis=axis)], axis=axis))
    return out


@dataclass(frozen=True)
class PressureField:
    """Coarse pressures of one axis flow ready for interpolation: nodes per axis in fine
    index units (the coarse cell centres, with ghost nodes on the two model faces) and
    values on them (the flow's constant pressures on its own faces, a copy of the
    adjacent centre on the no-flow faces)."""

    nodes: tuple
    values: np.ndarray

    @classmethod
    def of(cls, pressure: np.ndarray, partition: Partition, flow: int) -> "PressureField":
        nodes = []
        for edges in partition.edges:
            e = np.asarray(edges, dtype=float)
            nodes.append(np.concatenate([[e[0]], 0.5 * (e[:-1] + e[1:]), [e[-1]]]))
        values = pressure
        for axis in range(3):
            n = values.shape[axis]
            if axis == flow:
                ones = np.ones_like(np.take(values, [0], axis=axis))
                values = np.concatenate([ones, values, 0.0 * ones], axis=axis)
            else:
                values = np.concatenate([np.take(values, [0], axis=axis), values,
                                         np.take(values, [n - 1], axis=axis)], axis=axis)
        return cls(tuple(nodes), values)


def interpolation_weights(nodes: tuple, resistance: list[np.ndarray], points: np.ndarray,
                          cells: np.ndarray, origin=(0, 0, 0)) -> tuple[np.ndarray, np.ndarray]:
    """Weights of a coarse pressure field at ``points`` (m, 3), fine index units: the flat
    indices (8, m) of the eight surrounding nodes in the node grid (``nodes`` per axis) and
    their weights (8, m). Along each axis the weight is the share of the fine resistance
    between the two nearest nodes on the fine line of ``cells`` (m, 3, fine cell indices),
    linear in the index where that line has no resistance. ``resistance``
    (:func:`resistance_lines`) may be that of a window of the grid starting at fine index
    ``origin``."""
    origin = np.asarray(origin)
    local = cells - origin
    lower, weights = [], []
    for axis in range(3):
        s = points[:, axis]
        lo = np.clip(np.searchsorted(nodes[axis], s, side="right") - 1, 0, len(nodes[axis]) - 2)
        x0, x1 = nodes[axis][lo], nodes[axis][lo + 1]
        r0, r, r1 = (_resistance_at(resistance[axis], axis, x - origin[axis], local) for x in (x0, s, x1))
        span = r1 - r0
        t = np.where(span > 0, (r - r0) / np.where(span > 0, span, 1.0), (s - x0) / (x1 - x0))
        lower.append(lo)
        weights.append(np.clip(t, 0.0, 1.0))
    grid = tuple(len(n) for n in nodes)
    index, weight = np.empty((8, points.shape[0]), dtype=np.int64), np.empty((8, points.shape[0]))
    for corner in range(8):
        bits = [(corner >> axis) & 1 for axis in range(3)]
        weight[corner] = np.prod([weights[a] if bits[a] else 1.0 - weights[a] for a in range(3)], axis=0)
        index[corner] = np.ravel_multi_index(tuple(lower[a] + bits[a] for a in range(3)), grid)
    return index, weight


def interpolate(field_: PressureField, resistance: list[np.ndarray], points: np.ndarray,
                cells: np.ndarray) -> np.ndarray:
    """Coarse pressure at ``points`` (m, 3) in fine index units, resistance-weighted
    (:func:`interpolation_weights`)."""
    index, weight = interpolation_weights(field_.nodes, resistance, points, cells)
    return (weight * field_.values.ravel()[index]).sum(axis=0)


def _resistance_at(cumulative: np.ndarray, axis: int, position: np.ndarray, cells: np.ndarray) -> np.ndarray:
    """Cumulative resistance at fine-index ``position`` along ``axis`` on each cell's line."""
    n = cumulative.shape[axis] - 1
    i0 = np.clip(np.floor(position).astype(int), 0, n - 1)
    fraction = np.clip(position - i0, 0.0, 1.0)
    index = [cells[:, 0], cells[:, 1], cells[:, 2]]
    index[axis] = i0
    r0 = cumulative[tuple(index)]
    index[axis] = i0 + 1
    return r0 + fraction * (cumulative[tuple(index)] - r0)


@dataclass(frozen=True)
class Frame:
    """Where a window of whole blocks sits in the model: its first fine cell and first
    block per axis, the model's partition, and the window's blocks (window indices per
    axis) whose faces after them are to be solved."""

    cells: tuple
    blocks: tuple
    model: Partition
    owned: tuple


class FaceRegions:
    """The local problems of local-global upscaling, built once and solved every pass.

    For every interior coarse face: its two blocks plus ``ring`` fine cells (clipped at the
    model edge), the three flows' matrices (Dirichlet halves on the outer boundary inside
    the model and on the flow's own model faces, no flow on the other model faces) and the
    interpolation weights of the boundary pressures; a pass only builds the right-hand
    sides from the coarse pressures and solves. With a ``frame``, ``cells`` and
    ``partition`` are a window of whole blocks of the model (a box and the blocks around
    it), and only the faces after the frame's owned blocks are built.
    """

    def __init__(self, cells: GridArrays, partition: Partition, ring: int = 0, budget: int = BATCH_BYTES,
                 frame: Frame | None = None):
        frame = frame or Frame((0, 0, 0), (0, 0, 0), partition, (None, None, None))
        self.model = frame.model
        resistance = resistance_lines(cells)
        permeability = cells.flow_permeability()
        self.nodes = PressureField.of(np.zeros(frame.model.shape), frame.model, 0).nodes
        self.batches = []
        for axis in range(3):
            if frame.model.shape[axis] < 2:
                continue
            extend = tuple(int(a == axis) for a in range(3))
            owned = list(frame.owned)
            if owned[axis] is not None:  # the window's last block has no face after it in the window
                owned[axis] = np.asarray(owned[axis])[np.asarray(owned[axis]) < partition.shape[axis] - 1]
                if owned[axis].size == 0:
                    continue
            for batch, domain in local_domains(cells, partition, ring, extend, budget, tuple(owned),
                                               permeability=permeability):
                self.batches.append(_RegionBatch(axis, batch, domain, frame, self.nodes, resistance))

    def measure(self, pressures: list[np.ndarray], solved=None) -> Measured:
        """The fine fluxes under the coarse ``pressures`` (of the model) of the three axis
        flows, for the faces in ``solved`` (per-axis masks; None: all; the others 0)."""
        fields = [PressureField.of(p, self.model, flow).values.ravel() for flow, p in enumerate(pressures)]
        shape = self.model.shape
        faces = [np.zeros((3,) + tuple(n - int(a == axis) for a, n in enumerate(shape))) for axis in range(3)]
        low = [np.zeros(tuple(1 if a == axis else n for a, n in enumerate(shape))) if shape[axis] > 1 else None
               for axis in range(3)]
        high = [None if edge is None else edge.copy() for edge in low]
        for region in self.batches:
            axis = region.axis
            keep = np.ones(len(region.blocks), dtype=bool) if solved is None else solved[axis][tuple(region.blocks.T)]
            if not keep.any():
                continue
            inner, (q_low, q_high) = region.fluxes(fields, keep)
            blocks = region.blocks[keep]
            faces[axis][(slice(None),) + tuple(blocks.T)] = inner.T
            _place(low[axis], blocks, axis, blocks[:, axis] == 0, q_low)
            _place(high[axis], blocks, axis, blocks[:, axis] == shape[axis] - 2, q_high)
        return Measured(faces, low, high)


def local_face_fluxes(cells: GridArrays, partition: Partition, pressures: list[np.ndarray], ring: int = 0,
                      solved=None, budget: int = BATCH_BYTES) -> Measured:
    """The fine fluxes (mD*m) of local problems driven by the coarse ``pressures`` of the
    three axis flows (see the module notes and :class:`FaceRegions`), through the interior
    coarse faces and, for the regions at the model faces, through the model faces."""
    return FaceRegions(cells, partition, ring, budget).measure(pressures, solved)


def _place(edge: np.ndarray, blocks: np.ndarray, axis: int, on_edge: np.ndarray, values: np.ndarray) -> None:
    """Write per-region ``values`` of the regions ``on_edge`` into a model-face array."""
    index = blocks[on_edge].T.copy()
    index[axis] = 0
    edge[tuple(index)] = values[on_edge]


class _RegionBatch:
    """One batch of face regions along ``axis``: the local problem, per flow its grounded
    diagonal and the Dirichlet data of its outer faces, the interpolation weights; block
    indices and fine starts are those of the model (:class:`Frame`)."""

    def __init__(self, axis: int, batch, domain, frame: Frame, nodes, resistance):
        self.axis, self.batch, self.domain = axis, batch, domain
        self.blocks = np.stack([g.ravel() for g in np.meshgrid(*batch.blocks, indexing="ij")], axis=1) + frame.blocks
        self.starts = np.stack([g.ravel() for g in np.meshgrid(*batch.starts, indexing="ij")], axis=1) + frame.cells
        self.origin = np.asarray(frame.cells)
        self.problem = LocalProblem(domain, periodic=False, slowest=axis)
        self.sides = [self._side(a, end, frame.model.fine_shape, nodes, resistance) for a in range(3)
                      for end in (0, 1)]
        self.diagonals = [self._diagonal(flow) for flow in range(3)]
        d = self.diagonals
        self.same = np.all(d[1] == d[0], axis=1) & np.all(d[2] == d[0], axis=1)

    def _side(self, a: int, end: int, fine_shape, nodes, resistance) -> dict:
        """The outer face normal to ``a`` at ``end``: its layer, half-cell transmissibilities,
        whether it lies on the model face, and the interpolation weights of its face centres."""
        nb, shape = self.domain.count, self.domain.shape
        at_edge = self.starts[:, a] == 0 if end == 0 else self.starts[:, a] + shape[a] == fine_shape[a]
        index = 0 if end == 0 else shape[a] - 1
        points, cells = _face_centres(self.starts, shape, a, end)
        weights = interpolation_weights(nodes, resistance, points, cells, self.origin)
        return {"axis": a, "end": end, "layer": index, "at_edge": at_edge,
                "half": _layer(self.problem.couplings.half[a], a, index), "weights": weights,
                "face": (nb,) + tuple(1 if b == a else shape[b] for b in range(3))}

    def _dirichlet(self, side: dict, flow: int) -> np.ndarray:
        """Per region: is this side a Dirichlet face for ``flow``? (No flow through the
        model's own sides, the flow's constant pressure on its faces.)"""
        return np.ones(self.domain.count, dtype=bool) if side["axis"] == flow else ~side["at_edge"]

    def _diagonal(self, flow: int) -> np.ndarray:
        """The grounded diagonal (nb, n) of ``flow``'s system."""
        problem, nb = self.problem, self.domain.count
        diag = problem.coupling_sum.copy()
        touched = np.zeros(problem.components.count, dtype=bool)
        labels = problem.components.labels.reshape(diag.shape)
        for side in self.sides:
            h = side["half"] * self._dirichlet(side, flow).reshape(nb, 1, 1, 1)
            _layer(diag, side["axis"], side["layer"])[...] += h
            touched[_layer(labels, side["axis"], side["layer"])[h > 0]] = True
        flat = diag.reshape(nb, -1)
        _ground(flat, problem.components, touched)
        return flat

    def _rhs(self, flow: int, field_values: np.ndarray) -> np.ndarray:
        """The right-hand side (nb, n) of ``flow``'s system for the interpolated pressures."""
        nb = self.domain.count
        rhs = np.zeros((nb,) + self.domain.shape)
        for side in self.sides:
            index, weight = side["weights"]
            values = (weight * field_values[index]).sum(axis=0).reshape(side["face"])
            if side["axis"] == flow:
                values = np.where(side["at_edge"].reshape(nb, 1, 1, 1), 1.0 - side["end"], values)
            h = side["half"] * self._dirichlet(side, flow).reshape(nb, 1, 1, 1)
            _layer(rhs, side["axis"], side["layer"])[...] += h * values
        return rhs.reshape(nb, -1)

    def fluxes(self, fields: list[np.ndarray], keep: np.ndarray) -> tuple[np.ndarray, tuple]:
        """(kept regions, flows) fine flux through the face between the two blocks; and of
        the flow along the face axis, the fluxes (kept regions,) through the region's two
        ends (into it at the low end, out at the high end) over the blocks' cross-section."""
        p = self._solve([self._rhs(flow, fields[flow]) for flow in range(3)], keep)
        target = self.batch.target
        inner = np.stack([self.problem.face_flux(p[:, flow], target, self.axis, rows=keep) for flow in range(3)],
                         axis=1)
        return inner, self._end_fluxes(p[:, self.axis], keep)

    def _solve(self, rhs: list[np.ndarray], keep: np.ndarray) -> np.ndarray:
        """Pressures (kept, flows, sx, sy, sz): one factorisation for the three flows where
        their diagonals agree (regions inside the model), one per flow elsewhere."""
        problem = self.problem
        x = np.empty((int(keep.sum()), 3, problem.n))
        solve = dict(first=problem.first, second=problem.second, position=problem.pos, width=problem.width)
        together, apart = keep & self.same, keep & ~self.same
        where_together, where_apart = together[keep], apart[keep]
        if together.any():
            x[where_together] = solve_batch(values=problem.values[together], diagonal=self.diagonals[0][together],
                                            rhs=np.stack([r[together] for r in rhs], axis=1), **solve)[0]
        for flow in range(3) if apart.any() else ():
            x[where_apart, flow] = solve_batch(values=problem.values[apart], diagonal=self.diagonals[flow][apart],
                                               rhs=rhs[flow][apart][:, None], **solve)[0][:, 0]
        return x.reshape((x.shape[0], 3) + self.domain.shape)

    def _end_fluxes(self, p: np.ndarray, keep: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Fluxes through the region's two ends along the face axis at boundary pressures 1
        and 0, over the blocks' cross-section (meaningful where an end is on the model face)."""
        axis, target, n = self.axis, self.batch.target, self.domain.shape[self.axis]
        half = self.problem.couplings.half[axis][keep]
        low = (slice(None),) + tuple(slice(0, 1) if a == axis else target[a] for a in range(3))
        high = (slice(None),) + tuple(slice(n - 1, n) if a == axis else target[a] for a in range(3))
        q_low = (half[low] * (1.0 - p[low])).reshape(p.shape[0], -1).sum(axis=1)
        q_high = (half[high] * p[high]).reshape(p.shape[0], -1).sum(axis=1)
        return q_low, q_high


def _face_centres(starts: np.ndarray, shape, a: int, end: int) -> tuple[np.ndarray, np.ndarray]:
    """The centres (m, 3) of the fine faces of each region's outer face normal to ``a`` at
    ``end``, in fine index units, and the fine cells (m, 3) inside them."""
    nb = starts.shape[0]
    face = (nb,) + tuple(1 if b == a else shape[b] for b in range(3))
    points, cells = [], []
    for b in range(3):
        view = [nb, 1, 1, 1]
        if b == a:
            position = (starts[:, a] + (0 if end == 0 else shape[a])).astype(float).reshape(view)
            cell = (starts[:, a] + (0 if end == 0 else shape[a] - 1)).reshape(view)
        else:
            view[b + 1] = shape[b]
            cell = (starts[:, b][:, None] + np.arange(shape[b])[None, :]).reshape(view)
            position = cell + 0.5
        points.append(np.broadcast_to(position, face).ravel())
        cells.append(np.broadcast_to(cell, face).ravel())
    return np.stack(points, axis=1), np.stack(cells, axis=1)


def _layer(a: np.ndarray, axis: int, index: int) -> np.ndarray:
    """View of ``a`` (nb, sx, sy, sz) at one index along spatial ``axis``, keeping the axis."""
    sl = [slice(None)] * a.ndim
    sl[axis + 1] = slice(index, index + 1)
    return a[tuple(sl)]


def _ground(flat_diagonal: np.ndarray, components, touched: np.ndarray) -> None:
    """Ground the first cell of every component that touches no Dirichlet face."""
    n = flat_diagonal.shape[1]
    first = components.start
    untouched = first[~touched[components.labels[first]]]
    rows, cols = np.divmod(untouched, n)
    flat_diagonal[rows, cols] += np.where(flat_diagonal[rows, cols] > 0, flat_diagonal[rows, cols], 1.0)
