"""Command line: ``upscale VERB ...``. Exit codes: 0 success, 2 bad usage or input,
1 internal failure, 130 interrupted."""

from __future__ import annotations

import argparse
import json
import logging
import math
import os
import sys
import textwrap
from contextlib import contextmanager
from pathlib import Path

from ..about import tool_version
from ..errors import InputError

EXAMPLES = {
    "coarsen": """\
        upscale coarsen fields/demo.nc -o fields/demo_coarse.nc --ratio 5 5 5 --method flow --bc sealed
        upscale coarsen fine.nc -o coarse.nc --ratio 4 4 1 --edges z=0,3,10,20 --method arithmetic,arithmetic,harmonic
        upscale coarsen fine.nc -o coarse.nc --ratio 5 5 5 --method flow --bc periodic --border 2 --multipliers
        upscale coarsen fine.nc -o coarse.nc --ratio 5 5 5 --method flow --bc global
        upscale coarsen fine.nc -o coarse.nc --ratio 5 5 5 --pinch-thickness 0.05
        upscale coarsen big.nc -o coarse.nc --ratio 5 5 5 --memory 2GB --workers 2
        upscale coarsen big.nc -o coarse.nc --ratio 5 5 5 --scheduler tcp://127.0.0.1:8786""",
    "inspect": """\
        upscale inspect fields/demo.nc
        upscale inspect fine.nc --pinch-thickness 0.05 --json
        upscale inspect big.nc --memory 2GB --json    # any size: read in slabs that fit 2 GB""",
    "make-field": """\
        upscale make-field lognormal -o fields/random.nc --shape 60 220 85 --sigma 2 --correlation 8 8 2 --seed 1
        upscale make-field layered -o fields/layers.nc --thickness 2 1 3 --permeability 100 1 500
        upscale make-field channels -o fields/channels.nc --shape 80 60 20 --seed 3
        upscale make-field demo -o fields/demo.nc""",
    "demo": "upscale demo            # writes fields/demo*.nc and reports/demo/",
    "check": """\
        upscale check fields/demo.nc fields/demo_coarse.nc --report reports/demo
        upscale check fields/demo.nc fields/demo_coarse.nc --checks steady,diagonal
        upscale check big.nc big_coarse.nc --window 0:100,0:100,: --report reports/sector""",
    "layers": "upscale layers fields/demo.nc --target 10",
    "two-phase": """\
        upscale two-phase fields/demo.nc --rocks fields/demo_rocks.toml -o fields/demo_curves.nc --ratio 5 5 5 --limit capillary
        upscale two-phase fine.nc --rocks rocks.toml -o curves.nc --ratio 5 5 5 --limit viscous --regions facies
        upscale two-phase fine.nc --rocks rocks.toml -o curves.nc --ratio 4 4 2 --bc periodic --border 2 --report reports/curves
        upscale two-phase big.nc --rocks rocks.toml -o curves.nc --ratio 5 5 5 --memory 2GB --workers 2""",
    "bench": """\
        upscale bench                  # prints timings and ratios side by side
        upscale bench --whole-model    # also the fine whole-model check (slow)""",
}


class _Parser(argparse.ArgumentParser):
    """An argument parser whose usage errors are one line and exit 2."""

    def error(self, message):
        """Print the usage error as one line and exit 2."""
        self.exit(2, f"upscale: error: {message} (see: {self.prog} --help)\n")


def _common() -> argparse.ArgumentParser:
    """The options every verb takes: --quiet, --verbose, --debug."""
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--quiet", action="store_true", help="no progress bars")
    common.add_argument("--verbose", action="store_true", help="detailed log messages")
    common.add_argument("--debug", action="store_true", help="show tracebacks of internal errors")
    return common


def _add(sub, name: str, help_text: str) -> argparse.ArgumentParser:
    """The subparser of verb ``name``, its examples (:data:`EXAMPLES`) as the epilog."""
    epilog = "example:\n" + textwrap.indent(textwrap.dedent(EXAMPLES[name]), "  ")
    return sub.add_parser(name, help=help_text, description=help_text, epilog=epilog, parents=[_common()],
                          formatter_class=argparse.RawDescriptionHelpFormatter)


def _edges_argument(text: str) -> tuple[str, list[int]]:
    """``--edges AXIS=E0,E1,...`` as (axis, [edges])."""
    try:
        axis, values = text.split("=", 1)
        return axis.strip(), [int(v) for v in values.replace(",", " ").split()]
    except ValueError:
        raise argparse.ArgumentTypeError(f"edges must look like z=0,3,10,20, got '{text}'") from None


def _add_parallel(p: argparse.ArgumentParser) -> None:
    """The options of work in boxes: --memory, --workers, --box, --scheduler."""
    p.add_argument("--memory", metavar="SIZE", help="memory budget of the whole run, e.g. 2GB or 800MB "
                   "(default: half the memory available); a field that does not fit is processed in "
                   "boxes of whole coarse blocks")
    p.add_argument("--workers", type=int, metavar="N", help="run the boxes on N local worker processes")
    p.add_argument("--box", nargs=3, type=int, metavar=("BX", "BY", "BZ"),
                   help="coarse blocks per box along x, y, z when working in boxes (default: from --memory)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="run the boxes on a running dask.distributed "
                   "cluster, e.g. tcp://10.0.0.5:8786 (the workers must see the same file paths; "
                   "--memory is then the budget of each worker)")


def _add_pinch_outs(p: argparse.ArgumentParser, verb: str) -> None:
    """The pinch-out options: --pinch-thickness, --no-pinch-connections. For ``check`` both
    default to what the coarse grid was made with; for ``inspect`` the connections to what
    the file records (a coarse grid's setting)."""
    thickness = {"check": "default: as the coarse grid was made"}.get(verb, "default 0: only dz = 0")
    connections = {"check": " (default: as the coarse grid was made)",
                   "inspect": " (default: as the file records, else connections)"}.get(verb, "")
    p.add_argument("--pinch-thickness", default=None if verb == "check" else "0", metavar="T",
                   help="cells thinner than T, in the field's thickness units (those of its dz, m or ft), count "
                   "as pinched out like cells of dz = 0: their volume is left out and they carry no flow of "
                   f"their own ({thickness})")
    p.add_argument("--no-pinch-connections", dest="pinch_connections", action="store_const", const=False,
                   default=True if verb == "coarsen" else None,
                   help="pinched cells seal their columns; by default vertical flow passes across a run of "
                   "pinched cells between the real cells above and below as if they were neighbours (pinch-out "
                   f"connections), in the fine and coarse models{connections}")


def _pinch_options(args) -> dict:
    """The pinch-out keywords of the API from the options, the thickness checked first
    (a one-line refusal naming --pinch-thickness)."""
    from ..io.pinch_outs import thickness_threshold

    thickness = None if args.pinch_thickness is None else thickness_threshold(args.pinch_thickness,
                                                                              "--pinch-thickness")
    return {"pinch_connections": args.pinch_connections, "pinch_thickness": thickness}


def _add_blocks(p: argparse.ArgumentParser) -> None:
    """The options of the coarse blocks: --ratio, --edges."""
    p.add_argument("--ratio", nargs=3, type=int, metavar=("RX", "RY", "RZ"),
                   help="fine cells per coarse cell along x, y, z (default 1 1 1 where no edges)")
    p.add_argument("--edges", action="append", type=_edges_argument, default=[], metavar="AXIS=E0,E1,...",
                   help="fine-index edges of the coarse cells along one axis, e.g. z=0,3,10,20 (repeatable)")


def _coarsen_options(p: argparse.ArgumentParser) -> None:
    """Options of ``upscale coarsen``."""
    p.add_argument("fine", help="fine field (NetCDF)")
    p.add_argument("-o", "--output", required=True, help="coarse grid file to write (NetCDF)")
    _add_blocks(p)
    p.add_argument("--method", default="flow", help="arithmetic, harmonic, geometric, power or flow; "
                   "or one per axis: arithmetic,arithmetic,harmonic (default flow)")
    p.add_argument("--omega", type=float, help="exponent of the power average")
    p.add_argument("--bc", default="sealed", help="boundary condition for flow: sealed, periodic, linear, or "
                   "global (local-global face transmissibilities, written as multipliers)")
    p.add_argument("--border", type=int, default=0, help="border ring of fine cells around each block (flow), "
                   "or around each face's two blocks (global)")
    p.add_argument("--global-solves", default="coarse", help="with --bc global: coarse (local problems driven by "
                   "the coarse model, the default) or fine (fitted to three fine whole-model solves)")
    p.add_argument("--passes", type=int, help="with --bc global: the most passes (default 3 coarse, 10 fine)")
    p.add_argument("--multipliers", action="store_true", help="compute flow-based transmissibility multipliers")
    p.add_argument("--multipliers-csv", metavar="FILE", help="also write all multipliers as CSV (i,j,k,direction,multiplier)")
    p.add_argument("--units", default="metric", help="transmissibility units: metric or field")
    _add_pinch_outs(p, "coarsen")
    _add_parallel(p)


def _inspect_options(p: argparse.ArgumentParser) -> None:
    """Options of ``upscale inspect``."""
    p.add_argument("file", help="field or coarse grid (NetCDF)")
    p.add_argument("--json", action="store_true", help="print the summary as JSON")
    p.add_argument("--memory", metavar="SIZE", help="memory budget, e.g. 2GB (default: half the memory "
                   "available); the field is read in slabs along x that fit it, in two passes or three")
    _add_pinch_outs(p, "inspect")


def _make_field_options(p: argparse.ArgumentParser) -> None:
    """Options of ``upscale make-field``."""
    p.add_argument("kind", choices=("lognormal", "layered", "channels", "demo"))
    p.add_argument("-o", "--output", required=True, help="file to write (NetCDF)")
    p.add_argument("--shape", nargs=3, type=int, metavar=("NX", "NY", "NZ"))
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--sigma", type=float, default=2.0, help="std of ln k (lognormal)")
    p.add_argument("--correlation", nargs=3, type=float, default=(8, 8, 2), metavar=("LX", "LY", "LZ"),
                   help="correlation lengths in cells (lognormal)")
    p.add_argument("--kv-kh", type=float, default=0.1, help="vertical to horizontal permeability ratio")
    p.add_argument("--cell", nargs=3, type=float, default=(20.0, 10.0, 2.0), metavar=("DX", "DY", "DZ"),
                   help="cell size in m (lognormal)")
    p.add_argument("--thickness", nargs="+", type=float, help="layer thicknesses in m (layered)")
    p.add_argument("--permeability", nargs="+", type=float, help="layer permeabilities in mD (layered)")
    p.add_argument("--channels", type=int, default=6, help="number of channels (channels)")
    p.add_argument("--in-chunks", action="store_true", help="lognormal of any size, made and written chunk by "
                   "chunk within --memory (another generator: the same seed gives another field)")
    p.add_argument("--memory", metavar="SIZE", help="memory budget, e.g. 2GB (default: half the memory available)")


def _demo_options(p: argparse.ArgumentParser) -> None:
    """Options of ``upscale demo``."""
    p.add_argument("--dir", default=".", help="folder that receives fields/ and reports/ (default: here)")


def _check_options(p: argparse.ArgumentParser) -> None:
    """Options of ``upscale check``."""
    p.add_argument("fine")
    p.add_argument("coarse")
    p.add_argument("--report", help="folder for index.html and metrics.json")
    p.add_argument("--checks", help="comma-separated subset of steady,diagonal,transient,blocks,layering "
                   "(default all)")
    p.add_argument("--window", metavar="X0:X1,Y0:Y1,Z0:Z1", help="check only this sector (fine indices, "
                   "half-open, on whole coarse blocks; an empty bound is the grid's edge), as a model of its own")
    p.add_argument("--memory", metavar="SIZE", help="memory budget, e.g. 2GB (default: half the memory "
                   "available); a whole model that needs more is refused with a hint to use --window")
    p.add_argument("--compare", nargs="+", default=[], metavar="OTHER.nc",
                   help="other coarse grids of the same field and blocks: their steady and diagonal errors "
                   "beside this one's")
    p.add_argument("--drainage", choices=("face", "well"), default="face",
                   help="transient check: drain through a model face or a vertical well (default face)")
    p.add_argument("--face", default="x-", help="drained face: x-, x+, y-, y+, z- or z+ (default x-)")
    p.add_argument("--well-column", nargs=2, type=int, metavar=("I", "J"),
                   help="fine column of the well (default: the grid centre)")
    p.add_argument("--compressibility", type=float, default=1e-4,
                   help="total compressibility in 1/bar (default 1e-4)")
    p.add_argument("--viscosity", type=float, default=1.0, help="viscosity in cP (default 1)")
    p.add_argument("--steps-per-doubling", type=int, default=8,
                   help="time steps per doubling of time (even, default 8)")
    _add_pinch_outs(p, "check")


def _layers_options(p: argparse.ArgumentParser) -> None:
    """Options of ``upscale layers``."""
    p.add_argument("fine")
    p.add_argument("--target", type=int, required=True, help="number of coarse layers")
    p.add_argument("--edges", type=lambda t: [int(v) for v in t.replace(",", " ").split()],
                   help="a grouping to judge, e.g. 0,3,10,20")
    p.add_argument("--figure", help="PNG file for the layer profile")
    p.add_argument("--memory", metavar="SIZE", help="memory budget, e.g. 2GB (default: half the memory "
                   "available); the field is read in slabs along x that fit it")


def _two_phase_options(p: argparse.ArgumentParser) -> None:
    """Options of ``upscale two-phase``."""
    p.add_argument("fine", help="fine field (NetCDF) with an integer 'facies' variable")
    p.add_argument("--rocks", required=True, metavar="ROCKS.toml", help="rock table: [fluids] and one [rock.NAME] "
                   "per facies (NAME a flag meaning of 'facies', or its code)")
    p.add_argument("-o", "--output", required=True, help="curve file to write (NetCDF; a coarse grid with the curves)")
    _add_blocks(p)
    p.add_argument("--limit", default="capillary", help="flow regime: capillary (capillary equilibrium in each "
                   "block: low rates, small blocks; the default) or viscous (every cell at one fractional flow: "
                   "high rates)")
    p.add_argument("--points", type=int, default=20, help="saturation points per curve (default 20)")
    p.add_argument("--bc", default="sealed", help="boundary condition of the phase solves: sealed, periodic or linear")
    p.add_argument("--border", type=int, default=0, help="border ring of fine cells around each block")
    p.add_argument("--regions", metavar="VARIABLE", help="also one curve set per region: the blocks sharing the code "
                   "of this integer fine variable that holds most of their pore volume (e.g. facies)")
    p.add_argument("--report", metavar="FOLDER", help="also write index.html with the curves of a few blocks")
    _add_parallel(p)


def _bench_options(p: argparse.ArgumentParser) -> None:
    """Options of ``upscale bench``."""
    p.add_argument("--shape", nargs=3, type=int, default=(60, 220, 85), metavar=("NX", "NY", "NZ"))
    p.add_argument("--sample", type=int, default=300, help="blocks timed with the plain loop")
    p.add_argument("--whole-model", action="store_true", help="also time the fine whole-model steady check")


#: the verbs in the order of ``upscale --help``: name, one-line help, its options
_VERB_PARSERS = (
    ("coarsen", "coarsen a fine field into a coarse grid file", _coarsen_options),
    ("inspect", "summarise a field file: sizes, value ranges, heterogeneity", _inspect_options),
    ("make-field", "write a seeded synthetic field", _make_field_options),
    ("demo", "run the whole job on the built-in synthetic sector", _demo_options),
    ("check", "compare a coarse grid with its fine field by whole-model flow", _check_options),
    ("layers", "judge a grouping of fine layers and propose the best one", _layers_options),
    ("two-phase", "upscale relative permeability and capillary pressure per coarse block", _two_phase_options),
    ("bench", "time the upscaling against the plain per-block approach", _bench_options),
)


def build_parser() -> argparse.ArgumentParser:
    """The parser of the command line.

    Returns
    -------
    argparse.ArgumentParser
        ``upscale`` with ``--version`` and one subparser per verb (:data:`_VERB_PARSERS`),
        the chosen verb in ``verb``; usage errors print one line and exit 2.
    """
    parser = _Parser(prog="upscale", description="Turn fine geomodels into coarse simulation grids and measure, "
                     "with flow solves, how much of the fine model's flow they keep.")
    parser.add_argument("--version", action="version", version=f"upscale {tool_version()}")
    sub = parser.add_subparsers(dest="verb", required=True, parser_class=_Parser)
    for name, help_text, add_options in _VERB_PARSERS:
        add_options(_add(sub, name, help_text))
    return parser


@contextmanager
def progress_bar(total: int, label: str, quiet: bool, unit: str = "block"):
    """A tqdm progress bar on stderr, for the duration of a ``with`` block.

    Parameters
    ----------
    total : int
        Units of work.
    label : str
        Shown before the bar.
    quiet : bool
        No bar; neither is there one when stderr is not a terminal.
    unit : str
        Name of one unit of work.

    Yields
    ------
    callable
        ``update(n)``: n more units done.
    """
    from tqdm import tqdm

    bar = tqdm(total=total, desc=label, unit=unit, disable=quiet or not sys.stderr.isatty(),
               file=sys.stderr, leave=False)
    try:
        yield bar.update
    finally:
        bar.close()


def _coarsen(args) -> int:
    """``upscale coarsen``: in memory, or in boxes when the field does not fit the budget."""
    from ..io.reading import open_field
    from ..io.writing import check_output_path
    from ..scale.cluster import cluster
    from ..scale.stream import write

    pinch = _pinch_options(args)
    out = check_output_path(args.output, inputs=(args.fine,))
    table = check_output_path(args.multipliers_csv, inputs=(args.fine, args.output)) if args.multipliers_csv else None
    if table and not args.multipliers:
        raise InputError("--multipliers-csv needs --multipliers")
    if args.workers is not None and args.scheduler:
        raise InputError("give --workers (local processes) or --scheduler (a running cluster), not both")
    options = dict(ratio=args.ratio, edges=dict(args.edges), method=args.method, bc=args.bc, border=args.border,
                   omega=args.omega, multipliers=args.multipliers, units=args.units,
                   global_solves=args.global_solves, passes=args.passes, **pinch)
    plan = _memory_plan(args)
    chunked = args.box is not None or plan.chunked(args.fine, args.method, args.multipliers)
    if chunked:
        from .._runtime import keep_heap_small

        keep_heap_small()
    with cluster(workers=args.workers, scheduler=args.scheduler):  # none unless asked for
        if chunked:
            coarse = _coarsen_in_boxes(plan.open(args.fine), plan.box_memory, args.box, options, args.quiet, out)
        else:
            coarse = _coarsen_in_memory(open_field(args.fine), options, args.quiet)
            write(coarse, out)
    if table:
        _write_multiplier_csv(coarse, table)
    print(f"wrote {out} ({' x '.join(str(coarse.sizes[d]) for d in ('x', 'y', 'z'))} cells, "
          f"method {coarse.attrs['method']}{', in boxes' if chunked else ''})")
    return 0


def _coarsen_in_boxes(fine, box_memory: int, box, options: dict, quiet: bool, out):
    """``coarsen`` box by box, streamed to ``out`` with a progress bar over the boxes;
    returns the file written, read back (and its flagged blocks warned about)."""
    import xarray as xr

    from ..io.coarse_grid import warn_flagged
    from ..scale.boxes import box_count
    from ..scale.coarsen import coarsen
    from ..scale.stream import write

    coarse = coarsen(fine, memory=box_memory, box=box, **options)
    with progress_bar(box_count(coarse), "boxes", quiet, unit="box") as update:
        write(coarse, out, progress=update)
    with xr.open_dataset(out) as written:
        coarse = written.load()
    warn_flagged(coarse)
    return coarse


def _write_multiplier_csv(coarse, table) -> None:
    """Write the coarse grid's multipliers as CSV (:func:`multiplier_csv`), atomically."""
    from ..io.writing import atomic_write, multiplier_csv

    text = multiplier_csv({n: coarse[f"t{n}_multiplier"].values for n in "xyz"})
    atomic_write(table, lambda tmp: Path(tmp).write_text(text))
    print(f"wrote {table}")


def _coarsen_in_memory(fine, options: dict, quiet: bool):
    """``coarsen`` with a progress bar over the local solves."""
    import numpy as np

    from ..core.partition import make_partition
    from ..scale.coarsen import coarsen

    shape = tuple(fine.sizes[d] for d in ("x", "y", "z"))
    coarse_shape = make_partition(shape, options["ratio"], options["edges"]).shape
    work = int(np.prod(coarse_shape)) if "flow" in options["method"] else 0
    faces = sum(int(np.prod(coarse_shape)) * (n - 1) // n for n in coarse_shape)
    global_stage = options["bc"] == "global" and options["global_solves"] == "coarse"
    if options["multipliers"] or options["bc"] == "global":
        work += faces
    if global_stage:  # at most this many passes over the faces; the bar may end early
        work += faces * (options["passes"] or 3)
    with progress_bar(work, "local solves", quiet) as update:
        return coarsen(fine, progress=update, **options)


def _memory_plan(args):
    """The MemoryPlan of the command's --memory, --workers and --scheduler."""
    from ..scale.memory import MemoryPlan, parse_memory

    return MemoryPlan(parse_memory(args.memory) if args.memory else None, getattr(args, "workers", None),
                      bool(getattr(args, "scheduler", None)))


def _inspect(args) -> int:
    """``upscale inspect``: the field summary as text or JSON."""
    from ..checks.summary import READ_CACHE_BYTES, field_summary, summary_slab
    from ..core.grid import AXES
    from ..io.pinch_outs import with_pinch_outs
    from ..io.reading import grid_sizes, limit_chunk_cache, open_field
    from ..io.schema import pinch_connections
    from ..report.text import format_summary
    from ..scale.memory import PROCESS_BYTES

    pinch = _pinch_options(args)
    plan = _memory_plan(args)
    sizes = grid_sizes(args.file)
    slab = summary_slab([sizes.get(d, 1) for d in AXES], plan.memory, PROCESS_BYTES)  # before any work
    limit_chunk_cache(READ_CACHE_BYTES)
    field = open_field(args.file, chunks={"x": slab, "y": -1, "z": -1})
    recorded = pinch_connections(field) if pinch["pinch_connections"] is None else pinch["pinch_connections"]
    passes = []  # the field is checked, then summarised, one slab (chunk) at a time
    summary = field_summary(with_pinch_outs(field, recorded, pinch["pinch_thickness"]), passes=passes)
    if not args.quiet:
        count = f"{passes[0]} pass{'' if passes[0] == 1 else 'es'}"
        print(f"upscale inspect: {count} over {passes[1]} slab(s) of at most {slab} x planes "
              f"(--memory {plan.memory / 2 ** 20:.0f} MB)", file=sys.stderr)
    print(json.dumps(summary, indent=2) if args.json else format_summary(summary))
    return 0


def _make_field(args) -> int:
    """``upscale make-field``: write one of the synthetic fields."""
    from ..gallery import synthetic
    from ..io.writing import check_output_path
    from ..scale.stream import write

    out = check_output_path(args.output)
    if args.in_chunks and args.kind != "lognormal":
        raise InputError("--in-chunks is for lognormal fields")
    shape = tuple(args.shape or (60, 220, 85))
    lognormal = dict(shape=shape, sigma_ln=args.sigma, correlation_lengths=tuple(args.correlation),
                     kv_kh=args.kv_kh, cell_size=tuple(args.cell), seed=args.seed)
    plan = _memory_plan(args)
    if args.kind == "lognormal" and args.in_chunks:
        from .._runtime import keep_heap_small
        from ..scale.boxes import box_count
        from ..scale.memory import PROCESS_BYTES

        keep_heap_small()
        ds = synthetic.lognormal_field_in_chunks(chunk_cells=max((plan.memory - PROCESS_BYTES) // 400, 1),
                                                 **lognormal)
        with progress_bar(box_count(ds), "chunks", args.quiet, unit="chunk") as update:
            write(ds, out, progress=update)
        print(f"wrote {out}")
        return 0
    if args.kind == "lognormal":
        need = synthetic.FFT_BYTES_PER_CELL * math.prod(shape)
        if need > plan.memory:
            raise InputError(f"a {' x '.join(map(str, shape))} field needs about {need / 2 ** 30:.1f} GB in memory "
                             f"(budget {plan.memory / 2 ** 30:.1f} GB): add --in-chunks, or raise --memory")
        ds = synthetic.lognormal_field(**lognormal)
    elif args.kind == "layered":
        if not args.thickness or not args.permeability or len(args.thickness) != len(args.permeability):
            raise InputError("layered fields need --thickness and --permeability with one value per layer")
        ds = synthetic.layered_field(args.thickness, args.permeability, kv_kh=args.kv_kh)
    elif args.kind == "channels":
        ds = synthetic.channel_field(tuple(args.shape or (80, 60, 20)), args.channels, 4, args.seed)
    else:
        from ..gallery.demo_field import demo_field

        ds = demo_field(seed=args.seed or 7)
    write(ds, out)
    print(f"wrote {out}")
    return 0


def _demo(args) -> int:
    """``upscale demo``."""
    from .demo import run_demo

    run_demo(args.dir, quiet=args.quiet)
    return 0


def _check(args) -> int:
    """``upscale check``: the steady and transient checks and their report."""
    from .check import run_check

    transient = {"drainage": args.drainage, "face": args.face, "column": args.well_column,
                 "compressibility": args.compressibility, "viscosity": args.viscosity,
                 "steps_per_doubling": args.steps_per_doubling}
    from ..scale.memory import parse_memory

    run_check(args.fine, args.coarse, args.report, transient=transient, quiet=args.quiet, checks=args.checks,
              compare=args.compare, window=args.window, memory=parse_memory(args.memory) if args.memory else None,
              **_pinch_options(args))
    return 0


def _layers(args) -> int:
    """``upscale layers``: judge groupings of the fine layers, optionally with a figure."""
    from ..checks.layering import field_layer_statistics
    from ..core.layering import compare_groupings
    from ..io.writing import check_output_path
    from ..report.figures import plot_layer_profile
    from ..report.text import format_comparison

    if args.figure:
        check_output_path(args.figure, (args.fine,))  # before the work, not after it
    stats = field_layer_statistics(_memory_plan(args).open(args.fine))  # read slab by slab along x
    result = compare_groupings(stats, args.target, edges=args.edges)
    print(format_comparison(result))
    if args.figure:
        groupings = {name: value["edges"] for name, value in result.items() if "edges" in value}
        plot_layer_profile(stats, groupings, args.figure)
        print(f"wrote {args.figure}")
    return 0


def _two_phase(args) -> int:
    """``upscale two-phase``: the curves of every coarse block, in memory or in boxes."""
    from ..io.reading import open_field
    from ..io.rock_table import read_rock_table
    from ..io.writing import check_output_path
    from ..scale.cluster import cluster
    from ..scale.stream import write
    from ..scale.two_phase import check_options, two_phase

    out = check_output_path(args.output, inputs=(args.fine, args.rocks))
    if args.report and Path(args.report).exists() and not Path(args.report).is_dir():
        raise InputError(f"--report {args.report}: is a file; give a folder for index.html and metrics.json")
    if args.workers is not None and args.scheduler:
        raise InputError("give --workers (local processes) or --scheduler (a running cluster), not both")
    table = read_rock_table(args.rocks)
    options = dict(ratio=args.ratio, edges=dict(args.edges), limit=args.limit, bc=args.bc, border=args.border,
                   points=args.points, regions=args.regions)
    check_options(args.limit, args.bc, args.points)
    plan = _memory_plan(args)
    chunked = args.box is not None or plan.chunked(args.fine, "flow", False)
    with cluster(workers=args.workers, scheduler=args.scheduler):
        fine = plan.open(args.fine) if chunked else open_field(args.fine)
        with progress_bar(0 if chunked else _block_count(fine, options), "phase solves", args.quiet) as update:
            curves = two_phase(fine, table, progress=None if chunked else update, memory=plan.box_memory,
                               box=args.box, **options)
    write(curves, out)
    print(f"wrote {out} ({' x '.join(str(curves.sizes[d]) for d in ('x', 'y', 'z'))} blocks, "
          f"{curves.sizes['saturation_point']} saturation points, {args.limit} limit{', in boxes' if chunked else ''})")
    if args.report:
        from ..report.curve_report import build_curve_report

        paths = build_curve_report(args.report, curves, fine, table)
        print(f"wrote {paths['html']}")
    return 0


def _block_count(fine, options: dict) -> int:
    """Coarse blocks of a field's partition."""
    import numpy as np

    from ..core.partition import make_partition

    shape = tuple(fine.sizes[d] for d in ("x", "y", "z"))
    return int(np.prod(make_partition(shape, options["ratio"], options["edges"]).shape))


def _bench(args) -> int:
    """``upscale bench``."""
    from .bench import run_bench

    run_bench(shape=tuple(args.shape), sample=args.sample, quiet=args.quiet, whole_model=args.whole_model)
    return 0


VERBS = {"coarsen": _coarsen, "inspect": _inspect, "make-field": _make_field, "demo": _demo,
         "check": _check, "layers": _layers, "two-phase": _two_phase, "bench": _bench}


def main(argv: list[str] | None = None) -> int:
    """Run one command line.

    Parameters
    ----------
    argv : list of str, optional
        The arguments after ``upscale``; None: ``sys.argv[1:]``.

    Returns
    -------
    int
        Exit code: 0 success, 2 bad usage or input, 1 internal failure, 130 interrupted.
        Errors are printed as one line on stderr (internal ones with a traceback under
        --debug).
    """
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.INFO if args.verbose else logging.WARNING,
                        format="upscale: %(levelname)s: %(message)s", stream=sys.stderr)
    try:
        return VERBS[args.verb](args)
    except InputError as exc:
        print(f"upscale: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("upscale: interrupted; no output was left behind", file=sys.stderr)
        return 130
    except Exception as exc:  # internal failure: one line unless --debug
        if args.debug:
            raise
        print(f"upscale: internal error: {type(exc).__name__}: {exc} (rerun with --debug for details)",
              file=sys.stderr)
        return 1


def run() -> None:
    """Console entry point: :func:`main` on the process's arguments, exiting with its code.

    After an interrupt (exit code 130) the process ends at once, streams flushed and
    temporary files already removed, so that a second Ctrl-C landing in the interpreter's
    shutdown cannot turn the exit into a traceback or a signal death.
    """
    code = main()
    if code == 130:
        sys.stdout.flush()
        sys.stderr.flush()
        os._exit(130)
    sys.exit(code)


if __name__ == "__main__":
    run()
