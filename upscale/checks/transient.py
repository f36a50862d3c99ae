"""The transient drainage check of a coarse grid against its fine field (see
:mod:`upscale.core.transient` for the equations and drainage set-ups).

The coarse model uses the file's ``tx``, ``ty``, ``tz`` (times ``tx_multiplier``... when
present) converted to metric: T_metric = T_file * C_metric / (C_file * f) with C_file, f
the constant and metres-to-length factor of the file's units
(:data:`upscale.core.units.TRANSMISSIBILITY_UNITS`). Pore volumes are the file's
``pore_volume``.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import xarray as xr

from ..core.grid import AXES
from ..core.pressure import DIRECT_LIMIT
from ..core.transient import (
    CHECK_SOLVE_TOLERANCE,
    DEFAULT_COMPRESSIBILITY,
    DEFAULT_P_DRAIN,
    DEFAULT_P_INITIAL,
    DEFAULT_SPAN,
    DEFAULT_VISCOSITY,
    DEFAULT_WELL_RADIUS,
    TransientSystem,
    check_drainage,
    check_fluid,
    connection_summary,
    drainage_face,
    face_connection,
    simulate,
    time_grid,
    time_scale,
    well_column,
    well_factors,
)
from ..core.two_point import transmissibilities
from ..core.units import METRIC_TRANSMISSIBILITY
from ..errors import InputError
from ..io.coarse_file import coarse_faces, coarse_partition, coarse_units, transmissibility_constant
from ..io.schema import arrays
from ..io.validation import validate


def coarse_system(coarse: xr.Dataset, drainage: str = "face", face: str = "x-", column=None,
                  fine_shape=None, well_radius: float = DEFAULT_WELL_RADIUS) -> TransientSystem:
    """The coarse model of the transient check.

    The file's face transmissibilities (times multipliers) in metric, its
    ``pore_volume``, and the drainage connection from the coarse cells' effective
    permeability and sizes (see the module notes).

    Parameters
    ----------
    coarse : xarray.Dataset
        A coarse grid file's dataset.
    drainage : str
        "face" or "well".
    face : str
        The drained face for "face": "x-", "x+", "y-", "y+", "z-" or "z+".
    column : tuple of int, optional
        For "well", the fine column (i, j); the coarse column holding it is found from
        the file's ``x_start``/``x_stop``, ``y_start``/``y_stop``. None: the fine grid
        centre.
    fine_shape : tuple of int, optional
        (nx, ny, nz) of the fine grid; None: the file's ``fine_shape`` attribute, else the
        end of its fine-index ranges.
    well_radius : float
        Well radius r_w, m.

    Returns
    -------
    TransientSystem
        The coarse model, its ``description`` naming the set-up and the connection.
    """
    ds = validate(coarse, where="coarse grid")
    cells = arrays(ds)
    drainage = check_drainage(drainage)
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
        drain_t = _face_drain(cells, k, face)
        description["face"] = face
    else:
        drain_t = _well_drain(ds, cells, k, column, fine_shape, well_radius, description)
    system = TransientSystem.from_arrays(pore_volume, faces, drain_t, description)
    system.description.update(connection_summary(drain_t))
    return system


def _face_drain(cells, k, face: str) -> np.ndarray:
    """Drainage connection of the coarse cells on ``face``: their half-cell
    transmissibility along the face's axis, metric (across coarse cells pinched out at the
    top or bottom with pinch-out connections, :func:`upscale.io.coarse_file.coarse_two_point`)."""
    axis, high = drainage_face(face)
    halves, _ = transmissibilities(k, cells.dx, cells.dy, cells.dz, cells.pinch_connections)
    return face_connection(METRIC_TRANSMISSIBILITY * halves[axis], axis, high)


def _well_drain(ds: xr.Dataset, cells, k, column, fine_shape, well_radius: float, description: dict) -> np.ndarray:
    """Drainage connection of the coarse column holding the fine well column; adds the
    fine and coarse columns and the well radius to ``description``."""
    if fine_shape is None and "fine_shape" in ds.attrs:
        written = str(ds.attrs["fine_shape"])
        try:
            fine_shape = tuple(int(v) for v in written.split())
        except ValueError:
            raise InputError(f"coarse grid: attribute 'fine_shape' is {written!r}, not three whole "
                             f"numbers") from None
    edges = coarse_partition(ds, fine_shape).edges
    i, j = well_column(column, fine_shape or tuple(int(e[-1]) for e in edges))
    ci = int(np.searchsorted(edges[0], i, side="right") - 1)
    cj = int(np.searchsorted(edges[1], j, side="right") - 1)
    drain_t = np.zeros(cells.shape)
    drain_t[ci, cj, :] = well_factors(k[0][ci, cj], k[1][ci, cj], cells.dx[ci], cells.dy[cj],
                                      cells.dz[ci, cj], well_radius)
    description.update(column=[i, j], coarse_column=[ci, cj], well_radius=float(well_radius))
    return drain_t


def _number(value) -> float | None:
    """``value`` as a float, None when it is not finite (JSON has no NaN)."""
    value = float(value)
    return value if math.isfinite(value) else None


def _relative(a, b):
    """(a - b) / b elementwise as a list, None where b is 0."""
    return [None if bb == 0 else _number((aa - bb) / bb) for aa, bb in zip(np.ravel(a), np.ravel(b))]


@dataclasses.dataclass(frozen=True)
class DrainageOptions:
    """The options of :func:`transient_check` and :func:`fine_transient_run` (see there for
    each), with their defaults."""

    drainage: str = "face"
    face: str = "x-"
    column: tuple | None = None
    times: object = None
    p_initial: float = DEFAULT_P_INITIAL
    p_drain: float = DEFAULT_P_DRAIN
    compressibility: float = DEFAULT_COMPRESSIBILITY
    viscosity: float = DEFAULT_VISCOSITY
    well_radius: float = DEFAULT_WELL_RADIUS
    span: tuple = DEFAULT_SPAN
    steps_per_doubling: int = 8
    direct_limit: int = DIRECT_LIMIT
    solve_tolerance: float = CHECK_SOLVE_TOLERANCE

    @classmethod
    def of(cls, options: dict) -> "DrainageOptions":
        """The options given by name; InputError naming any unknown one."""
        known = [f.name for f in dataclasses.fields(cls)]
        unknown = sorted(set(options) - set(known))
        if unknown:
            raise InputError(f"transient check: unknown option(s) {', '.join(unknown)}; "
                             f"known: {', '.join(known)}")
        return cls(**options)


def check_options(coarse: xr.Dataset, fine_shape, **options):
    """Check the set-up of :func:`transient_check` before any work.

    Parameters
    ----------
    coarse : xarray.Dataset
        The coarse grid: its fine-index ranges must tile ``fine_shape`` (required for
        "well").
    fine_shape : tuple of int
        (nx, ny, nz) of the fine field.
    **options
        As for :func:`transient_check` (:class:`DrainageOptions`).

    Returns
    -------
    tuple of int or None
        The well column (i, j) for "well", else the ``column`` option unchanged.

    Raises
    ------
    InputError
        If any option is wrong or unknown.
    """
    return _checked_column(coarse, fine_shape, DrainageOptions.of(options))


def _checked_column(coarse: xr.Dataset, fine_shape, o: DrainageOptions):
    """:func:`check_options` on options already gathered."""
    drainage = check_drainage(o.drainage)
    column = o.column
    if drainage == "well":
        column = well_column(column, fine_shape)
        coarse_partition(coarse, fine_shape)
    else:
        drainage_face(o.face)
        coarse_partition(coarse, fine_shape, required=False)
    check_fluid(o.compressibility, o.viscosity)
    try:
        first, end = (float(v) for v in o.span)
    except (TypeError, ValueError):
        raise InputError(f"time span must be two numbers (multiples of the time scale), got {o.span!r}") from None
    time_grid(first, end, o.steps_per_doubling)  # raises on a bad span or step count
    return column


def transient_check(fine: xr.Dataset, coarse: xr.Dataset, fine_run: dict | None = None, **options) -> dict:
    """Drain a fine field and its coarse grid the same way and compare.

    Both models use the same time grid and steps (second order: BDF2, implicit Euler where
    the step doubles; :mod:`upscale.core.transient`). Cumulatives converge quickly with the
    steps per doubling; rates late in the decline, where they fall by orders of magnitude
    within a few steps, converge slowly, and their relative errors depend on the step:
    check them with more steps per doubling.

    Parameters
    ----------
    fine, coarse : xarray.Dataset
        The fine field and its coarse grid.
    fine_run : dict, optional
        The fine model's run with the same options, already made
        (:func:`fine_transient_run`, e.g. on a worker process); None: run here.
    **options
        Any of the options below (:class:`DrainageOptions`); an unknown one raises
        InputError.

    Other Parameters
    ----------------
    drainage, face, column, well_radius
        "face" (``face`` "x-" ... "z+") or "well" (fine ``column`` (i, j), the grid
        centre if None; ``well_radius`` in m).
    times : array_like, optional
        Step end times, days; by default :func:`time_grid` from span[0] to span[1] times
        the fine field's time scale (:func:`time_scale`), ``steps_per_doubling`` per doubling.
    p_initial, p_drain, compressibility, viscosity : float
        Initial and drainage pressure (bar), total compressibility (1/bar), viscosity (cP).
    direct_limit : int
        Largest model solved directly (more unknowns: AMG-preconditioned CG).
    solve_tolerance : float
        Relative residual of each step's solve.

    Returns
    -------
    dict
        JSON-ready: 'drainage' (set-up, both models' connection factors), 'time_scale' (see
        :func:`time_scale`), 'times' (days), 'fine' and 'coarse' each with 'rate' (m3/day),
        'cumulative' (m3), 'drained_fraction_end' (cumulative / drainable at the last
        time), 'pore_volume' (m3), 'balance_error', 'cells', 'solver';
        'cumulative_relative_error' and 'rate_relative_error' ((coarse - fine) / fine at
        each time, None where fine is 0), 'final_cumulative_relative_error',
        'pore_volume_relative_difference' ((coarse - fine) / fine), and the pressures,
        compressibility and viscosity used.
    """
    o = DrainageOptions.of(options)
    models, scale, times = _set_up(fine, coarse, o)
    runs = {name: fine_run if name == "fine" and fine_run is not None else _run(system, times, o)
            for name, system in models.items()}
    return {
        "drainage": _drainage_setup(o.drainage, o.face, o.well_radius, models),
        "p_initial_bar": float(o.p_initial),
        "p_drain_bar": float(o.p_drain),
        "compressibility_per_bar": float(o.compressibility),
        "viscosity_cP": float(o.viscosity),
        "time_scale": {k: _number(v) for k, v in scale.items()},
        "times": [_number(t) for t in np.asarray(times, dtype=float)],
        **_comparison(runs, models),
    }


def fine_transient_run(fine: xr.Dataset, coarse: xr.Dataset, **options) -> dict:
    """The fine model's run of :func:`transient_check` alone, with the same options.

    Returns
    -------
    dict
        That of :func:`upscale.core.transient.simulate`: pass it to :func:`transient_check`
        as ``fine_run``.
    """
    o = DrainageOptions.of(options)
    models, _, times = _set_up(fine, coarse, o)
    return _run(models["fine"], times, o)


def _run(system: TransientSystem, times, o: DrainageOptions) -> dict:
    """One model's drainage run (:func:`upscale.core.transient.simulate`) with the options ``o``."""
    return simulate(system, times, o.p_initial, o.p_drain, o.compressibility, o.viscosity,
                    direct_limit=o.direct_limit, tolerance=o.solve_tolerance)


def _set_up(fine: xr.Dataset, coarse: xr.Dataset, o: DrainageOptions):
    """Both models (fine and coarse :class:`TransientSystem`), the fine field's time scale
    and the step end times (the ``times`` option, else the default grid over ``span``
    time scales)."""
    fine = validate(fine, where="fine field")
    coarse = validate(coarse, where="coarse grid")
    cells = arrays(fine)
    column = _checked_column(coarse, cells.shape, o)
    models = {"fine": TransientSystem.from_fine(cells, o.drainage, o.face, column, o.well_radius),
              "coarse": coarse_system(coarse, o.drainage, o.face, column, cells.shape, o.well_radius)}
    scale = time_scale(cells, o.drainage, o.face, column, o.compressibility, o.viscosity,
                       models["fine"].drainage_factor)
    times = o.times
    if times is None:
        times = time_grid(o.span[0] * scale["time_scale_days"], o.span[1] * scale["time_scale_days"],
                          o.steps_per_doubling)
    return models, scale, times


def _drainage_setup(drainage: str, face: str, well_radius: float, models: dict) -> dict:
    """The 'drainage' entry: the set-up and both models' connection factors."""
    setup = {"type": drainage}
    if drainage == "face":
        setup["face"] = face
    else:
        setup.update(column=list(models["fine"].description["column"]),
                     coarse_column=list(models["coarse"].description["coarse_column"]),
                     well_radius=float(well_radius))
    setup["connection_factor"] = {"fine": _number(models["fine"].drainage_factor),
                                  "coarse": _number(models["coarse"].drainage_factor),
                                  "units": "m3*cP/(day*bar)"}
    return setup


def _run_summary(result: dict, system: TransientSystem) -> dict:
    """One model's run for the metrics: rates, cumulatives, volumes, balance, solver."""
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


def _comparison(runs: dict, models: dict) -> dict:
    """Both runs and the coarse run's relative errors against the fine one."""
    f, c = runs["fine"], runs["coarse"]
    pv_f, pv_c = f["pore_volume"], c["pore_volume"]
    error = _relative(c["cumulative"], f["cumulative"])
    return {
        "fine": _run_summary(f, models["fine"]),
        "coarse": _run_summary(c, models["coarse"]),
        "cumulative_relative_error": error,
        "rate_relative_error": _relative(c["rate"], f["rate"]),
        "final_cumulative_relative_error": error[-1],
        "pore_volume_relative_difference": _number((pv_c - pv_f) / pv_f) if pv_f else None,
    }
