"""``upscale check``: run every check, print the comparison, write the report."""

from __future__ import annotations

import sys
import time
from pathlib import Path

from ..checks.blocks import TOLERANCE
from ..checks.run import check_models, parse_checks
from ..io.reading import open_field
from ..report.check_report import build_report
from ..report.text import format_check


def run_check(fine_path, coarse_path, report_dir=None, tolerance: float = TOLERANCE,
              transient: dict | None = None, quiet: bool = False, checks=None, compare=()) -> dict:
    """``upscale check``: print the whole-model comparison; write the report if asked.
    ``compare``: paths of other coarse grids of the same field and blocks, compared beside."""
    parse_checks(checks)  # refused before the files are read
    fine = open_field(fine_path)
    coarse = open_field(coarse_path)
    others = {Path(path).name: open_field(path) for path in compare}
    started = time.perf_counter()

    def say(line: str) -> None:
        if not quiet:
            print(f"upscale check [{time.perf_counter() - started:5.0f} s] {line}", file=sys.stderr, flush=True)

    metrics, arrays = check_models(fine, coarse, tolerance, transient, say, checks, others)
    print(format_check(metrics))
    if report_dir is not None:
        paths = build_report(report_dir, metrics, arrays)
        print(f"wrote {paths['html']} and {paths['metrics']}")
    return metrics
