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

Two choices depart from the plain method, both measured on channelised, draped and
lognormal fields (DEVELOPERS.md): the coarse pressure difference instead of the blocks'
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
from .two_point import cell_geometry, transmissibilities

#: a face whose largest coarse pressure difference over the flows is below this (of the
#: unit drop) has no flow to fit: it keeps its local value
DP_FLOOR = 1e-6
WEIGHTINGS = ("largest-drop", "flux")
GLOBAL_SOLVES = ("coarse", "fine")


@dataclass(frozen=True)
class CoarseModel:
    """A coarse two-point grid: cell sizes dx (NX,), dy (NY,), dz (NX, NY, NZ) in m, face
    transmissibilities per axis (N - 1 along it) and half-cell transmissibilities per axis
    (NX, NY, NZ), both mD*m."""

    dx: np.ndarray
    dy: np.ndarray
    dz: np.ndarray
    faces: list
    halves: list

    def with_values(self, faces: list, halves: list) -> "CoarseModel":
        return CoarseModel(self.dx, self.dy, self.dz, faces, halves)

    def axis_flows(self, tolerance: float = 1e-12) -> tuple[list[np.ndarray], np.ndarray]:
        """Pressures (NX, NY, NZ) of the unit-drop flows along x, y, z (0 where a cell
        reaches neither constant-pressure face) and their rates (3,), mD*m."""
        pressures, rates = [], []
        for axis in range(3):
            result = whole_model_permeability(self.faces, boundary_half(self.halves[axis], axis), self.dx, self.dy,
                                              self.dz, axis, tolerance=tolerance)
            pressures.append(np.nan_to_num(result["pressure"]))
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

    def update(self, new: "Measured", solved) -> "Measured":
        """These fluxes with those of ``new`` on the faces in ``solved`` (None: all)."""
        if solved is None:
            return new
        faces = [np.where(s, n, o) for s, n, o in zip(solved, new.faces, self.faces)]
        low, high = [], []
        for axis, s in enumerate(solved):
            n = s.shape[axis]
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
        select[tuple(edge)] = True
        out.append(select)
    return out


# ----------------------------------------------------------------------------- fine global flows

def fine_face_fluxes(cells: GridArrays, partition: Partition, tolerance: float = 1e-8) -> Measured:
    """The fine fluxes (mD*m) of the fine whole-model unit-drop flows along x, y and z
    through every interior coarse face, and through the model faces of each axis's own
    flow per coarse block, from fine solves."""
    _, fine_faces = transmissibilities(cells.flow_permeability(), cells.dx, cells.dy, cells.dz)
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


def interpolate(field_: PressureField, resistance: list[np.ndarray], points: np.ndarray,
                cells: np.ndarray) -> np.ndarray:
    """Coarse pressure at ``points`` (m, 3) in fine index units, weighted along each axis by
    the fine resistance between the two nearest nodes on the fine line of ``cells``
    (m, 3, fine cell indices); linear in the index where that line has no resistance."""
    lower, weights = [], []
    for axis in range(3):
        nodes, s = field_.nodes[axis], points[:, axis]
        lo = np.clip(np.searchsorted(nodes, s, side="right") - 1, 0, len(nodes) - 2)
        x0, x1 = nodes[lo], nodes[lo + 1]
        r0, r, r1 = (_resistance_at(resistance[axis], axis, x, cells) for x in (x0, s, x1))
        span = r1 - r0
        linear = (s - x0) / (x1 - x0)
        t = np.where(span > 0, (r - r0) / np.where(span > 0, span, 1.0), linear)
        lower.append(lo)
        weights.append(np.clip(t, 0.0, 1.0))
    out = np.zeros(points.shape[0])
    for corner in range(8):
        bits = [(corner >> axis) & 1 for axis in range(3)]
        weight = np.prod([weights[a] if bits[a] else 1.0 - weights[a] for a in range(3)], axis=0)
        out += weight * field_.values[tuple(lower[a] + bits[a] for a in range(3))]
    return out


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


def local_face_fluxes(cells: GridArrays, partition: Partition, pressures: list[np.ndarray], ring: int = 0,
                      solved=None, budget: int = BATCH_BYTES) -> Measured:
    """The fine fluxes (mD*m) of local problems driven by the coarse ``pressures`` of the
    three axis flows (see the module notes), through the interior coarse faces and, for the
    regions at the model faces, through the model faces; 0 on faces not in ``solved``
    (per-axis masks; None: all)."""
    fields = [PressureField.of(p, partition, flow) for flow, p in enumerate(pressures)]
    resistance = resistance_lines(cells)
    permeability = cells.flow_permeability()
    faces, low, high = [], [], []
    for axis in range(3):
        shape = tuple(n - int(a == axis) for a, n in enumerate(partition.shape))
        edge = tuple(1 if a == axis else n for a, n in enumerate(partition.shape))
        q, q_low, q_high = np.zeros((3,) + shape), np.zeros(edge), np.zeros(edge)
        if shape[axis] > 0:
            extend = tuple(int(a == axis) for a in range(3))
            for batch, domain in local_domains(cells, partition, ring, extend, budget, permeability=permeability):
                blocks = np.stack([g.ravel() for g in np.meshgrid(*batch.blocks, indexing="ij")], axis=1)
                keep = np.ones(len(blocks), dtype=bool) if solved is None else solved[axis][tuple(blocks.T)]
                if not keep.any():
                    continue
                region = _Regions(batch, domain, keep, partition.fine_shape)
                inner, ends = region.fluxes(axis, fields, resistance)
                blocks = blocks[keep]
                q[(slice(None),) + tuple(blocks.T)] = inner.T
                _place(q_low, blocks, axis, blocks[:, axis] == 0, ends[0])
                _place(q_high, blocks, axis, blocks[:, axis] == shape[axis] - 1, ends[1])
        faces.append(q)
        low.append(q_low if shape[axis] > 0 else None)
        high.append(q_high if shape[axis] > 0 else None)
    return Measured(faces, low, high)


def _place(edge: np.ndarray, blocks: np.ndarray, axis: int, on_edge: np.ndarray, values: np.ndarray) -> None:
    """Write per-region ``values`` of the regions ``on_edge`` into a model-face array."""
    index = blocks[on_edge].T.copy()
    index[axis] = 0
    edge[tuple(index)] = values[on_edge]


class _Regions:
    """A batch of face regions (two blocks and their ring), kept to the selected ones."""

    def __init__(self, batch, domain, keep: np.ndarray, fine_shape):
        starts = np.stack([g.ravel() for g in np.meshgrid(*batch.starts, indexing="ij")], axis=1)
        if not keep.all():
            domain = type(domain)(k=tuple(k[keep] for k in domain.k),
                                  lengths=tuple(np.ascontiguousarray(v[keep]) for v in domain.lengths),
                                  target=domain.target)
        self.batch, self.domain, self.starts, self.fine_shape = batch, domain, starts[keep], fine_shape

    def fluxes(self, axis: int, fields: list[PressureField], resistance) -> tuple[np.ndarray, tuple]:
        """(regions, flows) fine flux through the face between the two blocks; and of the
        flow along ``axis``, the fluxes (regions,) through the region's two ends (into it at
        the low end, out at the high end) over the blocks' cross-section."""
        problem = LocalProblem(self.domain, periodic=False, slowest=axis)
        systems = [self._system(problem, flow, fields[flow], resistance) for flow in range(3)]
        p = self._solve(problem, systems)
        inner = np.stack([problem.face_flux(p[:, flow], self.batch.target, axis) for flow in range(3)], axis=1)
        return inner, self._end_fluxes(problem, p[:, axis], axis)

    def _end_fluxes(self, problem: LocalProblem, p: np.ndarray, axis: int) -> tuple[np.ndarray, np.ndarray]:
        """Fluxes through the region's two ends along ``axis`` at boundary pressures 1 and 0,
        over the blocks' cross-section (only meaningful where an end is on the model face)."""
        target, n = self.batch.target, self.domain.shape[axis]
        half = problem.couplings.half[axis]
        low = (slice(None),) + tuple(slice(0, 1) if a == axis else target[a] for a in range(3))
        high = (slice(None),) + tuple(slice(n - 1, n) if a == axis else target[a] for a in range(3))
        q_low = (half[low] * (1.0 - p[low])).reshape(p.shape[0], -1).sum(axis=1)
        q_high = (half[high] * p[high]).reshape(p.shape[0], -1).sum(axis=1)
        return q_low, q_high

    def _system(self, problem: LocalProblem, flow: int, field_: PressureField, resistance):
        """Diagonal and right-hand side (nb, n) of one flow's problem."""
        domain, nb = self.domain, self.domain.count
        diag = problem.coupling_sum.copy()
        rhs = np.zeros(diag.shape)
        touched = np.zeros(problem.components.count, dtype=bool)
        labels = problem.components.labels.reshape(diag.shape)
        for a in range(3):
            for end in (0, 1):
                at_edge = self.starts[:, a] == 0 if end == 0 else self.starts[:, a] + domain.shape[a] == self.fine_shape[a]
                dirichlet = np.ones(nb, dtype=bool) if a == flow else ~at_edge
                if not dirichlet.any():
                    continue
                index = 0 if end == 0 else domain.shape[a] - 1
                h = _layer(problem.couplings.half[a], a, index) * dirichlet.reshape(nb, 1, 1, 1)
                values = self._boundary_values(a, end, field_, resistance)
                if a == flow:
                    values = np.where(at_edge.reshape(nb, 1, 1, 1), 1.0 - end, values)
                _layer(diag, a, index)[...] += h
                _layer(rhs, a, index)[...] += h * values
                touched[_layer(labels, a, index)[h > 0]] = True
        flat = diag.reshape(nb, -1)
        _ground(flat, problem.components, touched)
        return flat, rhs.reshape(nb, -1)

    def _boundary_values(self, a: int, end: int, field_: PressureField, resistance) -> np.ndarray:
        """Interpolated coarse pressure on the region's outer face normal to ``a`` at ``end``
        (nb, face shape), at the fine face centres."""
        nb, shape = self.domain.count, self.domain.shape
        face = (nb,) + tuple(1 if b == a else shape[b] for b in range(3))
        points, cells = [], []
        for b in range(3):
            view = [nb, 1, 1, 1]
            if b == a:
                position = (self.starts[:, a] + (0 if end == 0 else shape[a])).astype(float)
                cell = self.starts[:, a] + (0 if end == 0 else shape[a] - 1)
                position, cell = position.reshape(view), cell.reshape(view)
            else:
                view[b + 1] = shape[b]
                cell = (self.starts[:, b][:, None] + np.arange(shape[b])[None, :]).reshape(view)
                position = cell + 0.5
            points.append(np.broadcast_to(position, face).ravel())
            cells.append(np.broadcast_to(cell, face).ravel())
        return interpolate(field_, resistance, np.stack(points, axis=1), np.stack(cells, axis=1)).reshape(face)

    def _solve(self, problem: LocalProblem, systems) -> np.ndarray:
        """Pressures (nb, flows, sx, sy, sz): one factorisation for the three flows where
        their diagonals agree (regions inside the model), one per flow elsewhere."""
        nb = self.domain.count
        diagonals = [d for d, _ in systems]
        same = np.all(diagonals[1] == diagonals[0], axis=1) & np.all(diagonals[2] == diagonals[0], axis=1)
        x = np.empty((nb, 3, problem.n))
        solve = dict(first=problem.first, second=problem.second, position=problem.pos, width=problem.width)
        if same.any():
            rhs = np.stack([r[same] for _, r in systems], axis=1)
            x[same] = solve_batch(values=problem.values[same], diagonal=diagonals[0][same], rhs=rhs, **solve)[0]
        for flow, (diagonal, rhs) in enumerate(systems):
            if (~same).any():
                x[~same, flow] = solve_batch(values=problem.values[~same], diagonal=diagonal[~same],
                                             rhs=rhs[~same][:, None], **solve)[0][:, 0]
        return x.reshape((nb, 3) + self.domain.shape)


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
