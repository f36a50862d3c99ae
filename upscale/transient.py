"""Transient drainage check: slightly compressible single-phase flow in a fine field and its
coarse grid.

Per cell i, implicit (backward) Euler from time n to n+1:

    (PV_i c_t / dt) (p_i^{n+1} - p_i^n) + sum_j (T_ij / mu) (p_i - p_j) + (T_b,i / mu) (p_i - p_w) = 0

with pressures p in bar, T in m3*cP/(day*bar) (divided by the viscosity mu in cP it is
m3/(day*bar)), pore volume PV in m3, total compressibility c_t in 1/bar and time in days.
The pressure starts uniform at ``p_initial`` and the model drains through the drainage
connection T_b, held at ``p_drain`` = p_w. The rate (positive out) at the end of a step is
q = sum_i (T_b,i / mu) (p_i^{n+1} - p_w) in m3/day, the cumulative production the sum of
q dt. Summing the cell equations, the interior fluxes cancel, so the cumulative equals the
depletion sum_i PV_i c_t (p_initial - p_i) exactly (to the round-off of the solves).

Drainage set-ups:

``face``
    one model face ('x-', 'x+', 'y-', 'y+', 'z-', 'z+': low- or high-index side along the
    axis) held at p_w through the half-cell transmissibility 2 k V / l^2 (times the metric
    constant) of each cell on it; fine cells from their own permeability, coarse cells from
    their effective permeability (kx*ntg, ky*ntg, kz) and coarse dx, dy, dz. All other sides
    are sealed.
``well``
    a vertical well-like sink in fine column (i, j), open in every layer with flow
    permeability, held at p_w. Connection factor per cell, a common approximation from
    memory (Peaceman 1978, SPE Journal 18(3); the anisotropic, non-square form Peaceman
    1983, SPE Journal 23(3)):

        T_w = C 2 pi sqrt(kx ky) dz / ln(r_e / r_w)
        r_e = 0.28 sqrt(sqrt(ky/kx) dx^2 + sqrt(kx/ky) dy^2) / ((ky/kx)^(1/4) + (kx/ky)^(1/4))

    (r_e = 0.198 dx for a square cell with kx = ky, Peaceman's 0.2 dx), kx, ky the flow
    permeability (times ntg), r_w the well radius (0.1 m by default), no skin, C the metric
    constant. The coarse well is the coarse column that holds the fine one, with the same
    formula on each coarse cell's effective permeability, dx, dy and mean thickness dz; the
    well is taken at the coarse cell's centre, whatever its fine position.

The coarse model uses the file's ``tx``, ``ty``, ``tz`` (times ``tx_multiplier``... when
present) converted to metric: T_metric = T_file * C_metric / (C_file * f) with C_file, f
the constant and metres-to-length factor of the file's units (:data:`upscale.units.
TRANSMISSIBILITY_UNITS`): for field units T_metric = T_field * 0.3048 * C_metric / C_field
= T_field * (0.158987 m3/rb) * (1e5 / 6894.757 psi/bar), about 2.306 T_field. Pore volumes
are the file's ``pore_volume``.

The core (:class:`TransientSystem`, :func:`simulate`, :func:`time_grid`) is numpy/scipy on
plain arrays; :func:`transient_check` runs both models from Datasets and returns a
JSON-ready comparison.
"""

from __future__ import annotations

import logging
import math
from collections import OrderedDict
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla
import xarray as xr
from scipy.sparse.csgraph import connected_components

from .errors import InputError
from .field import FineArrays, arrays, validate
from .tpfa import cell_geometry, check_faces, half_transmissibility, transmissibilities
from .globalflow import DIRECT_LIMIT
from .multigrid import VCycle
from .transmissibility import coarse_faces, coarse_units, transmissibility_constant
from .units import METRIC_TRANSMISSIBILITY

log = logging.getLogger(__name__)

AXES = ("x", "y", "z")
#: face name -> (axis, high side?)
FACES = {f"{name}{side}": (axis, side == "+") for axis, name in enumerate(AXES) for side in "-+"}
DRAINAGE = ("face", "well")

DEFAULT_P_INITIAL = 200.0      # bar
DEFAULT_P_DRAIN = 100.0        # bar
DEFAULT_COMPRESSIBILITY = 1e-4  # 1/bar
DEFAULT_VISCOSITY = 1.0        # cP
DEFAULT_WELL_RADIUS = 0.1      # m
#: Peaceman's equivalent-radius factor for the anisotropic, non-square form (from memory).
PEACEMAN_FACTOR = 0.28
#: Default reported time span of :func:`transient_check`, in multiples of the time scale.
DEFAULT_SPAN = (1e-3, 3.0)
#: Relative cumulative-versus-depletion mismatch above which a warning is logged (the
#: identity holds to about the solves' residual).
BALANCE_WARNING = 1e-6
#: Relative residual of each time step's solve in :func:`transient_check`: rates and
#: cumulatives are then exact to about 1e-8, far below the fine-versus-coarse differences the
#: check measures, at about two thirds of the CG iterations of 1e-10.
CHECK_SOLVE_TOLERANCE = 1e-8
#: Largest system solved by sparse LU. Measured on this project's test machine (2 shared
#: cores): SuperLU needed about 1.6 s per factorisation of an 18,000-cell 3D model (fill
#: grows fast in 3D), as long as the whole AMG-CG run of the same model; larger models go
#: to AMG-preconditioned CG, whose cost grows about linearly.


# --------------------------------------------------------------------------- the system


@dataclass(frozen=True, eq=False)
class TransientSystem:
    """A two-point flux grid with pore volumes and a constant-pressure drainage connection.

    shape (nx, ny, nz); pore_volume (nx, ny, nz) m3; first, second, face_t: flat cell
    indices (C order) and transmissibility, m3*cP/(day*bar), of every interior face with
    T > 0; drain_t (nx, ny, nz): connection transmissibility to the drainage pressure,
    m3*cP/(day*bar) (0 where not connected); solved (flat bool): cells in the pressure
    system (all but those in a group of cells with no pore volume and no drainage, whose
    pressure is undefined); drained (flat bool): cells connected to the drainage through
    faces with T > 0; description: what was built (JSON-ready).
    """

    shape: tuple[int, int, int]
    pore_volume: np.ndarray
    first: np.ndarray
    second: np.ndarray
    face_t: np.ndarray
    drain_t: np.ndarray
    solved: np.ndarray
    drained: np.ndarray
    description: dict = field(default_factory=dict)

    @property
    def size(self) -> int:
        return math.prod(self.shape)

    @property
    def total_pore_volume(self) -> float:
        """Sum of the pore volumes, m3."""
        return float(self.pore_volume.sum())

    @property
    def drainage_factor(self) -> float:
        """Sum of the drainage connection transmissibilities, m3*cP/(day*bar)."""
        return float(self.drain_t.sum())

    @classmethod
    def from_arrays(cls, pore_volume, face_t, drain_t, description: dict | None = None) -> "TransientSystem":
        """Build from pore volumes (nx, ny, nz) m3, interior-face transmissibilities per axis
        (shapes (nx-1, ny, nz), (nx, ny-1, nz), (nx, ny, nz-1)) and drainage connection
        transmissibilities (nx, ny, nz), all T in m3*cP/(day*bar)."""
        pore_volume = np.asarray(pore_volume, dtype=float)
        if pore_volume.ndim != 3:
            raise ValueError(f"pore volume must be three-dimensional, got shape {pore_volume.shape}")
        shape = pore_volume.shape
        if not np.all(np.isfinite(pore_volume)) or np.any(pore_volume < 0):
            raise ValueError("pore volumes must be finite and >= 0")
        drain_t = np.asarray(drain_t, dtype=float)
        if drain_t.shape != shape:
            raise ValueError(f"drainage transmissibilities have shape {drain_t.shape}, expected {shape}")
        if not np.all(np.isfinite(drain_t)) or np.any(drain_t < 0):
            raise ValueError("drainage transmissibilities must be finite and >= 0")
        index = np.arange(math.prod(shape)).reshape(shape)
        first, second, value = [], [], []
        for axis, t in enumerate(check_faces(face_t, shape)):
            n = shape[axis]
            keep = t > 0
            first.append(np.take(index, np.arange(n - 1), axis=axis)[keep])
            second.append(np.take(index, np.arange(1, n), axis=axis)[keep])
            value.append(t[keep])
        first, second, value = (np.concatenate(v) for v in (first, second, value))
        if not np.any(drain_t > 0):
            raise InputError("the drainage connects to no cell (no cell with flow permeability "
                             "on the drained face or in the well column)")

        n = index.size
        graph = sp.coo_matrix((np.ones(first.size), (first, second)), shape=(n, n)).tocsr()
        count, labels = connected_components(graph, directed=False)
        group_pv = np.bincount(labels, weights=pore_volume.ravel(), minlength=count)
        group_drain = np.bincount(labels, weights=drain_t.ravel(), minlength=count)
        solved = ((group_pv > 0) | (group_drain > 0))[labels]
        drained = (group_drain > 0)[labels]
        return cls(tuple(int(s) for s in shape), pore_volume, first, second, value, drain_t,
                   solved, drained, dict(description or {}))

    @classmethod
    def from_fine(cls, cells, drainage: str = "face", face: str = "x-", column=None,
                  well_radius: float = DEFAULT_WELL_RADIUS) -> "TransientSystem":
        """The fine model: two-point transmissibilities from ``cells.flow_permeability()``
        (``upscale.tpfa``) times the metric constant, pore volumes ``cells.pore_volume``.

        cells: :class:`~upscale.field.FineArrays` (or a field Dataset); drainage 'face'
        (with ``face``) or 'well' (with fine ``column`` (i, j); the grid centre if None).
        """
        if isinstance(cells, xr.Dataset):
            cells = arrays(validate(cells, where="fine field"))
        drainage = _drainage(drainage)
        k = cells.flow_permeability()
        half, faces = transmissibilities(k, cells.dx, cells.dy, cells.dz)
        faces = [METRIC_TRANSMISSIBILITY * f for f in faces]
        description = {"model": "fine", "drainage": drainage}
        if drainage == "face":
            axis, high = _face(face)
            drain_t = _face_connection(METRIC_TRANSMISSIBILITY * half[axis], axis, high)
            description["face"] = face
        else:
            i, j = _column(column, cells.shape)
            drain_t = np.zeros(cells.shape)
            drain_t[i, j, :] = well_factors(k[0][i, j], k[1][i, j], cells.dx[i], cells.dy[j],
                                            cells.dz[i, j], well_radius)
            description.update(column=[i, j], well_radius=float(well_radius))
        system = cls.from_arrays(cells.pore_volume, faces, drain_t, description)
        system.description.update(_connection_summary(drain_t))
        return system

    @classmethod
    def from_coarse(cls, coarse: xr.Dataset, drainage: str = "face", face: str = "x-", column=None,
                    fine_shape=None, well_radius: float = DEFAULT_WELL_RADIUS) -> "TransientSystem":
        """The coarse model: the file's face transmissibilities (times multipliers) in metric,
        its ``pore_volume``, and the drainage connection from the coarse cells' effective
        permeability and sizes (see the module notes).

        For 'well', ``column`` is the fine (i, j); the coarse column holding it is found from
        the file's ``x_start``/``x_stop``, ``y_start``/``y_stop``; with ``column`` None, the
        fine grid centre (fine shape from ``fine_shape`` or the file's ``fine_shape`` attribute).
        """
        ds = validate(coarse, where="coarse grid")
        cells = arrays(ds)
        drainage = _drainage(drainage)
        factor = METRIC_TRANSMISSIBILITY / transmissibility_constant(ds)
        faces = [factor * t for t in coarse_faces(ds, cells.shape)]
        if "pore_volume" in ds:
            pore_volume = np.asarray(ds["pore_volume"].transpose(*AXES).values, dtype=float) * cells.active
        else:
            pore_volume = cells.pore_volume
        k = cells.flow_permeability()
        description = {"model": "coarse", "drainage": drainage,
                       "transmissibility_units_in": coarse_units(ds)}
        if drainage == "face":
            axis, high = _face(face)
            volume, lengths = cell_geometry(cells.dx, cells.dy, cells.dz)
            half = METRIC_TRANSMISSIBILITY * half_transmissibility(k[axis], volume, lengths[axis])
            drain_t = _face_connection(half, axis, high)
            description["face"] = face
        else:
            if fine_shape is None and "fine_shape" in ds.attrs:
                written = str(ds.attrs["fine_shape"])
                try:
                    fine_shape = tuple(int(v) for v in written.split())
                except ValueError:
                    raise InputError(f"coarse grid: attribute 'fine_shape' is {written!r}, not three whole "
                                     f"numbers") from None
            starts = fine_starts(ds, fine_shape, required=True)
            if fine_shape is None:
                fine_shape = tuple(int(ds[f"{n}_stop"].values[-1]) for n in AXES)
            i, j = _column(column, fine_shape)
            ci = int(np.searchsorted(starts[0], i, side="right") - 1)
            cj = int(np.searchsorted(starts[1], j, side="right") - 1)
            drain_t = np.zeros(cells.shape)
            drain_t[ci, cj, :] = well_factors(k[0][ci, cj], k[1][ci, cj], cells.dx[ci], cells.dy[cj],
                                              cells.dz[ci, cj], well_radius)
            description.update(column=[i, j], coarse_column=[ci, cj], well_radius=float(well_radius))
        system = cls.from_arrays(pore_volume, faces, drain_t, description)
        system.description.update(_connection_summary(drain_t))
        return system


def _drainage(drainage: str) -> str:
    if drainage not in DRAINAGE:
        raise InputError(f"unknown drainage '{drainage}'; choose face or well")
    return drainage


def _face(face: str) -> tuple[int, bool]:
    if face not in FACES:
        raise InputError(f"unknown face {face!r}; choose one of {', '.join(FACES)}")
    return FACES[face]


def _column(column, shape) -> tuple[int, int]:
    """Fine well column (i, j), the grid centre if None; checked against ``shape``."""
    if column is None:
        return shape[0] // 2, shape[1] // 2
    try:
        values = [float(c) for c in column]
    except (TypeError, ValueError):
        values = []
    if len(values) != 2 or not all(math.isfinite(v) and v == int(v) for v in values):
        raise InputError(f"well column must be two whole numbers (i, j), got {column!r}")
    i, j = (int(v) for v in values)
    if not (0 <= i < shape[0] and 0 <= j < shape[1]):
        raise InputError(f"well column ({i}, {j}) is outside the fine grid of {shape[0]} x {shape[1]} columns")
    return i, j


def _face_connection(half: np.ndarray, axis: int, high: bool) -> np.ndarray:
    """Drainage transmissibility: the half-cell values of the face's cells, 0 elsewhere."""
    out = np.zeros(half.shape)
    index = [slice(None)] * 3
    index[axis] = half.shape[axis] - 1 if high else 0
    out[tuple(index)] = half[tuple(index)]
    return out


def _connection_summary(drain_t: np.ndarray) -> dict:
    return {"connection_factor": float(drain_t.sum()), "connected_cells": int(np.count_nonzero(drain_t))}


def well_factors(kx, ky, dx, dy, dz, radius: float = DEFAULT_WELL_RADIUS,
                 constant: float = METRIC_TRANSMISSIBILITY) -> np.ndarray:
    """Connection factors of a vertical well in one column, m3*cP/(day*bar) (see module notes).

    kx, ky: flow permeability of the column's cells (mD, times ntg); dx, dy: the column's
    cell sizes (m); dz (nz,): thicknesses (m); radius: well radius r_w (m). Cells with
    kx * ky = 0 or dz = 0 get 0. Raises InputError if a cell's equivalent radius is not
    larger than the well radius (cell too small for the well).
    """
    kx = np.asarray(kx, dtype=float)
    ky = np.asarray(ky, dtype=float)
    dz = np.asarray(dz, dtype=float)
    if not (np.isfinite(radius) and radius > 0):
        raise InputError(f"well radius must be > 0 m, got {radius}")
    out = np.zeros(np.broadcast(kx, ky, dz).shape)
    open_ = (kx * ky > 0) & (dz > 0)
    if not open_.any():
        return out
    kxo, kyo = np.broadcast_to(kx, out.shape)[open_], np.broadcast_to(ky, out.shape)[open_]
    anisotropy = np.sqrt(kyo / kxo)            # (ky/kx)^(1/2)
    r_e = (PEACEMAN_FACTOR * np.sqrt(anisotropy * dx ** 2 + dy ** 2 / anisotropy)
           / (np.sqrt(anisotropy) + 1.0 / np.sqrt(anisotropy)))
    if np.any(r_e <= radius):
        raise InputError(f"well radius {radius} m is not smaller than the equivalent radius "
                         f"{float(r_e.min()):.4g} m of the well cells (dx {dx} m, dy {dy} m); "
                         f"use a smaller well radius")
    out[open_] = constant * 2.0 * math.pi * np.sqrt(kxo * kyo) * np.broadcast_to(dz, out.shape)[open_] \
        / np.log(r_e / radius)
    return out


# --------------------------------------------------------------------------- coarse file


def fine_starts(coarse: xr.Dataset, fine_shape=None, required: bool = False):
    """First fine index of each coarse block per axis (from x_start/x_stop ...), checked to
    tile ``fine_shape`` when given; None if absent and not ``required``."""
    if not all(f"{n}_start" in coarse and f"{n}_stop" in coarse for n in AXES):
        if required:
            raise InputError("coarse grid: missing x_start/x_stop, y_start/y_stop or z_start/z_stop "
                             "(fine index ranges); is it a coarse grid written by upscale?")
        return None
    starts = []
    for axis, name in enumerate(AXES):
        start = np.asarray(coarse[f"{name}_start"].values, dtype=np.int64)
        stop = np.asarray(coarse[f"{name}_stop"].values, dtype=np.int64)
        ok = (start.size == coarse.sizes[name] and start.size > 0 and start[0] == 0
              and np.all(stop > start) and np.all(start[1:] == stop[:-1])
              and (fine_shape is None or stop[-1] == fine_shape[axis]))
        if not ok:
            where = f"the fine grid's {fine_shape[axis]} cells" if fine_shape is not None else "a grid"
            raise InputError(f"coarse grid: '{name}_start'/'{name}_stop' do not tile {where} along "
                             f"{name} in order; is it the coarse grid of this field?")
        starts.append(start)
    return starts


# --------------------------------------------------------------------------- time stepping


def time_grid(first: float, end: float, steps_per_doubling: int = 8) -> np.ndarray:
    """Step end times (days) with geometric step growth and few distinct steps.

    ``steps_per_doubling`` equal steps from 0 to ``first``; then the step doubles and is
    taken ``steps_per_doubling / 2`` times, so each phase doubles the time, until ``end`` is
    reached (the last time is first * 2^m >= end). dt / t stays between 1/s and 2/s.
    """
    s = int(steps_per_doubling)
    if s < 2 or s % 2:
        raise InputError(f"steps per doubling must be an even number >= 2, got {steps_per_doubling}")
    if not (np.isfinite(first) and np.isfinite(end) and 0 < first <= end):
        raise InputError(f"time grid needs 0 < first <= end, got first {first}, end {end}")
    phases = max(0, math.ceil(math.log2(end / first) - 1e-12))
    times = [first * np.arange(1, s + 1) / s]
    for m in range(1, phases + 1):
        start = first * 2.0 ** (m - 1)
        times.append(start + start * np.arange(1, s // 2 + 1) / (s // 2))
    return np.concatenate(times)


def projected_guess(A, b: np.ndarray, vectors) -> np.ndarray:
    """The A-norm best approximation of the solution of ``A x = b`` (A symmetric positive
    definite) in the span of ``vectors``: x0 = W (W^T A W)^-1 W^T b with W an orthonormal
    basis of the span (nearly dependent directions dropped). Successive time steps have
    nearly the same solution space, so CG from x0 needs far fewer iterations (Fischer 1998,
    Projection techniques for iterative solution of Ax = b with successive right-hand
    sides, Comput. Methods Appl. Mech. Engrg. 163; from memory)."""
    W, R = np.linalg.qr(np.column_stack(vectors))
    keep = np.abs(np.diag(R)) > 1e-10 * np.abs(np.diag(R)).max(initial=0.0)
    if not keep.any():
        return np.zeros_like(b)
    W = W[:, keep]
    gram = W.T @ (A @ W)
    return W @ np.linalg.solve(gram, W.T @ b)


class _StepSolver:
    """Solves (diag(storage / dt) + K) u = rhs, one factorisation (or AMG hierarchy) per
    distinct dt, the last few kept. The matrix is scaled to unit diagonal first. CG starts
    from :func:`projected_guess` over the last pressure and the last ``REMEMBER`` solutions."""

    REMEMBER = 6

    def __init__(self, K, storage, direct_limit: int, tolerance: float, keep: int = 4):
        self.K = K
        self.storage = storage
        self.direct = storage.size <= direct_limit
        self.tolerance = tolerance
        self.keep = keep
        self.cache: OrderedDict = OrderedDict()
        self.factorisations = 0
        self.iterations = 0
        self.worst_residual = 0.0
        self.history: list[np.ndarray] = []  # the last solutions, newest first

    def _prepare(self, dt: float):
        for known, entry in self.cache.items():
            if abs(known - dt) <= 1e-12 * dt:
                self.cache.move_to_end(known)
                return known, entry
        A = (self.K + sp.diags(self.storage / dt)).tocsr()
        scale = 1.0 / np.sqrt(A.diagonal())
        D = sp.diags(scale)
        scaled = (D @ A @ D).tocsc() if self.direct else (D @ A @ D).tocsr()
        if self.direct:
            solver = spla.splu(scaled, permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0,
                               options={"SymmetricMode": True})
        else:
            solver = VCycle(scaled)
        entry = (A, scaled, scale, solver)
        self.cache[dt] = entry
        self.factorisations += 1
        while len(self.cache) > self.keep:
            self.cache.popitem(last=False)
        return dt, entry

    def step(self, dt: float, u: np.ndarray) -> tuple[np.ndarray, float]:
        dt, (A, scaled, scale, solver) = self._prepare(dt)
        rhs = self.storage / dt * u
        norm = np.linalg.norm(rhs)
        if norm == 0.0:
            return np.zeros_like(u), dt
        if self.direct:
            x = scale * solver.solve(scale * rhs)
            for _ in range(2):
                r = rhs - A @ x
                if np.linalg.norm(r) <= self.tolerance * norm:
                    break
                x += scale * solver.solve(scale * r)
        else:
            count = 0

            def counter(_):
                nonlocal count
                count += 1

            b = scale * rhs
            y, _ = spla.cg(scaled, b, x0=projected_guess(scaled, b, [v / scale for v in (u, *self.history)]),
                           rtol=self.tolerance, atol=0.0, maxiter=1000, M=solver, callback=counter)
            self.iterations += count
            x = scale * y
            self.history = [x, *self.history[:self.REMEMBER - 1]]
        residual = float(np.linalg.norm(rhs - A @ x) / norm)
        self.worst_residual = max(self.worst_residual, residual)
        return x, dt


def _check_fluid(compressibility: float, viscosity: float) -> None:
    """InputError unless the total compressibility (1/bar) and viscosity (cP) are > 0."""
    for name, value in (("compressibility", compressibility), ("viscosity", viscosity)):
        if not (np.isfinite(value) and value > 0):
            raise InputError(f"{name} must be > 0, got {value}")


def simulate(system: TransientSystem, times_days, p_initial: float = DEFAULT_P_INITIAL,
             p_drain: float = DEFAULT_P_DRAIN, compressibility: float = DEFAULT_COMPRESSIBILITY,
             viscosity: float = DEFAULT_VISCOSITY, keep_pressures: bool = False,
             direct_limit: int = DIRECT_LIMIT, tolerance: float = 1e-10) -> dict:
    """Drain ``system`` from a uniform ``p_initial`` (bar) at ``p_drain`` (bar).

    times_days: increasing step end times (days; the first step starts at 0), each step
    implicit Euler (see :func:`time_grid` for a geometric grid that reuses factorisations).
    compressibility c_t (1/bar), viscosity (cP). Systems with at most ``direct_limit``
    unknowns are solved by sparse LU (SuperLU in symmetric mode, refined up to twice while
    the relative residual is above ``tolerance``), larger ones by conjugate gradients with a
    pyamg smoothed aggregation preconditioner (to ``tolerance``, warm-started from the last
    pressure); either way one factorisation or hierarchy per distinct step, the last four
    kept. The cumulative-versus-depletion identity holds to about the solves' residual.

    Returns a dict of numpy values: 'time' (days), 'rate' (m3/day, positive out, at each
    time), 'cumulative' (m3), 'depletion' (sum PV c_t (p_initial - p), m3, at each time:
    equal to 'cumulative' to round-off), 'balance_error' (largest |cumulative - depletion|
    over the final depletion), 'pressure' (bar, (nx, ny, nz), at the last time; NaN in cells
    outside the pressure system), 'drainable' (sum PV c_t (p_initial - p_drain) over the
    cells connected to the drainage, m3: the cumulative at infinite time), 'pore_volume'
    (m3), 'solver' (method, factorisations, iterations, worst relative residual); with
    ``keep_pressures``, 'pressures' (nt, nx, ny, nz).
    """
    times = np.asarray(times_days, dtype=float).ravel()
    if times.size == 0 or not np.all(np.isfinite(times)) or times[0] <= 0 or np.any(np.diff(times) <= 0):
        raise InputError("times must be finite, > 0 and strictly increasing (days)")
    _check_fluid(compressibility, viscosity)
    for name, value in (("initial pressure", p_initial), ("drainage pressure", p_drain)):
        if not np.isfinite(value):
            raise InputError(f"{name} must be finite, got {value}")

    solved = np.flatnonzero(system.solved)
    position = np.full(system.size, -1)
    position[solved] = np.arange(solved.size)
    first, second = position[system.first], position[system.second]
    inside = (first >= 0) & (second >= 0)  # always both or neither: faces stay within a group
    first, second, value = first[inside], second[inside], system.face_t[inside] / viscosity
    drain = system.drain_t.ravel()[solved] / viscosity
    m = solved.size
    diagonal = (np.bincount(first, weights=value, minlength=m) + np.bincount(second, weights=value, minlength=m)
                + drain)
    K = sp.csr_matrix((np.concatenate([diagonal, -value, -value]),
                       (np.concatenate([np.arange(m), first, second]),
                        np.concatenate([np.arange(m), second, first]))), shape=(m, m))
    pv = system.pore_volume.ravel()[solved]
    storage = pv * compressibility
    solver = _StepSolver(K, storage, direct_limit, tolerance)

    u = np.full(m, float(p_initial) - float(p_drain))   # pressure above the drainage pressure
    u0 = u.copy()
    rate = np.zeros(times.size)
    cumulative = np.zeros(times.size)
    depletion = np.zeros(times.size)
    pressures = np.full((times.size, system.size), np.nan) if keep_pressures else None
    total, previous = 0.0, 0.0
    for n, t in enumerate(times):
        u, dt = solver.step(t - previous, u)
        previous = t
        rate[n] = float(drain @ u)
        total += rate[n] * dt
        cumulative[n] = total
        depletion[n] = float(storage @ (u0 - u))
        if keep_pressures:
            pressures[n, solved] = u + p_drain
    scale = max(abs(depletion[-1]), np.finfo(float).tiny)
    balance = float(np.max(np.abs(cumulative - depletion)) / scale)
    if balance > BALANCE_WARNING:
        log.warning("transient run: cumulative production and depletion differ by %.2e (relative)", balance)
    pressure = np.full(system.size, np.nan)
    pressure[solved] = u + p_drain
    drained = system.drained.ravel()
    result = {
        "time": times,
        "rate": rate,
        "cumulative": cumulative,
        "depletion": depletion,
        "balance_error": balance,
        "pressure": pressure.reshape(system.shape),
        "drainable": float(np.sum(system.pore_volume.ravel()[drained]) * compressibility
                           * (float(p_initial) - float(p_drain))),
        "pore_volume": system.total_pore_volume,
        "solver": {"method": "direct" if solver.direct else "amg-cg", "unknowns": int(m),
                   "factorisations": solver.factorisations, "iterations": solver.iterations,
                   "worst_relative_residual": solver.worst_residual},
    }
    if keep_pressures:
        result["pressures"] = pressures.reshape((times.size,) + system.shape)
    return result


# --------------------------------------------------------------------------- time scale


def time_scale(cells: FineArrays, drainage: str = "face", face: str = "x-", column=None,
               compressibility: float = DEFAULT_COMPRESSIBILITY, viscosity: float = DEFAULT_VISCOSITY,
               connection_factor: float | None = None) -> dict:
    """Drainage time scale of a fine field, days (JSON-ready dict).

    Diffusion time t_D = L^2 phi mu c_t / (C k) with C = METRIC_TRANSMISSIBILITY (0.008527:
    D = C k / (phi mu c_t) is in m2/day for k in mD, mu in cP, c_t in 1/bar), phi = total
    pore volume / active bulk volume, k the bulk-volume-weighted mean flow permeability of
    the active cells (along the face's axis; sqrt(kx ky) for the well). L: for a face, the
    model length along its axis (sum of dx, of dy, or the mean thickness); for the well, the
    horizontal distance from the well column's centre to the farthest model corner. For the
    well the tank time PV c_t mu / J (J = ``connection_factor``, the summed well connection
    factors) is added: the connection's own delay.
    """
    drainage = _drainage(drainage)
    bulk = cells.bulk_volume * cells.active
    volume = float(bulk.sum())
    pore = float(cells.pore_volume.sum())
    if volume <= 0 or pore <= 0:
        raise InputError("the field has no pore volume: nothing drains")
    phi = pore / volume
    k = cells.flow_permeability()
    lx, ly = float(cells.dx.sum()), float(cells.dy.sum())
    if drainage == "face":
        axis, _ = _face(face)
        perm = float(np.sum(k[axis] * bulk) / volume)
        length = (lx, ly, float(cells.bulk_volume.sum()) / (lx * ly))[axis]
    else:
        i, j = _column(column, cells.shape)
        perm = float(np.sum(np.sqrt(k[0] * k[1]) * bulk) / volume)
        xc = float(cells.dx[:i].sum() + cells.dx[i] / 2)
        yc = float(cells.dy[:j].sum() + cells.dy[j] / 2)
        length = math.hypot(max(xc, lx - xc), max(yc, ly - yc))
    if perm <= 0:
        raise InputError("the field has no flow permeability along the drainage direction")
    diffusion = length ** 2 * phi * viscosity * compressibility / (METRIC_TRANSMISSIBILITY * perm)
    out = {"diffusion_time_days": diffusion, "length_m": length, "permeability_mD": perm,
           "porosity": phi, "time_scale_days": diffusion}
    if drainage == "well" and connection_factor:
        tank = pore * compressibility * viscosity / connection_factor
        out.update(connection_time_days=tank, time_scale_days=diffusion + tank)
    return out


# --------------------------------------------------------------------------- fine vs coarse


def _number(value) -> float | None:
    value = float(value)
    return value if math.isfinite(value) else None


def _relative(a, b):
    """(a - b) / b elementwise as a list, None where b is 0."""
    return [None if bb == 0 else _number((aa - bb) / bb) for aa, bb in zip(np.ravel(a), np.ravel(b))]


def check_options(coarse: xr.Dataset, fine_shape, drainage: str = "face", face: str = "x-", column=None,
                  compressibility: float = DEFAULT_COMPRESSIBILITY, viscosity: float = DEFAULT_VISCOSITY,
                  steps_per_doubling: int = 8, span=DEFAULT_SPAN, **_ignored):
    """Check the set-up of :func:`transient_check` before any work; InputError if wrong.
    Returns the well column (i, j) for 'well', else ``column`` unchanged."""
    drainage = _drainage(drainage)
    if drainage == "well":
        column = _column(column, fine_shape)
        fine_starts(coarse, fine_shape, required=True)
    else:
        _face(face)
        fine_starts(coarse, fine_shape, required=False)
    _check_fluid(compressibility, viscosity)
    try:
        first, end = (float(v) for v in span)
    except (TypeError, ValueError):
        raise InputError(f"time span must be two numbers (multiples of the time scale), got {span!r}") from None
    time_grid(first, end, steps_per_doubling)  # raises on a bad span or step count
    return column


def transient_check(fine: xr.Dataset, coarse: xr.Dataset, drainage: str = "face", face: str = "x-",
                    column=None, times=None, p_initial: float = DEFAULT_P_INITIAL,
                    p_drain: float = DEFAULT_P_DRAIN, compressibility: float = DEFAULT_COMPRESSIBILITY,
                    viscosity: float = DEFAULT_VISCOSITY, well_radius: float = DEFAULT_WELL_RADIUS,
                    span=DEFAULT_SPAN, steps_per_doubling: int = 8, direct_limit: int = DIRECT_LIMIT,
                    solve_tolerance: float = CHECK_SOLVE_TOLERANCE) -> dict:
    """Drain a fine field and its coarse grid the same way and compare; JSON-ready dict.

    drainage 'face' (``face`` 'x-' ... 'z+') or 'well' (fine ``column`` (i, j), the grid
    centre if None). times: step end times in days; by default :func:`time_grid` from
    span[0] to span[1] times the fine field's time scale (:func:`time_scale`). Both models
    use the same time grid (implicit Euler), so the comparison isolates the upscaling error
    from the time-stepping error. solve_tolerance: relative residual of each step's solve.

    Returns: 'drainage' (set-up, both models' connection factors), 'time_scale' (see
    :func:`time_scale`), 'times' (days), 'fine' and 'coarse' each with 'rate' (m3/day),
    'cumulative' (m3), 'drained_fraction_end' (cumulative / drainable at the last time),
    'pore_volume' (m3), 'balance_error', 'cells', 'solver'; 'cumulative_relative_error' and
    'rate_relative_error' ((coarse - fine) / fine at each time, None where fine is 0),
    'final_cumulative_relative_error', 'pore_volume_relative_difference' ((coarse - fine) /
    fine), and the pressures, compressibility and viscosity used.
    """
    fine = validate(fine, where="fine field")
    coarse = validate(coarse, where="coarse grid")
    cells = arrays(fine)
    column = check_options(coarse, cells.shape, drainage, face, column, compressibility, viscosity,
                           steps_per_doubling)
    fine_system = TransientSystem.from_fine(cells, drainage, face, column, well_radius)
    coarse_system = TransientSystem.from_coarse(coarse, drainage, face, column, cells.shape, well_radius)
    scale = time_scale(cells, drainage, face, column, compressibility, viscosity,
                       fine_system.drainage_factor)
    if times is None:
        times = time_grid(span[0] * scale["time_scale_days"], span[1] * scale["time_scale_days"],
                          steps_per_doubling)
    runs = {}
    for name, system in (("fine", fine_system), ("coarse", coarse_system)):
        result = simulate(system, times, p_initial, p_drain, compressibility, viscosity,
                          direct_limit=direct_limit, tolerance=solve_tolerance)
        runs[name] = result
    f, c = runs["fine"], runs["coarse"]

    def summary(result, system):
        drainable = result["drainable"]
        return {
            "rate": [_number(v) for v in result["rate"]],
            "cumulative": [_number(v) for v in result["cumulative"]],
            "drained_fraction_end": _number(result["cumulative"][-1] / drainable) if drainable else None,
            "pore_volume": _number(result["pore_volume"]),
            "drainable": _number(drainable),
            "balance_error": _number(result["balance_error"]),
            "cells": int(system.size),
            "solver": {k: (_number(v) if isinstance(v, float) else v) for k, v in result["solver"].items()},
        }

    pv_f, pv_c = f["pore_volume"], c["pore_volume"]
    error = _relative(c["cumulative"], f["cumulative"])
    setup = {"type": drainage}
    if drainage == "face":
        setup["face"] = face
    else:
        setup.update(column=list(fine_system.description["column"]),
                     coarse_column=list(coarse_system.description["coarse_column"]),
                     well_radius=float(well_radius))
    setup["connection_factor"] = {"fine": _number(fine_system.drainage_factor),
                                  "coarse": _number(coarse_system.drainage_factor),
                                  "units": "m3*cP/(day*bar)"}
    return {
        "drainage": setup,
        "p_initial_bar": float(p_initial),
        "p_drain_bar": float(p_drain),
        "compressibility_per_bar": float(compressibility),
        "viscosity_cP": float(viscosity),
        "time_scale": {k: _number(v) for k, v in scale.items()},
        "times": [_number(t) for t in np.asarray(times, dtype=float)],
        "fine": summary(f, fine_system),
        "coarse": summary(c, coarse_system),
        "cumulative_relative_error": error,
        "rate_relative_error": _relative(c["rate"], f["rate"]),
        "final_cumulative_relative_error": error[-1],
        "pore_volume_relative_difference": _number((pv_c - pv_f) / pv_f) if pv_f else None,
    }
