"""``upscale bench``: time the batched upscaling against the plain per-block approach.

Everything runs in one process, side by side, on a seeded lognormal field (sigma of ln k
= 2, correlation 8 x 8 x 2 cells, kv/kh = 0.1, cells 20 x 10 x 2 m, 60 x 220 x 85 cells by
default) with 5 x 5 x 5 blocks. The plain approach assembles and solves one scipy sparse
system per block and direction (periodic: one factorisation, three right-hand sides); it
is timed on a random sample of blocks and scaled to the whole field, and its numbers are
compared with the batched ones on that sample. The sealed solves, the face problems
(multipliers) and both in one pass (:func:`upscale.core.face_problems.sealed_and_face_flow`)
are timed REPEATS times each, interleaved, and the least time of each is reported; so are
the two-phase upscaling (capillary limit, 20 points, two rock types) and the single-phase
sealed one, TWO_PHASE_REPEATS times each, in wall and in process CPU time.
"""

from __future__ import annotations

import resource
import time

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from ..core.block_problems import band_order, flow_tensors
from ..core.face_problems import flow_transmissibility, sealed_and_face_flow
from ..core.partition import block_groups, make_partition
from ..core.rock_curves import Fluids, RockCurves
from ..core.static import STATIC_METHODS, cardwell_parsons, static_average
from ..core.two_phase import TwoPhaseRecipe, two_phase_variables
from ..core.upscaling import block_variables, make_recipe
from ..gallery.synthetic import lognormal_field
from ..io.schema import arrays
from ..io.validation import validate

BLOCK = (5, 5, 5)


REPEATS = 5  # interleaved timings of sealed, multipliers and both together; the least of each


TWO_PHASE_REPEATS = 2  # interleaved timings of the two-phase and the single-phase upscaling


TWO_PHASE_TARGET = 50.0  # the two-phase upscaling at most this many times the single-phase sealed one
WHOLE_MODEL_TARGET = 4.0  # the fine steady check at least this many times faster than pyamg's own solver


#: the bench's two rock types (invented): the cells above the median k are "sand", the others "silt"
BENCH_ROCKS = RockCurves(("silt", "sand"), swc=np.array([0.25, 0.12]), sor=np.array([0.2, 0.18]),
                         krw_max=np.array([0.2, 0.35]), kro_max=np.array([0.7, 0.9]), nw=np.array([3.0, 2.5]),
                         no=np.array([3.0, 2.0]), j_entry=np.array([0.4, 0.25]), pore_size_index=np.array([1.2, 2.0]))


def _end(shape, axis: int, index: int) -> tuple[slice, ...]:
    """Slice selecting one plane of cells normal to ``axis``."""
    sl = [slice(None)] * len(shape)
    sl[axis] = slice(index, index + 1)
    return tuple(sl)


def _plain_block(k, lengths, bc: str) -> np.ndarray:
    """One block the plain way, scipy sparse assembly and direct solves: its diagonal
    (3,), mD. Meant for fields without zero permeability (the benchmark's lognormal field)."""
    shape = k[0].shape
    volume = lengths[0] * lengths[1] * lengths[2]
    half = [2 * k[a] * volume / lengths[a] ** 2 for a in range(3)]
    coupling = _plain_coupling(half, bc)
    block_volume = volume.sum()
    lx, ly = lengths[0][:, 0, 0].sum(), lengths[1][0, :, 0].sum()
    length = (lx, ly, block_volume / (lx * ly))
    if bc == "sealed":
        return _plain_sealed(coupling, half, shape, length, block_volume)
    return _plain_periodic(coupling, half, shape, length, block_volume)


def _plain_coupling(half, bc: str) -> sp.csr_matrix:
    """The block's cell-to-cell matrix from the half-cell transmissibilities ``half``
    (three arrays (sx, sy, sz)); periodic: with the faces that wrap around."""
    shape = half[0].shape
    n = half[0].size
    index = np.arange(n).reshape(shape)
    rows, cols, vals = [], [], []
    for a in range(3):
        pairs = [(np.take(index, np.arange(shape[a] - 1), a), np.take(index, np.arange(1, shape[a]), a),
                  np.take(half[a], np.arange(shape[a] - 1), a), np.take(half[a], np.arange(1, shape[a]), a))]
        if bc == "periodic" and shape[a] > 1:
            pairs.append((np.take(index, [shape[a] - 1], a), np.take(index, [0], a),
                          np.take(half[a], [shape[a] - 1], a), np.take(half[a], [0], a)))
        for p, q, h1, h2 in pairs:
            t = (h1 * h2 / (h1 + h2)).ravel()
            p, q = p.ravel(), q.ravel()
            rows += [p, q, p, q]
            cols += [p, q, q, p]
            vals += [t, t, -t, -t]
    return sp.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(n, n))


def _plain_sealed(coupling, half, shape, length, block_volume: float) -> np.ndarray:
    """Sealed sides: one system per direction, unit pressure drop across the block."""
    out = np.zeros(3)
    for d in range(3):
        diag = np.zeros(shape)
        rhs = np.zeros(shape)
        sl_in, sl_out = _end(shape, d, 0), _end(shape, d, shape[d] - 1)
        inflow = half[d][sl_in]
        diag[sl_in] += inflow
        diag[sl_out] += half[d][sl_out]
        rhs[sl_in] += inflow
        p = spla.spsolve((coupling + sp.diags(diag.ravel())).tocsc(), rhs.ravel()).reshape(shape)
        q = (inflow * (1 - p[sl_in])).sum()
        out[d] = q * length[d] ** 2 / block_volume
    return out


def _plain_periodic(coupling, half, shape, length, block_volume: float) -> np.ndarray:
    """Periodic sides: one factorisation (a cell grounded), one right-hand side per direction."""
    ground = np.zeros(coupling.shape[0])
    ground[0] = coupling[0, 0]
    factor = spla.splu((coupling + sp.diags(ground)).tocsc())
    out = np.zeros(3)
    for d in range(3):
        rhs = np.zeros(shape)
        last, first = _end(shape, d, shape[d] - 1), _end(shape, d, 0)
        wrap = half[d][last] * half[d][first] / (half[d][last] + half[d][first])
        rhs[last] -= wrap * length[d]
        rhs[first] += wrap * length[d]
        p = factor.solve(rhs.ravel()).reshape(shape)
        q = (wrap * (p[last] - p[first] + length[d])).sum()
        out[d] = q * length[d] / block_volume
    return out


def _factor_work(shape) -> int:
    """Multiply-adds of the banded Cholesky factorisation of one local problem of ``shape``
    (no-flow sides; band order and half width as the solver uses them)."""
    n = int(np.prod(shape))
    _, width = band_order(tuple(shape), periodic=False)
    reach = np.minimum(width, n - 1 - np.arange(n))
    return int((reach * (reach + 1) // 2).sum())


def face_to_sealed_work(partition) -> float:
    """Factorisation work of every face problem over that of the sealed solves.

    Parameters
    ----------
    partition : Partition
        The coarse blocks.

    Returns
    -------
    float
        Work of the face problems (two blocks each) over that of the sealed solves (one
        per block and direction): the least time ratio any schedule of these banded
        factorisations can reach.
    """
    sealed = sum(3 * g.count * _factor_work(g.shape) for g in block_groups(partition))
    faces = sum(g.count * _factor_work(g.shape) for axis in range(3)
                for g in block_groups(partition, extend=tuple(int(a == axis) for a in range(3))))
    return faces / sealed


def _timed(function, *args, **kwargs):
    """``function(*args, **kwargs)`` and the seconds it took."""
    start = time.perf_counter()
    value = function(*args, **kwargs)
    return value, time.perf_counter() - start


def _wall_and_cpu(function) -> tuple[float, float]:
    """Seconds of ``function()``: wall time and process CPU time (all threads), which a
    loaded machine inflates far less."""
    wall, cpu = time.perf_counter(), time.process_time()
    function()
    return time.perf_counter() - wall, time.process_time() - cpu


def _peak_memory_mb() -> float:
    """Peak resident memory of this process so far, MB."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def run_bench(shape=(60, 220, 85), sample: int = 300, quiet: bool = False, seed: int = 0,
              whole_model: bool = False) -> dict:
    """Run the benchmark, print a table (:func:`format_bench`), and return the figures.

    Parameters
    ----------
    shape : tuple of int
        (nx, ny, nz) of the lognormal field.
    sample : int
        Blocks drawn at random for the plain per-block loop (whole blocks only are timed).
    quiet : bool
        Unused: the benchmark shows no progress bars.
    seed : int
        Seed of the field and of the sample.
    whole_model : bool
        Also time the fine whole-model steady check in three directions.

    Returns
    -------
    dict
        Times (s), their ratios, the work ratio of the face problems, the largest
        relative differences batched vs plain on the sample, peak memory (MB).
    """
    fine = validate(lognormal_field(shape=tuple(shape), seed=seed))
    cells = arrays(fine)
    partition = make_partition(cells.shape, ratio=BLOCK)
    k = cells.flow_permeability()
    _warm_up()
    static_time = _time_static(cells, partition, k)
    results, times = _time_flow(cells, partition)
    calls = _time_coarsen(fine, cells, partition)
    plain_time, difference, sampled = _time_plain(cells, partition, k, results, sample, seed)
    two_phase = _time_two_phase(cells, partition, times["sealed"])
    figures = {
        "field": f"{shape[0]} x {shape[1]} x {shape[2]} = {int(np.prod(shape)):,} cells, blocks {BLOCK}",
        "blocks": int(np.prod(partition.shape)),
        "static_seconds": static_time,
        "sealed_seconds": times["sealed"], "periodic_seconds": times["periodic"],
        "multiplier_seconds": times["multipliers"], "multiplier_to_sealed": times["multipliers"] / times["sealed"],
        "together_seconds": times["together"],
        "added_multiplier_to_sealed": (times["together"] - times["sealed"]) / times["sealed"],
        "multiplier_work_to_sealed": face_to_sealed_work(partition),
        "plain_sealed_seconds": plain_time["sealed"], "plain_periodic_seconds": plain_time["periodic"],
        "sealed_speedup": plain_time["sealed"] / times["sealed"],
        "periodic_speedup": plain_time["periodic"] / times["periodic"],
        "sample_blocks": sampled,
        "max_relative_difference_sealed": difference["sealed"],
        "max_relative_difference_periodic": difference["periodic"],
        **calls,
        "peak_memory_mb": _peak_memory_mb(),
        **two_phase,
    }
    if whole_model:
        figures.update(_time_whole_model(cells))
    print(format_bench(figures))
    return figures


def _warm_up() -> None:
    """Compile the kernels on a small field before anything is timed."""
    warm = make_partition((10, 10, 10), ratio=BLOCK)
    small = arrays(validate(lognormal_field(shape=(10, 10, 10), seed=1)))
    for bc in ("sealed", "periodic"):
        flow_tensors(small, warm, bc)
    rock, recipe = _two_phase_setting(small)
    two_phase_variables(small, rock, warm, tuple(slice(0, n) for n in warm.shape), recipe)


def _time_static(cells, partition, k) -> float:
    """Seconds of every static average and the Cardwell-Parsons bounds of the flow
    permeability ``k``, three directions."""
    weight = cells.bulk_volume * cells.active

    def static_all():
        """Every static average and the bounds along x, y, z."""
        for axis in range(3):
            for method in STATIC_METHODS:
                static_average(k[axis], weight, partition, method, omega=0.5)
            cardwell_parsons(k[axis], cells.dx, cells.dy, cells.dz, partition, axis)

    return _timed(static_all)[1]


def _time_flow(cells, partition) -> tuple[dict, dict]:
    """The sealed and periodic flow tensors and the seconds of each batched run: sealed
    and periodic once, then the least of REPEATS interleaved runs of the sealed solves,
    the face problems, and both in one pass (these timings are noisy)."""
    results, times = {}, {}
    for bc in ("sealed", "periodic"):
        results[bc], times[bc] = _timed(flow_tensors, cells, partition, bc)
    for _ in range(REPEATS):
        for name, function in (("sealed", lambda: flow_tensors(cells, partition, "sealed")),
                               ("multipliers", lambda: flow_transmissibility(cells, partition)),
                               ("together", lambda: sealed_and_face_flow(cells, partition))):
            times[name] = min(times.get(name, np.inf), _timed(function)[1])
    return results, times


def _two_phase_setting(cells) -> tuple[np.ndarray, TwoPhaseRecipe]:
    """The bench's rock index per cell (sand above the median k) and two-phase recipe."""
    rock = (cells.kx > np.median(cells.kx[cells.active])).astype(np.int64)
    recipe = TwoPhaseRecipe(make_recipe("flow", "sealed", 0), BENCH_ROCKS, Fluids(0.5, 2.0, 0.025), "capillary", 20,
                            np.arange(2), np.arange(2))
    return rock, recipe


def _time_two_phase(cells, partition, sealed_seconds: float) -> dict:
    """Seconds of the two-phase upscaling (capillary limit, 20 points, 3 directions, sealed;
    two rock types split at the median k) and of the single-phase sealed flow-based
    upscaling (everything a coarse file holds), wall and process CPU time, the least of
    TWO_PHASE_REPEATS interleaved runs each; their ratios, and the two-phase wall time over
    ``sealed_seconds`` (the sealed solves alone)."""
    rock, recipe = _two_phase_setting(cells)
    everything = tuple(slice(0, n) for n in partition.shape)
    wall, cpu = {}, {}
    for _ in range(TWO_PHASE_REPEATS):
        for name, function in (("single", lambda: block_variables(cells, partition, everything, recipe.single)),
                               ("two_phase", lambda: two_phase_variables(cells, rock, partition, everything, recipe))):
            seconds, processor = _wall_and_cpu(function)
            wall[name], cpu[name] = min(wall.get(name, np.inf), seconds), min(cpu.get(name, np.inf), processor)
    return {"single_phase_seconds": wall["single"], "two_phase_seconds": wall["two_phase"],
            "two_phase_to_single": wall["two_phase"] / wall["single"],
            "single_phase_cpu_seconds": cpu["single"], "two_phase_cpu_seconds": cpu["two_phase"],
            "two_phase_to_single_cpu": cpu["two_phase"] / cpu["single"],
            "two_phase_to_sealed": wall["two_phase"] / sealed_seconds}


def _time_coarsen(fine, cells, partition) -> dict:
    """The least of REPEATS interleaved runs of ``upscale.coarsen(method="flow")`` on the
    validated field and of the batched solves alone, sealed and periodic; the largest
    relative difference of the coarse k from the solves' diagonal."""
    from ..scale.coarsen import coarsen

    best, difference = {}, 0.0
    for _ in range(REPEATS):
        for bc in ("sealed", "periodic"):
            solved, solve_time = _timed(flow_tensors, cells, partition, bc)
            grid, call_time = _timed(coarsen, fine, ratio=BLOCK, method="flow", bc=bc)
            least = best.get(bc, (np.inf, np.inf))
            best[bc] = (min(least[0], call_time), min(least[1], solve_time))
            written = np.stack([grid[name].values * (grid["ntg"].values if name != "kz" else 1.0)
                                for name in ("kx", "ky", "kz")], axis=-1)
            diagonal = np.diagonal(solved.tensor, axis1=-2, axis2=-1)
            difference = max(difference, float(np.max(np.abs(written - diagonal) / np.maximum(diagonal, 1e-300))))
    figures = {"coarsen_difference": difference}
    for bc, (call_time, solve_time) in best.items():
        figures.update({f"coarsen_{bc}_seconds": call_time, f"coarsen_{bc}_solves_seconds": solve_time,
                        f"coarsen_{bc}_to_solves": call_time / solve_time})
    return figures


def _time_plain(cells, partition, k, results: dict, sample: int, seed: int) -> tuple[dict, dict, int]:
    """The plain loop on the whole blocks of a random sample: its time scaled to every
    block and its largest relative difference from the batched diagonal, per boundary
    condition, and the number of blocks timed."""
    rng = np.random.default_rng(seed)
    blocks = [tuple(int(rng.integers(0, n)) for n in partition.shape) for _ in range(sample)]
    lengths = (np.broadcast_to(cells.dx[:, None, None], cells.shape),
               np.broadcast_to(cells.dy[None, :, None], cells.shape), cells.dz)
    plain_time, difference = {}, {}
    full = [b for b in blocks if all(partition.sizes(a)[b[a]] == BLOCK[a] for a in range(3))]
    for bc in ("sealed", "periodic"):
        worst = 0.0
        start = time.perf_counter()
        for block in full:
            sl = tuple(slice(partition.edges[a][block[a]], partition.edges[a][block[a] + 1]) for a in range(3))
            plain = _plain_block([kk[sl] for kk in k], [ll[sl] for ll in lengths], bc)
            batched = np.diag(results[bc].tensor[block])
            worst = max(worst, float(np.max(np.abs(plain - batched) / np.maximum(np.abs(batched), 1e-300))))
        elapsed = time.perf_counter() - start
        plain_time[bc] = elapsed / max(len(full), 1) * int(np.prod(partition.shape))
        difference[bc] = worst
    return plain_time, difference, len(full)


def _time_whole_model(cells) -> dict:
    """Seconds, workers, largest residual and peak memory of the fine whole-model check."""
    from ..checks.steady import axis_processes, fine_model_checks

    figures = {}
    start = time.perf_counter()
    figures["whole_model_workers"] = axis_processes(cells.kx.size)
    solves = [r["solver"] for r in fine_model_checks(cells, workers=figures["whole_model_workers"])]
    figures["whole_model_seconds"] = time.perf_counter() - start
    figures["whole_model_residual"] = max(s["relative_residual"] for s in solves)
    figures["peak_memory_mb"] = _peak_memory_mb()
    figures["worker_peak_memory_mb"] = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0
    figures.update(_time_against_pyamg(cells))
    figures["pyamg_to_check"] = figures["pyamg_seconds"] / figures["whole_model_seconds"]
    return figures


def _time_against_pyamg(cells, tolerance: float = 1e-10) -> dict:
    """One process each, axis after axis at the same relative residual: our solve
    (:func:`upscale.core.pressure.solve_pressure`) and pyamg's own smoothed-aggregation
    solver with CG, as a user would call it, on the same systems."""
    import pyamg

    from ..core.pressure import assemble_pressure_system, boundary_half, solve_pressure
    from ..core.two_point import transmissibilities

    half, faces = transmissibilities(cells.flow_permeability(), cells.dx, cells.dy, cells.dz, cells.pinch_connections)
    ours = theirs = 0.0
    worst = 0.0
    for axis in range(3):
        A, b = assemble_pressure_system(faces, boundary_half(half[axis], axis), axis)
        start = time.perf_counter()
        solve_pressure(A, b, tolerance=tolerance)
        ours += time.perf_counter() - start
        start = time.perf_counter()
        x = pyamg.smoothed_aggregation_solver(A.tocsr()).solve(b, tol=tolerance, accel="cg", maxiter=2000)
        theirs += time.perf_counter() - start
        worst = max(worst, float(np.linalg.norm(b - A @ x) / np.linalg.norm(b)))
    return {"ours_one_process_seconds": ours, "pyamg_seconds": theirs, "pyamg_residual": worst,
            "pyamg_to_ours": theirs / ours}


def _verdict(wall_ratio: float, cpu_ratio: float) -> str:
    """Whether the two-phase target is met by both measures, by one, or by neither."""
    met = [wall_ratio <= TWO_PHASE_TARGET, cpu_ratio <= TWO_PHASE_TARGET]
    return "met" if all(met) else ("met in CPU time only" if met[1] else
                                   ("met in wall time only" if met[0] else "missed"))


def format_bench(f: dict) -> str:
    """The benchmark table.

    Parameters
    ----------
    f : dict
        The figures of :func:`run_bench`.

    Returns
    -------
    str
        One line per timing, with ratios and speed-ups, then the peak memory.
    """
    return "\n".join([
        f"upscale bench: {f['field']} ({f['blocks']:,} blocks)",
        f"  static: 4 averages + Cardwell-Parsons bounds, 3 directions   {f['static_seconds']:8.2f} s",
        f"  flow sealed (3 directions), batched                         {f['sealed_seconds']:8.2f} s",
        f"  flow sealed, plain per-block loop (scaled from {f['sample_blocks']} blocks)  {f['plain_sealed_seconds']:8.2f} s"
        f"   speed-up {f['sealed_speedup']:5.1f} x",
        f"  flow periodic (full tensor), batched                        {f['periodic_seconds']:8.2f} s",
        f"  flow periodic, plain per-block loop (scaled)                {f['plain_periodic_seconds']:8.2f} s"
        f"   speed-up {f['periodic_speedup']:5.1f} x",
        f"  flow-based transmissibility of every face (multipliers)      {f['multiplier_seconds']:8.2f} s"
        f"   {f['multiplier_to_sealed']:5.2f} x the sealed time",
        f"    factorisation work of the two-block face problems: {f['multiplier_work_to_sealed']:.2f} x that of the sealed solves",
        f"  flow sealed and multipliers in one pass (shared elimination)   {f['together_seconds']:8.2f} s"
        f"   multipliers add {f['added_multiplier_to_sealed']:5.2f} x the sealed time",
        *[f"  upscale.coarsen(method=\"flow\", bc=\"{bc}\")".ljust(62) + f"{f[f'coarsen_{bc}_seconds']:8.2f} s"
          f"   {f[f'coarsen_{bc}_to_solves']:5.2f} x its batched solves ({f[f'coarsen_{bc}_solves_seconds']:.2f} s, "
          f"interleaved)" for bc in ("sealed", "periodic")],
        f"    coarse k against the solves' diagonal: largest relative difference {f['coarsen_difference']:.1e}",
        f"  single-phase sealed upscaling (all of a coarse file)        {f['single_phase_seconds']:8.2f} s"
        f"   process CPU {f['single_phase_cpu_seconds']:6.2f} s",
        f"  two-phase, capillary limit, 20 points, 2 rock types         {f['two_phase_seconds']:8.2f} s"
        f"   process CPU {f['two_phase_cpu_seconds']:6.2f} s",
        f"    two-phase over single-phase: {f['two_phase_to_single']:5.1f} x wall, "
        f"{f['two_phase_to_single_cpu']:5.1f} x CPU (target <= {TWO_PHASE_TARGET:.0f} x: "
        f"{_verdict(f['two_phase_to_single'], f['two_phase_to_single_cpu'])}); "
        f"{f['two_phase_to_sealed']:5.1f} x the sealed solves alone (wall)",
        f"  largest relative difference batched vs plain on the sample: sealed "
        f"{f['max_relative_difference_sealed']:.1e}, periodic diagonal {f['max_relative_difference_periodic']:.1e}",
        *([f"  fine whole-model steady check, 3 directions (AMG-CG)        {f['whole_model_seconds']:8.2f} s"
           f"   largest relative residual {f['whole_model_residual']:.1e}, {f['whole_model_workers']} process(es)",
           f"  peak memory of the largest worker process: {f['worker_peak_memory_mb']:.0f} MB; "
           f"whole tree at most {f['peak_memory_mb'] + f['whole_model_workers'] * f['worker_peak_memory_mb']:.0f} MB",
           f"  the same three solves in one process                         {f['ours_one_process_seconds']:8.2f} s",
           f"  pyamg smoothed aggregation + CG, same tolerance, one process {f['pyamg_seconds']:8.2f} s"
           f"   its largest relative residual {f['pyamg_residual']:.1e}",
           f"    pyamg's time over ours: {f['pyamg_to_ours']:4.2f} x one process against one, "
           f"{f['pyamg_to_check']:4.2f} x against the check as it runs ({f['whole_model_workers']} process(es)); "
           f"target {WHOLE_MODEL_TARGET:.0f} x"]
          if "whole_model_seconds" in f else []),
        f"  peak memory of the process: {f['peak_memory_mb']:.0f} MB",
    ])
