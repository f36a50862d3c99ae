"""Two-phase upscaling in the steady-state limits: relative permeability and capillary
pressure per coarse block.

At each of P saturation points every fine cell of a block gets a water saturation from a
limit of the flow regime:

``capillary``  slow flow: capillary equilibrium inside the block (gravity neglected). The
               block's points are P water saturations evenly spaced between its own end
               points; at each, the one capillary pressure at which the pore-volume-weighted
               fine saturations average to it, every cell inverting its own Brooks-Corey
               curve scaled by Leverett (:mod:`upscale.core.rock_curves`).
``viscous``    fast flow: every cell at the same fractional flow F (P values evenly spaced
               from 0 to 1), its Sw solving fw(Sw) = F on its own curves; the block's Sw is
               the pore-volume-weighted mean.

Each phase is then upscaled with the flow-based engine (:mod:`upscale.core.block_problems`):
the phase permeability k kr(Sw) of every cell of the local domain (the block and its
border ring, whose cells take the same capillary pressure or fractional flow), the same
boundary condition and border as single-phase; the block's kr per direction is the phase
effective permeability over the single-phase one. All points and both phases of a batch of
blocks are solved as one batch of domains.

A cell of zero permeability (with pore volume) is never entered by oil: it keeps
Sw = 1 - sor, so a block's lowest saturation is that of the cells oil can reach.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numba import njit, prange

from .._runtime import first_call
from .block_problems import BATCH_BYTES, FlowResult, LocalDomain, local_domains, solve_domains
from .grid import AXES, GridArrays
from .partition import Partition, block_groups
from .rock_curves import Fluids, RockCurves, leverett_scale, log_saturation_at_pressure
from .static import divide_or_zero
from .upscaling import Recipe, block_variable_names, block_variables

LIMITS = ("capillary", "viscous")


#: per saturation point: the block's Sw and Pc (bar), and its kr per phase and direction
POINT_VARIABLES = ("sw", "pc") + tuple(f"kr{phase}_{a}" for phase in "wo" for a in AXES)


#: per block: its end points and the largest residual of its phase solves
BLOCK_VARIABLES = ("swc", "sor", "two_phase_residual")


#: a block direction whose single-phase k is at most this fraction of the block's largest does
#: not flow: the periodic solve leaves round-off there (e.g. 1e-28 mD beside 40 mD), and kr would
#: be one round-off over another
CLOSED_DIRECTION = 1e-12


#: a phase copy's cells whose phase permeability is below this fraction of the copy's largest
#: carry none of that phase: the banded solver is held to contrasts of 1e12 (tests/core/test_extreme.py),
#: Corey curves near their ends reach far more, and then lost the positive pivots of weakly joined pockets
PHASE_CONTRAST = 1e-12


@dataclass(frozen=True)
class TwoPhaseRecipe:
    """What ``two_phase`` computes.

    Attributes
    ----------
    single : Recipe
        The single-phase flow-based coarsening (boundary condition, border) the phase
        solves follow.
    curves : RockCurves
    fluids : Fluids
    limit : str
        One of :data:`LIMITS`.
    points : int
        Saturation points, >= 2.
    codes : ndarray of int, (C,)
        The facies codes with a rock type, sorted.
    rock_of_code : ndarray of int, (C,)
        The rock index of each code.
    """

    single: Recipe
    curves: RockCurves
    fluids: Fluids
    limit: str
    points: int
    codes: np.ndarray
    rock_of_code: np.ndarray
    regions: str | None = None

    @property
    def fine_variables(self) -> tuple[str, ...]:
        """Fine variables a box needs beside the field schema's: the facies, the regions' codes."""
        return ("facies",) + ((self.regions,) if self.regions not in (None, "facies") else ())

    def halo(self, partition: Partition):
        """Fine cells beyond a box: the border ring (:meth:`Recipe.halo`)."""
        return self.single.halo(partition)

    def variable_names(self) -> list[str]:
        """The names :meth:`compute` returns."""
        regions = ["block_region"] if self.regions else []
        return block_variable_names(self.single) + list(BLOCK_VARIABLES) + regions + list(POINT_VARIABLES)

    def trailing(self, name: str) -> tuple[int, ...]:
        """The shape of variable ``name`` per block: (points,) or ()."""
        return (self.points,) if name in POINT_VARIABLES else ()

    @property
    def fraction(self) -> np.ndarray:
        """The points: the block's normalised Sw (capillary) or the fractional flow (viscous), (P,)."""
        return np.linspace(0.0, 1.0, self.points)

    def compute(self, cells: GridArrays, partition: Partition, blocks, budget: int = BATCH_BYTES, progress=None,
                extra: dict | None = None) -> dict[str, np.ndarray]:
        """:func:`two_phase_variables` of a box (the interface of :mod:`upscale.scale.boxes`);
        ``extra`` holds the :attr:`fine_variables`; with regions, also each block's ``block_region``
        (:func:`block_codes`)."""
        rock = rock_index(self.codes, self.rock_of_code, extra["facies"], cells.active)
        out = two_phase_variables(cells, rock, partition, blocks, self, budget, progress)
        if self.regions:
            box = tuple(slice(int(partition.edges[a][b.start]), int(partition.edges[a][b.stop]))
                        for a, b in enumerate(blocks))
            out["block_region"] = block_codes(np.asarray(extra[self.regions])[box], cells.crop(box).pore_volume,
                                        partition.crop(blocks))
        return out


def rock_index(codes: np.ndarray, rock_of_code: np.ndarray, facies: np.ndarray, active: np.ndarray) -> np.ndarray:
    """The rock index of every cell from its facies code.

    Parameters
    ----------
    codes : ndarray of int, (C,)
        The facies codes with a rock type, sorted.
    rock_of_code : ndarray of int, (C,)
        The rock index of each code.
    facies, active : ndarray, (nx, ny, nz)
        The cells' codes (those of active cells among ``codes``) and active flags.

    Returns
    -------
    ndarray of int, (nx, ny, nz)
        0 in inactive cells.
    """
    where = np.clip(np.searchsorted(codes, np.asarray(facies)), 0, codes.size - 1)
    return np.where(active, rock_of_code[where], 0)


@dataclass(frozen=True)
class CellRocks:
    """The two-phase properties of the fine cells of a window, arrays (nx, ny, nz).

    Attributes
    ----------
    rock : ndarray of int
        Rock index.
    entry : ndarray
        Entry pressure sigma j_entry sqrt(phi / k), bar (infinite where k = 0 < phi).
    scale : ndarray
        sigma sqrt(phi / k), bar.
    """

    rock: np.ndarray
    entry: np.ndarray
    scale: np.ndarray


def cell_rocks(cells: GridArrays, rock: np.ndarray, curves: RockCurves, fluids: Fluids) -> CellRocks:
    """Per-cell rock index, Leverett scale and entry pressure. The permeability of the
    Leverett scaling is the geometric mean of the net horizontal kx and ky (mD).

    Parameters
    ----------
    cells : GridArrays
    rock : ndarray of int, (nx, ny, nz)
    curves : RockCurves
    fluids : Fluids

    Returns
    -------
    CellRocks
    """
    scale = leverett_scale(cells.porosity * cells.active, np.sqrt(cells.kx * cells.ky), fluids.interfacial_tension)
    return CellRocks(rock=rock, entry=scale * curves.j_entry[rock], scale=scale)


def two_phase_variables(cells: GridArrays, rock: np.ndarray, partition: Partition, blocks, recipe: TwoPhaseRecipe,
                        budget: int = BATCH_BYTES, progress=None) -> dict[str, np.ndarray]:
    """Everything a two-phase curve file holds per block, for a box of whole blocks.

    Parameters
    ----------
    cells : GridArrays
        The fine cells of the box and its halo (:meth:`TwoPhaseRecipe.halo`), or the whole grid.
    rock : ndarray of int, (nx, ny, nz)
        The rock index of every cell of ``cells``.
    partition : Partition
        The partition of ``cells``.
    blocks : tuple of slice
        The box: coarse index slices of ``partition``.
    recipe : TwoPhaseRecipe
    budget : int
        Bytes one batch of local solves may hold (all points and phases together).
    progress : callable, optional
        Receives the number of blocks finished by each batch of solves (single phase and
        all phases and points together).

    Returns
    -------
    dict of ndarray
        :func:`~upscale.core.upscaling.block_variables` of the single-phase recipe; per block
        (shape of the box in blocks) ``swc``, ``sor`` and ``two_phase_residual``; per block and
        point (box shape + (P,)) ``sw``, ``pc`` (bar; infinite at the connate end of the
        capillary limit), ``krw_x`` ... ``kro_z``.
    """
    rocks = cell_rocks(cells, rock, recipe.curves, recipe.fluids)
    states = saturation_states(cells, rocks, partition, blocks, recipe)
    water, oil, residual, single = phase_permeability_ratios(cells, rocks, partition, blocks, recipe, states, budget,
                                                             progress)
    out = block_variables(cells, partition, blocks, recipe.single, budget=budget, flow=single)
    out.update(swc=states.ends[..., 0], sor=states.ends[..., 1], sw=states.sw, pc=states.pc,
               two_phase_residual=residual)
    for axis, name in enumerate(AXES):
        out[f"krw_{name}"], out[f"kro_{name}"] = water[..., axis], oil[..., axis]
    return out


@dataclass(frozen=True)
class States:
    """The saturation points of the blocks of a box.

    Attributes
    ----------
    sw, pc : ndarray, (bx, by, bz, P)
        The block's water saturation and capillary pressure (bar) at each point.
    ends : ndarray, (bx, by, bz, 2)
        The block's swc and sor (NaN for blocks without pore volume).
    cell_sn : ndarray or None, (R, P)
        Viscous limit: the normalised Sw of every rock type at each point.
    """

    sw: np.ndarray
    pc: np.ndarray
    ends: np.ndarray
    cell_sn: np.ndarray | None


def saturation_states(cells: GridArrays, rocks: CellRocks, partition: Partition, blocks, recipe: TwoPhaseRecipe
                      ) -> States:
    """The saturation points of the box's blocks in the recipe's limit."""
    box = tuple(slice(int(partition.edges[a][b.start]), int(partition.edges[a][b.stop])) for a, b in enumerate(blocks))
    core, core_partition = cells.crop(box), partition.crop(blocks)
    core_rocks = CellRocks(*(getattr(rocks, n)[box] for n in ("rock", "entry", "scale")))
    if recipe.limit == "capillary":
        return capillary_states(core, core_rocks, core_partition, recipe.curves, recipe.fraction)
    return viscous_states(core, core_rocks, core_partition, recipe.curves, recipe.fluids, recipe.fraction)


def capillary_states(cells: GridArrays, rocks: CellRocks, partition: Partition, curves: RockCurves,
                     fraction: np.ndarray) -> States:
    """Capillary limit: per block and point the Sw (evenly spaced between the block's end
    points by ``fraction``) and the capillary pressure at which the pore-volume-weighted
    fine saturations average to it.

    Parameters
    ----------
    cells : GridArrays
    rocks : CellRocks
        Of ``cells``.
    partition : Partition
        The blocks (all of ``cells``).
    curves : RockCurves
    fraction : ndarray, (P,)
        The points in the block's normalised saturation, 0 (connate end) to 1.

    Returns
    -------
    States
        Pc in bar: infinite at fraction 0, the block's lowest entry pressure at 1.
    """
    shape = partition.shape
    sw, pc = np.zeros(shape + (fraction.size,)), np.zeros(shape + (fraction.size,))
    ends = np.zeros(shape + (2,))
    fields = (cells.pore_volume, curves.swc[rocks.rock], curves.span[rocks.rock], rocks.entry, rocks.rock)
    for group in block_groups(partition):
        gathered = [group.gather(f).reshape(group.count, -1) for f in fields]
        result = [np.empty((group.count, fraction.size)), np.empty((group.count, fraction.size)),
                  np.empty((group.count, 2))]
        with first_call(_capillary_pressures):
            _capillary_pressures(*gathered[:4], gathered[4].astype(np.int64), curves.pore_size_index,
                                 np.asarray(fraction, dtype=float), *result)
        for coarse, values in zip((pc, sw, ends), result):
            group.scatter(coarse, values)
    return States(sw=sw, pc=pc, ends=ends, cell_sn=None)


@njit(cache=True)
def _prefix_sums(weight, span, entry, rock, exponent, cells, reference):  # pragma: no cover - compiled
    """For the cells in order of entry pressure: the movable water of the first k cells
    (m + 1,) and per rock type the sum of w span (Pe / reference)^lambda of the first k
    (m + 1, R)."""
    m, nrock = cells.size, exponent.size
    drained = np.zeros(m + 1)
    scaled = np.zeros((m + 1, nrock))
    for k in range(m):
        c = cells[k]
        r = rock[c]
        drained[k + 1] = drained[k] + weight[c] * span[c]
        scaled[k + 1] = scaled[k]
        scaled[k + 1, r] += weight[c] * span[c] * (entry[c] / reference) ** exponent[r]
    return drained, scaled


@njit(cache=True)
def _segment_root(scaled, exponent, remaining, u):  # pragma: no cover - compiled
    """ln(Pc / reference) where sum_r scaled_r exp(-lambda_r u) = remaining, by Newton from
    ``u`` (at or left of the root) on the log of the sum: convex and decreasing in u, so
    the iterates rise to the root without passing it (one step for a single rock type)."""
    for _ in range(60):
        total = 0.0
        slope = 0.0
        for r in range(exponent.size):
            term = scaled[r] * np.exp(-exponent[r] * u)
            total += term
            slope += exponent[r] * term
        if total <= 0.0 or slope <= 0.0:
            break
        step = (np.log(total) - np.log(remaining)) * total / slope
        if not step > 0.0:
            break
        u += step
        if step <= 1e-15 * (1.0 + abs(u)):
            break
    return u


@njit(cache=True)
def _block_pressures(weight, swc, span, entry, rock, exponent, fraction, pc, sw, ends):  # pragma: no cover
    """One block of :func:`_capillary_pressures`."""
    total = weight.sum()
    if total <= 0.0:
        pc[:] = np.nan
        sw[:] = np.nan
        ends[:] = np.nan
        return
    top = (weight * (swc + span)).sum()
    order = np.argsort(entry)
    cells = order[(weight[order] > 0.0) & np.isfinite(entry[order])]
    reference = entry[cells[0]] if cells.size else 1.0
    drained, scaled = _prefix_sums(weight, span, entry, rock, exponent, cells, reference)
    bottom = top - drained[-1]
    ends[0], ends[1] = bottom / total, 1.0 - top / total
    # block saturation (times total) when the k-th cell in entry order is just entered
    level = np.empty(cells.size)
    for k in range(cells.size):
        ratio = entry[cells[k]] / reference
        level[k] = top - drained[k] + (scaled[k] * ratio ** -exponent).sum()
    for j in range(fraction.size):
        target = bottom + (top - bottom) * fraction[j]
        sw[j] = target / total
        if cells.size == 0 or fraction[j] <= 0.0:
            pc[j] = np.inf
            continue
        if fraction[j] >= 1.0:
            pc[j] = reference
            continue
        lo, hi = 0, cells.size - 1  # the last k whose level is at or above the target
        while lo < hi:
            mid = (lo + hi + 1) // 2
            if level[mid] >= target:
                lo = mid
            else:
                hi = mid - 1
        start = np.log(entry[cells[lo]] / reference)
        remaining = target - top + drained[lo + 1]
        pc[j] = reference * np.exp(_segment_root(scaled[lo + 1], exponent, remaining, start))


@njit(parallel=True, cache=True)
def _capillary_pressures(weight, swc, span, entry, rock, exponent, fraction, pc, sw, ends):  # pragma: no cover
    """Per block (rows of the (nb, n) cell arrays: pore volume, swc, span, entry pressure,
    rock index; ``exponent`` the pore-size index per rock type) and point (``fraction``, the
    block's normalised saturation): the capillary pressure pc (nb, P) at which the
    pore-volume-weighted Sw is the point's sw (nb, P), and the block's swc, sor (nb, 2).

    The block's Sw(Pc) is a sum of Brooks-Corey curves: between two consecutive entry
    pressures of its cells it is (top - drained_k + sum_r A_r Pc^-lambda_r) / total, with
    prefix sums in order of entry pressure. The segment holding the target is found by
    bisection on the levels at the entry pressures, the root inside it by Newton."""
    for b in prange(weight.shape[0]):
        _block_pressures(weight[b], swc[b], span[b], entry[b], rock[b], exponent, fraction, pc[b], sw[b], ends[b])


def viscous_states(cells: GridArrays, rocks: CellRocks, partition: Partition, curves: RockCurves,
                   fluids: Fluids, fraction: np.ndarray) -> States:
    """Viscous limit: per point every cell at the fractional flow ``fraction``, its Sw from
    its own curves; the block's Sw is the pore-volume-weighted mean, its Pc the
    pore-volume-weighted mean of the fine capillary pressures (cells of zero permeability
    left out).

    Parameters
    ----------
    cells : GridArrays
    rocks : CellRocks
    partition : Partition
    curves : RockCurves
    fluids : Fluids
    fraction : ndarray, (P,)
        The fractional flows, 0..1.

    Returns
    -------
    States
        With ``cell_sn`` (R, P).
    """
    kinds = np.arange(len(curves.names))[:, None]
    cell_sn = curves.normalised_at_fractional_flow(fraction, fluids)
    cell_sw = curves.saturation(cell_sn, kinds)
    rock_j = curves.leverett_j(cell_sw, kinds)
    pore = cells.pore_volume
    entered = np.isfinite(rocks.scale)
    total = partition.block_sum(pore)
    sums = np.zeros(partition.shape + (2,))
    sw = np.zeros(partition.shape + (fraction.size,))
    scaled = np.zeros(partition.shape + (fraction.size,))
    for r in range(len(curves.names)):
        own = pore * (rocks.rock == r)
        volume = partition.block_sum(own)
        sums += volume[..., None] * np.array([curves.swc[r], curves.sor[r]])
        sw += volume[..., None] * cell_sw[r]
        leverett = partition.block_sum(np.where(entered, own * rocks.scale, 0.0))[..., None]
        with np.errstate(invalid="ignore"):  # inf * 0 where the block has none of the rock
            scaled += np.where(leverett > 0, leverett * rock_j[r], 0.0)
    flowing = partition.block_sum(np.where(entered, pore, 0.0))[..., None]
    with np.errstate(invalid="ignore"):
        pc = np.where(flowing > 0, scaled / np.where(flowing > 0, flowing, 1.0), np.nan)
    empty = total[..., None] <= 0
    return States(sw=np.where(empty, np.nan, divide_or_zero(sw, total[..., None])), pc=pc,
                  ends=np.where(empty, np.nan, divide_or_zero(sums, total[..., None])), cell_sn=cell_sn)


def phase_permeability_ratios(cells: GridArrays, rocks: CellRocks, partition: Partition, blocks,
                              recipe: TwoPhaseRecipe, states: States, budget: int, progress=None):
    """Block kr per point, phase and direction: the phase effective permeability (local
    solves on k kr(Sw) of every cell of the local domain) over the single-phase one.

    Parameters
    ----------
    cells, rocks, partition, blocks, recipe
        As for :func:`two_phase_variables`.
    states : States
        The saturation points of the box's blocks.
    budget : int
        Bytes per batch of solves.
    progress : callable, optional
        Receives the number of blocks finished by each batch.

    Returns
    -------
    water, oil : ndarray, (bx, by, bz, P, 3)
        krw and kro per direction (0 where the block does not flow single-phase: its
        single-phase k along that direction at most :data:`CLOSED_DIRECTION` of its largest).
    residual : ndarray, (bx, by, bz)
        The largest relative residual of the block's phase solves.
    single : FlowResult
        The single-phase solves (over ``partition``, the box's blocks filled), as
        :func:`~upscale.core.block_problems.flow_tensors` gives them.
    """
    points = recipe.points
    copies = 2 * points + 1  # single phase, water at each point, oil at each point
    tensor = np.zeros(partition.shape + (copies, 3))
    residual = np.zeros(partition.shape)
    single = FlowResult(np.zeros(partition.shape + (3, 3)), np.zeros(partition.shape), np.zeros(partition.shape))
    state = _window_states(partition, blocks, states, recipe)
    k = cells.flow_permeability()
    only = tuple(np.arange(b.start, b.stop) for b in blocks)
    for batch, domain in local_domains(cells, partition, recipe.single.border, budget=max(budget // copies, 1),
                                       only=only, permeability=k):
        diagonal, worst, solved = _phase_solves(domain, *_batch_factors(batch, domain, rocks, state, recipe),
                                                recipe.single.local_bc)
        batch.scatter(tensor, diagonal)
        batch.scatter(residual, worst)
        for whole, part in zip((single.tensor, single.residual, single.asymmetry), solved):
            batch.scatter(whole, part)
        if progress is not None:
            progress(batch.count)
    tensor, residual = tensor[blocks], residual[blocks]
    one = tensor[..., :1, :]
    one = np.where(one > CLOSED_DIRECTION * one.max(axis=-1, keepdims=True), one, 0.0)
    water = divide_or_zero(tensor[..., 1:points + 1, :], one)
    oil = divide_or_zero(tensor[..., points + 1:, :], one)
    return water, oil, residual, single


def _window_states(partition: Partition, blocks, states: States, recipe: TwoPhaseRecipe) -> np.ndarray:
    """What sets the cells' saturations at each point: in the capillary limit the block's
    capillary pressure over the window's blocks (those of the box filled), (NX, NY, NZ, P);
    in the viscous limit the normalised Sw of every rock type, (R, P)."""
    if recipe.limit == "viscous":
        return states.cell_sn
    window = np.zeros(partition.shape + (recipe.points,))
    window[blocks] = states.pc
    return window


def _batch_factors(batch, domain: LocalDomain, rocks: CellRocks, state: np.ndarray, recipe: TwoPhaseRecipe):
    """The permeability factor of every cell of a batch's domains for each copy: 1, then
    krw(Sw) at each point, then kro(Sw) at each point, (nb, 2P + 1, n); and per copy the
    lowest and highest factor over the cells that carry flow (nb, 2P + 1)."""
    nb, points, curves = batch.count, recipe.points, recipe.curves
    rock = batch.gather(rocks.rock).astype(np.int64).reshape(nb, -1)
    carries = (sum(k.reshape(nb, -1) for k in domain.k) > 0)
    factor = np.empty((nb, 2 * points + 1, rock.shape[1]))
    low, high = np.empty((nb, 2 * points + 1)), np.empty((nb, 2 * points + 1))
    capillary = recipe.limit == "capillary"
    with np.errstate(divide="ignore"):  # ln 0 = -inf: a cell without capillary pressure
        log_pc = np.log(state[np.ix_(*batch.blocks)].reshape(nb, points)) if capillary else np.zeros((nb, points))
        log_entry = np.log(batch.gather(rocks.entry).reshape(nb, -1)) if capillary else np.zeros(rock.shape)
    if capillary:
        water = oil = np.zeros((1, points))
    else:  # every cell of a rock type at one saturation per point: its kr looked up
        kinds = np.arange(len(curves.names))[:, None]
        water, oil = (f(state, kinds) for f in (curves.water_at_normalised, curves.oil_at_normalised))
    with first_call(_phase_factors):
        _phase_factors(capillary, log_pc, log_entry, water, oil, rock, carries, curves.pore_size_index,
                       curves.krw_max, curves.nw, curves.kro_max, curves.no, factor, low, high)
    return factor, low, high


@njit(cache=True)
def _cell_factors(capillary, log_pc, log_entry, water, oil, r, j, exponent, krw_max, nw, kro_max, no
                  ):  # pragma: no cover - compiled
    """krw and kro of one cell of rock type r at point j (see :func:`_phase_factors`)."""
    if not capillary:
        return water[r, j], oil[r, j]
    log_sn = log_saturation_at_pressure(log_pc, log_entry, exponent[r])
    if log_sn == 0.0:
        return krw_max[r], 0.0
    return krw_max[r] * np.exp(nw[r] * log_sn), kro_max[r] * np.exp(no[r] * np.log1p(-np.exp(log_sn)))


@njit(parallel=True, cache=True)
def _phase_factors(capillary, log_pc, log_entry, water, oil, rock, carries, exponent, krw_max, nw, kro_max, no,
                   factor, low, high):  # pragma: no cover - compiled
    """Per domain b, copy and cell: factor[b, 0] = 1, factor[b, 1 + j] = krw and
    factor[b, 1 + P + j] = kro at point j: in the capillary limit from the cell's Sn at the
    block's capillary pressure (logs of Pc (nb, P) and of the cells' entry pressures (nb, n)),
    in the viscous limit from the tables water, oil (R, P) of each rock type; low and high
    over the cells that carry flow (inf and -inf where none does)."""
    nb, copies, n = factor.shape
    points = (copies - 1) // 2
    for b in prange(nb):
        low[b, :] = np.inf
        high[b, :] = -np.inf
        for i in range(n):
            factor[b, 0, i] = 1.0
            if carries[b, i]:
                low[b, 0] = 1.0
                high[b, 0] = 1.0
        for j in range(points):
            for i in range(n):
                w, o = _cell_factors(capillary, log_pc[b, j], log_entry[b, i], water, oil, rock[b, i], j, exponent,
                                     krw_max, nw, kro_max, no)
                factor[b, 1 + j, i] = w
                factor[b, 1 + points + j, i] = o
                if carries[b, i]:
                    low[b, 1 + j] = min(low[b, 1 + j], w)
                    high[b, 1 + j] = max(high[b, 1 + j], w)
                    low[b, 1 + points + j] = min(low[b, 1 + points + j], o)
                    high[b, 1 + points + j] = max(high[b, 1 + points + j], o)


@njit(parallel=True, cache=True)
def _scaled_copies(factor, kept, copies, k, contrast, out):  # pragma: no cover - compiled
    """out[c] = factor[kept[c]] * k[kept[c] // copies], copy by copy: the permeability of the
    kept copies (factor (nb * copies, n), k (nb, n), out (len(kept), n)); in the phase copies
    (all but each domain's first) values below ``contrast`` times the copy's largest are 0."""
    for c in prange(kept.size):
        row, block = kept[c], kept[c] // copies
        largest = 0.0
        for i in range(out.shape[1]):
            out[c, i] = factor[row, i] * k[block, i]
            largest = max(largest, out[c, i])
        if row % copies:
            for i in range(out.shape[1]):
                if out[c, i] < contrast * largest:
                    out[c, i] = 0.0


def _phase_solves(domain: LocalDomain, factor: np.ndarray, low: np.ndarray, high: np.ndarray, bc: str
                  ) -> tuple[np.ndarray, np.ndarray, tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """The batch's domains solved for every copy of :func:`_batch_factors` (permeability
    times the factor), as one batch of domains. A copy whose factor is the same in every
    cell that carries flow (one rock type at one saturation, or none flowing) scales the
    single-phase solution exactly: it takes the single-phase result times the factor,
    without a solve.

    Returns
    -------
    diagonal : ndarray, (nb, 2P + 1, 3)
        Effective permeability per copy and direction, mD.
    worst : ndarray, (nb,)
        The largest relative residual of each block's solves.
    single : (ndarray, ndarray, ndarray)
        The single-phase copy's tensor (nb, 3, 3), mD, residual and asymmetry (nb,): 0 for
        domains that carry no flow.
    """
    nb, copies, n = factor.shape
    flowing = np.isfinite(high[:, :1])
    uniform = (low == high) | ~flowing
    solved = ~uniform
    solved[:, 0] = flowing[:, 0]
    kept = np.flatnonzero(solved)
    block = kept // copies
    shape = (kept.size,) + domain.shape
    permeability = []
    for k in domain.k:
        out = np.empty((kept.size, n))
        with first_call(_scaled_copies):
            _scaled_copies(factor.reshape(nb * copies, n), kept, copies, np.ascontiguousarray(k).reshape(nb, n),
                           PHASE_CONTRAST, out)
        permeability.append(out.reshape(shape))
    lx, ly, lz = domain.lengths  # lx, ly are lines broadcast along the other axes: copied as lines
    lengths = (np.broadcast_to(lx[:, :, :1, :1][block], shape), np.broadcast_to(ly[:, :1, :, :1][block], shape),
               lz[block])
    phases = LocalDomain(k=tuple(permeability), lengths=lengths, target=domain.target,
                         pinch_connections=domain.pinch_connections)
    diagonal = np.zeros((nb * copies, 3))
    residual = np.zeros(nb * copies)
    single = (np.zeros((nb, 3, 3)), np.zeros(nb), np.zeros(nb))
    if kept.size:
        first = kept % copies == 0  # the single-phase copies: their whole tensor is kept (clipped)
        tensor, residual[kept], asymmetry = solve_domains(phases, bc, clipped=first)
        diagonal[kept] = np.maximum(np.einsum("bii->bi", tensor), 0.0)  # phase copies: their diagonal alone
        for whole, part in zip(single, (tensor, residual[kept], asymmetry)):
            whole[block[first]] = part[first]
    diagonal = diagonal.reshape(nb, copies, 3)
    scaled = uniform & flowing
    scaled[:, 0] = False
    domain_index, copy = np.nonzero(scaled)  # only these: a domain without flow has factor bounds of -inf
    diagonal[domain_index, copy] = high[domain_index, copy, None] * diagonal[domain_index, 0]
    return diagonal, residual.reshape(nb, copies).max(axis=1), single


def block_codes(values: np.ndarray, pore_volume: np.ndarray, partition: Partition) -> np.ndarray:
    """The code of every block: the one holding most of its pore volume.

    Parameters
    ----------
    values : ndarray of int, (nx, ny, nz)
        A code per fine cell.
    pore_volume : ndarray, (nx, ny, nz)
        m3.
    partition : Partition

    Returns
    -------
    ndarray of int, (NX, NY, NZ)
        Ties go to the lower code; a block without pore volume takes the lowest code of
        the cells with pore volume (it has no curves to weigh).
    """
    values = np.asarray(values)
    codes = np.unique(values[pore_volume > 0]) if np.any(pore_volume > 0) else np.unique(values)
    sums = np.stack([partition.block_sum(np.where(values == c, pore_volume, 0.0)) for c in codes])
    return codes[np.argmax(sums, axis=0)]


def region_curves(codes: np.ndarray, pore_volume: np.ndarray, curves: dict[str, np.ndarray]
                  ) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """One curve set per region of blocks sharing a code, by pore-volume weighting.

    Parameters
    ----------
    codes : ndarray of int, (NX, NY, NZ)
        The region code of every block.
    pore_volume : ndarray, (NX, NY, NZ)
        m3.
    curves : dict of ndarray, (NX, NY, NZ, P) each
        The blocks' point variables (:data:`POINT_VARIABLES`).

    Returns
    -------
    region : ndarray of int, (G,)
        The codes, sorted.
    averaged : dict of ndarray, (G, P) each
        Sum over the region's blocks of pore volume times the value, over their pore
        volume (blocks without pore volume left out; a Pc infinite in any block stays so).
    """
    region, index = np.unique(codes, return_inverse=True)
    index = index.ravel()
    weight = np.where(pore_volume > 0, pore_volume, 0.0).ravel()
    used = weight > 0
    totals = np.bincount(index, weights=weight, minlength=region.size)
    averaged = {}
    for name, value in curves.items():
        flat = value.reshape(weight.size, -1)
        summed = np.zeros((region.size, flat.shape[1]))
        np.add.at(summed, index[used], weight[used, None] * flat[used])
        averaged[name] = np.divide(summed, totals[:, None], out=np.full(summed.shape, np.nan),
                                   where=totals[:, None] > 0)
    return region, averaged
