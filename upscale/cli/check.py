"""``upscale check``: run every check, print the comparison, write the report."""

from __future__ import annotations

import math
import sys
import time
from pathlib import Path

from .._runtime import hold_to_budget
from ..checks.blocks import TOLERANCE
from ..checks.run import check_models, parse_checks
from ..checks.steady import BYTES_PER_CELL
from ..errors import InputError
from ..io.reading import grid_sizes, open_field
from ..io.sector import block_window, coarse_sector, describe, parse_window
from ..report.check_report import build_report
from ..report.text import format_check
from ..scale.memory import PROCESS_BYTES, default_memory


def run_check(fine_path, coarse_path, report_dir=None, tolerance: float = TOLERANCE,
              transient: dict | None = None, quiet: bool = False, checks=None, compare=(), window=None,
              memory: int | None = None, pinch_connections: bool | None = None,
              pinch_thickness: float | None = None, sections: tuple = ()) -> dict:
    """``upscale check``: print the whole-model comparison; write the report if asked.

    ``compare``: paths of other coarse grids of the same field and blocks, compared beside;
    ``window``: a sector ``X0:X1,Y0:Y1,Z0:Z1`` (fine indices on whole coarse blocks) checked
    as a model of its own, read alone from the fine file; ``memory``: the budget, bytes
    (default half the memory available): a whole model that needs more is refused before
    any work, with a hint to check a sector, and the fine checks start no more worker
    processes than it holds; ``pinch_connections``, ``pinch_thickness``: the fine model's
    pinch-out settings (None: as the coarse grid was made); ``sections``: more (title, HTML)
    sections for the report (the demo's two-phase curves).
    """
    parse_checks(checks)  # refused before the files are read
    hold_to_budget(memory)  # the fine checks' worker processes are counted within it
    coarse = open_field(coarse_path)
    others = {Path(path).name: open_field(path) for path in compare}
    if window is None:
        _refuse_too_big(fine_path, default_memory() if memory is None else memory)
        fine = open_field(fine_path)
    else:
        fine, coarse, others = _sectors(fine_path, coarse, others, window)
    started = time.perf_counter()

    def say(line: str) -> None:
        if not quiet:
            print(f"upscale check [{time.perf_counter() - started:5.0f} s] {line}", file=sys.stderr, flush=True)

    metrics, arrays = check_models(fine, coarse, tolerance, transient, say, checks, others, pinch_connections,
                                   pinch_thickness)
    print(format_check(metrics))
    if report_dir is not None:
        paths = build_report(report_dir, metrics, arrays, sections)
        print(f"wrote {paths['html']} and {paths['metrics']}")
    return metrics


def _refuse_too_big(path, memory: int) -> None:
    """Refuse a fine model whose checks need more than ``memory`` bytes (read from the header)."""
    cells = math.prod(grid_sizes(path).values())
    need = PROCESS_BYTES + cells * BYTES_PER_CELL
    if need > memory:
        raise InputError(f"{path}: checking the whole model of {cells:,} cells needs about {need / 2 ** 30:.1f} GB "
                         f"(budget {memory / 2 ** 30:.1f} GB): check a sector with --window X0:X1,Y0:Y1,Z0:Z1 "
                         f"(fine indices on whole coarse blocks), or raise --memory")


def _sectors(fine_path, coarse, others: dict, text: str):
    """The fine field's sector (read alone) and the coarse grids' sectors of a window."""
    shape = tuple(int(coarse[f"{n}_stop"].values[-1]) for n in ("x", "y", "z"))
    window = parse_window(text, shape)
    blocks = block_window(window, coarse)
    fine = open_field(fine_path, window=window)
    fine.attrs["sector"] = describe(window)
    return fine, coarse_sector(coarse, blocks), {k: coarse_sector(v, blocks) for k, v in others.items()}
