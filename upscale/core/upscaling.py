"""What a coarse grid holds per block, computed for a box of whole blocks: the recipe
(methods per axis, boundary condition, border, multipliers) and :func:`block_variables`.

The coarse values follow the file schema's net-to-gross convention: ``kx``, ``ky`` are
net values (``kx * ntg`` is the effective horizontal permeability), ``kz`` is effective
as written, and the pore volume equals the sum of fine pore volumes.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from ..errors import InputError
from .block_problems import BATCH_BYTES, BOUNDARY_CONDITIONS, FlowResult, flow_tensors
from .face_problems import flow_transmissibility, sealed_and_face_flow
from .grid import AXES, GridArrays
from .local_global import (
    GLOBAL_SOLVES,
    CoarseModel,
    FaceRegions,
    GlobalOptions,
    GlobalReport,
    fine_face_fluxes,
    iterate,
)
from .partition import Partition
from .static import STATIC_METHODS, block_length, block_volumes, cardwell_parsons, divide_or_zero, static_average
from .two_point import cell_geometry, half_transmissibility
from .units import unit_system

METHODS = STATIC_METHODS + ("flow",)


FULL_TENSOR = ("periodic", "linear")


def parse_methods(method) -> tuple[str, str, str]:
    """One method for all axes, 'mx,my,mz', a 3-sequence, or a mapping axis -> method."""
    if isinstance(method, str):
        names = [m.strip() for m in method.split(",")]
        names = names * 3 if len(names) == 1 else names
    elif isinstance(method, dict):
        missing = [a for a in AXES if a not in method]
        if missing or set(method) - set(AXES):
            raise InputError(f"per-direction methods need exactly the axes x, y, z, got {sorted(method)}")
        names = [method[a] for a in AXES]
    else:
        names = list(method)
    if len(names) != 3:
        raise InputError(f"give one method or three (x, y, z), got {len(names)}: {names}")
    for name in names:
        if name not in METHODS:
            raise InputError(f"unknown method '{name}'; choose from {', '.join(METHODS)}")
    return tuple(names)


def method_label(methods: tuple[str, str, str]) -> str:
    if len(set(methods)) == 1:
        return methods[0]
    return ", ".join(f"{a}: {m}" for a, m in zip(AXES, methods))


@dataclass(frozen=True)
class Recipe:
    """What ``coarsen`` computes: methods per axis, boundary condition and border (fine
    cells), power exponent, flow-based multipliers, transmissibility units; for the
    ``global`` condition, the options of the global stage."""

    methods: tuple[str, str, str]
    bc: str
    border: int
    omega: float | None
    multipliers: bool
    units: str
    global_options: GlobalOptions | None = None

    @property
    def local_bc(self) -> str:
        """The boundary condition of the block problems: the global stage starts from sealed."""
        return "sealed" if self.bc == "global" else self.bc

    @property
    def flow(self) -> bool:
        return "flow" in self.methods

    @property
    def full(self) -> bool:
        """A full tensor (kxy, kxz, kyz) is written."""
        return self.flow and self.bc in FULL_TENSOR

    #: fine variables a box needs beside the field schema's (:mod:`upscale.scale.boxes`)
    fine_variables: ClassVar[tuple[str, ...]] = ()

    def compute(self, cells: GridArrays, partition: Partition, blocks: tuple[slice, slice, slice],
                budget: int = BATCH_BYTES, progress=None, extra: dict | None = None) -> dict[str, np.ndarray]:
        """:func:`block_variables` of a box (``extra``: the :attr:`fine_variables`, none here)."""
        return block_variables(cells, partition, blocks, self, progress=progress, budget=budget)

    def variable_names(self) -> list[str]:
        """The names :meth:`compute` returns (:func:`block_variable_names`)."""
        return block_variable_names(self)

    def trailing(self, name: str) -> tuple[int, ...]:
        """The shape of a variable per block: all are scalars."""
        return ()

    def halo(self, partition: Partition) -> tuple[tuple[int, int, int], tuple[int, int, int]]:
        """Fine cells a box of whole blocks needs beyond its own, below and above per axis:
        the border ring of the local solves, and for face problems the next block too."""
        ring = self.border if (self.flow or self.multipliers) else 0
        high = [ring + (int(partition.sizes(a).max()) if self.multipliers else 0) for a in range(3)]
        return (ring,) * 3, tuple(high)


def make_recipe(method="flow", bc: str = "sealed", border: int = 0, omega: float | None = None,
                multipliers: bool = False, units: str = "metric", global_solves: str = "coarse",
                passes: int | None = None) -> Recipe:
    """Check ``coarsen``'s options (InputError naming the bad one) and gather them."""
    methods = parse_methods(method)
    conditions = BOUNDARY_CONDITIONS + ("global",)
    if "flow" in methods and bc not in conditions:
        raise InputError(f"unknown boundary condition '{bc}'; choose from {', '.join(conditions)}")
    if bc in FULL_TENSOR + ("global",) and "flow" in methods and set(methods) != {"flow"}:
        raise InputError(f"boundary condition '{bc}' needs method 'flow' on all axes")
    options = _global_options(global_solves, passes, border) if bc == "global" and "flow" in methods else None
    if "power" in methods and (omega is None or not np.isfinite(omega)):
        raise InputError("method 'power' needs a finite exponent omega (e.g. --omega 0.5)")
    if border < 0 or int(border) != border:
        raise InputError(f"border must be a whole number of fine cells >= 0, got {border}")
    unit_system(units)
    return Recipe(methods, bc if "flow" in methods else "none", int(border), omega,
                  bool(multipliers) or options is not None, units, options)


def _global_options(solves: str, passes: int | None, ring: int) -> GlobalOptions:
    """The options of the global stage, checked."""
    if solves not in GLOBAL_SOLVES:
        raise InputError(f"unknown global solves '{solves}'; choose coarse (local-global) or fine (fitted to "
                         f"fine whole-model flows)")
    fine = solves == "fine"  # the fine fluxes are fixed: every face is refitted each pass, all flows weighed
    options = GlobalOptions(solves=solves, ring=int(ring), passes=10 if fine else 3,
                            weighting="flux" if fine else "largest-drop", adaptive=not fine)
    if passes is not None:
        if int(passes) != passes or passes < 1:
            raise InputError(f"passes must be a whole number >= 1, got {passes}")
        options.passes = int(passes)
    return options


def global_stage(cells: GridArrays | None, partition: Partition, variables: dict, recipe: Recipe,
                 progress=None, measure=None, lines=None, pinch_connections: bool | None = None) -> GlobalReport:
    """Replace the face values ``tx_flow`` ... of :func:`block_variables` (the whole grid)
    by those of the global stage (:mod:`upscale.core.local_global`).

    Parameters
    ----------
    cells : GridArrays or None
        The fine field in memory; None when ``measure`` is given.
    partition : Partition
        The coarse blocks.
    variables : dict
        :func:`block_variables` of the whole grid, numpy arrays, updated in place.
    recipe : Recipe
        With ``global_options``.
    progress : callable, optional
        Receives the number of faces solved by each pass.
    measure : callable, optional
        ``measure(pressures, solved) -> Measured`` of the local problems (e.g. in boxes);
        by default the local problems of ``cells``, or its fine whole-model flows.
    lines : (ndarray, ndarray), optional
        The fine dx (nx,) and dy (ny,), m, when ``cells`` is None.
    pinch_connections : bool, optional
        Whether the fine field has pinch-out connections, when ``cells`` is None (the
        coarse model then has them across its cells of dz = 0); by default that of ``cells``.

    Returns
    -------
    GlobalReport
        Passes, faces solved, fallbacks and the rate change of each pass.
    """
    options = recipe.global_options
    _, constant, to_length = unit_system(recipe.units)
    scale = constant * to_length
    local = [variables[f"t{name}_flow"] / scale for name in AXES]
    dx, dy = (cells.dx, cells.dy) if lines is None else lines
    pinch = cells.pinch_connections if pinch_connections is None else pinch_connections
    model = CoarseModel(np.add.reduceat(dx, partition.edges[0][:-1]), np.add.reduceat(dy, partition.edges[1][:-1]),
                        variables["dz"], local, [variables[f"half_{name}"] / scale for name in AXES], pinch)
    measure = measure or _in_memory_measure(cells, partition, options)
    model, report = iterate(model, local, _counted(measure, progress), options)
    _store_global_model(variables, model, scale)
    return report


def _in_memory_measure(cells: GridArrays, partition: Partition, options: GlobalOptions):
    """The measure of the global stage on a field in memory: its face regions (built once),
    or its fine whole-model flows (solved once)."""
    if options.solves == "fine":
        fluxes = fine_face_fluxes(cells, partition)
        return lambda pressures, solved: fluxes
    return FaceRegions(cells, partition, options.ring).measure


def _counted(measure, progress):
    """``measure`` reporting the faces it solved to ``progress``."""
    if progress is None:
        return measure

    def counted(pressures, solved):
        measured = measure(pressures, solved)
        progress(int(sum(q[0].size if s is None else s.sum() for q, s in zip(measured.faces, solved or [None] * 3))))
        return measured
    return counted


def _store_global_model(variables: dict, model: CoarseModel, scale: float) -> None:
    """Write the global stage's faces and boundary half-cell transmissibilities back, the
    permeability of the blocks whose half-cell value changed following it (k = T l^2 / 2V,
    net horizontally)."""
    volume, lengths = cell_geometry(model.dx, model.dy, model.dz)
    ntg = variables["ntg"]
    for axis, name in enumerate(AXES):
        variables[f"t{name}_flow"] = scale * model.faces[axis]
        old = variables[f"half_{name}"] / scale
        changed = model.halves[axis] != old
        k = divide_or_zero(model.halves[axis] * lengths[axis] ** 2, 2.0 * volume)
        net = divide_or_zero(k, ntg) if axis < 2 else k
        variables[f"k{name}"] = np.where(changed, net, variables[f"k{name}"])
        variables[f"half_{name}"] = np.where(changed, scale * model.halves[axis], variables[f"half_{name}"])


def block_variables(cells: GridArrays, partition: Partition, blocks: tuple[slice, slice, slice],
                    recipe: Recipe, progress=None, budget: int = BATCH_BYTES, flow: FlowResult | None = None
                    ) -> dict[str, np.ndarray]:
    """Everything a coarse grid holds per block, for a box of whole blocks.

    Parameters
    ----------
    cells : GridArrays
        The fine cells of the box and its halo (:meth:`Recipe.halo`), or of the whole grid.
    partition : Partition
        The partition of ``cells``.
    blocks : tuple of slice
        The box: coarse index slices of ``partition`` per axis.
    recipe : Recipe
        What to compute.
    progress : callable, optional
        Receives the number of blocks finished by each batch of local solves.
    budget : int
        Bytes one batch of local solves may hold.
    flow : FlowResult, optional
        The recipe's flow-based block tensors when already solved (over ``partition``; a
        recipe without multipliers): not solved again.

    Returns
    -------
    dict of ndarray
        Per block of the box (shape of the box in blocks): dz (m), kx, ky, kz and with a full
        tensor kxy, kxz, kyz (mD, the net convention of the coarse grid schema), porosity,
        ntg, pore_volume and bulk_volume (m3), active, the Cardwell-Parsons bounds
        ``kx_lower_bound`` ... (mD), ``solve_residual`` and ``tensor_asymmetry`` where
        solves ran, ``half_x`` ... half-cell transmissibilities in the recipe's units (for
        the faces); with multipliers ``tx_flow`` ... on the faces after each block of the box
        (none after the grid's last).
    """
    box = tuple(slice(int(partition.edges[a][b.start]), int(partition.edges[a][b.stop])) for a, b in enumerate(blocks))
    core, core_partition = cells.crop(box), partition.crop(blocks)
    solves = dict(border=recipe.border, progress=progress, budget=budget,
                  only=tuple(np.arange(b.start, b.stop) for b in blocks))
    flow, faces = (flow, None) if flow is not None else _local_solves(cells, partition, recipe, solves)
    volumes = _volumes(core, core_partition)
    k_flow = core.flow_permeability()
    k = _effective_tensors(core, core_partition, recipe, None if flow is None else flow.tensor[blocks], k_flow)
    k[~volumes["active"]] = 0.0
    out = _stored_values(core, core_partition, recipe, k, volumes)
    if flow is not None:
        out["solve_residual"] = flow.residual[blocks]
        if recipe.bc == "linear":
            out["tensor_asymmetry"] = flow.asymmetry[blocks]
    out.update(_bounds_and_halves(core, core_partition, recipe, k, out["dz"], k_flow, volumes["bulk"]))
    if faces is not None:
        out.update(_faces_of_the_box(faces, blocks, partition, out.get("solve_residual")))
    return out


def _local_solves(cells: GridArrays, partition: Partition, recipe: Recipe, solves: dict):
    """The flow-based block tensors (a FlowResult, or None) and face values ((faces,
    residuals) per axis, or None) the recipe asks for; with the sealed condition and
    multipliers both in one pass, sharing their elimination."""
    flow = faces = None
    if recipe.flow and recipe.multipliers and recipe.local_bc == "sealed":
        flow, *faces = sealed_and_face_flow(cells, partition, units=recipe.units, **solves)
    elif recipe.flow:
        flow = flow_tensors(cells, partition, bc=recipe.local_bc, **solves)
    if recipe.multipliers and faces is None:
        faces = flow_transmissibility(cells, partition, units=recipe.units, **solves)
    return flow, faces


def _effective_tensors(core: GridArrays, core_partition: Partition, recipe: Recipe, flow_tensor,
                       k_flow: tuple[np.ndarray, np.ndarray, np.ndarray]) -> np.ndarray:
    """Effective tensors (NX, NY, NZ, 3, 3), mD, a new array: flow-based where the recipe
    says flow, the static average of the flow permeability ``k_flow`` elsewhere on the
    diagonal; diagonal only unless a full tensor is kept."""
    effective = np.zeros(core_partition.shape + (3, 3)) if flow_tensor is None else flow_tensor * (
        1.0 if recipe.full else np.eye(3))
    weight = None
    for axis, name in enumerate(recipe.methods):
        if name != "flow":
            weight = core.bulk_volume * core.active if weight is None else weight
            effective[..., axis, axis] = static_average(k_flow[axis], weight, core_partition, name, recipe.omega)
    return effective


def _stored_values(core: GridArrays, core_partition: Partition, recipe: Recipe, k: np.ndarray,
                   volumes: dict) -> dict[str, np.ndarray]:
    """The permeabilities as stored (horizontal components net: divided by ntg), the
    coarse thickness and the volumes."""
    net = np.where(HORIZONTAL, divide_or_zero(k, volumes["ntg"][..., None, None]), k)
    out = dict(dz=block_length(core_partition, core.dx, core.dy, core.dz, 2, volumes["bulk"]), kx=net[..., 0, 0],
               ky=net[..., 1, 1], kz=net[..., 2, 2], porosity=volumes["porosity"], ntg=volumes["ntg"],
               pore_volume=volumes["pore"], bulk_volume=volumes["bulk"], active=volumes["active"].astype(np.int8))
    if recipe.full:
        out.update(kxy=net[..., 0, 1], kxz=net[..., 0, 2], kyz=net[..., 1, 2])
    return out


def _bounds_and_halves(core: GridArrays, core_partition: Partition, recipe: Recipe, k: np.ndarray,
                       dz: np.ndarray, k_flow, bulk: np.ndarray) -> dict[str, np.ndarray]:
    """Per axis the Cardwell-Parsons bounds (mD) of the flow permeability ``k_flow`` and the
    coarse half-cell transmissibilities of the effective permeability, in the recipe's
    units; ``bulk`` the blocks' bulk volumes (m3)."""
    _, constant, to_length = unit_system(recipe.units)
    dx = np.add.reduceat(core.dx, core_partition.edges[0][:-1])
    dy = np.add.reduceat(core.dy, core_partition.edges[1][:-1])
    volume, lengths = cell_geometry(dx, dy, dz)
    out = {}
    for axis, name in enumerate(AXES):
        lower, upper = cardwell_parsons(k_flow[axis], core.dx, core.dy, core.dz, core_partition, axis,
                                        core.pinch_connections, bulk)
        out[f"k{name}_lower_bound"], out[f"k{name}_upper_bound"] = lower, upper
        # T scales with length (A / L): mD*m -> mD*ft multiplies by the metres-to-feet factor.
        out[f"half_{name}"] = constant * to_length * half_transmissibility(k[..., axis, axis], volume, lengths[axis])
    return out


def _faces_of_the_box(faces, blocks: tuple[slice, slice, slice], partition: Partition,
                      residual: np.ndarray | None) -> dict[str, np.ndarray]:
    """The flow-based face values after each block of the box (``tx_flow`` ...), and the
    blocks' residuals raised to those of their face problems."""
    values, residuals = faces
    shape = tuple(b.stop - b.start for b in blocks)
    residual = np.zeros(shape) if residual is None else residual.copy()
    out = {}
    for axis, name in enumerate(AXES):
        owned = list(blocks)
        owned[axis] = slice(blocks[axis].start, min(blocks[axis].stop, partition.shape[axis] - 1))
        out[f"t{name}_flow"] = values[axis][tuple(owned)]
        local = tuple(slice(0, o.stop - o.start) for o in owned)
        residual[local] = np.maximum(residual[local], residuals[axis][tuple(owned)])
    out["solve_residual"] = residual
    return out


def block_variable_names(recipe: Recipe) -> list[str]:
    """The names :func:`block_variables` returns for ``recipe`` (a lazy run declares
    them before any box is computed)."""
    names = ["dz", "kx", "ky", "kz", "porosity", "ntg", "pore_volume", "bulk_volume", "active"]
    if recipe.flow or recipe.multipliers:
        names.append("solve_residual")
    if recipe.flow and recipe.bc == "linear":
        names.append("tensor_asymmetry")
    if recipe.full:
        names += ["kxy", "kxz", "kyz"]
    names += [f"k{a}_{side}_bound" for a in AXES for side in ("lower", "upper")]
    names += [f"half_{a}" for a in AXES]
    if recipe.multipliers:
        names += [f"t{a}_flow" for a in AXES]
    return names


HORIZONTAL = np.array([[1, 1, 0], [1, 1, 0], [0, 0, 0]], dtype=bool)


def _volumes(cells: GridArrays, partition: Partition) -> dict[str, np.ndarray]:
    """Coarse bulk and pore volume (m3), net-to-gross and porosity conserving pore volume."""
    sums = block_volumes(cells.dx, cells.dy, cells.dz, partition, cells.porosity, cells.ntg, cells.active)
    bulk, pore, net = sums["bulk"], sums["pore"], sums["net"]
    return {"bulk": bulk, "pore": pore, "ntg": divide_or_zero(net, bulk), "porosity": divide_or_zero(pore, net),
            "active": sums["active"] > 0}
