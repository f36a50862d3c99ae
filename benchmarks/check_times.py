"""The transient check against the steady check on the demo field, side by side.

    python benchmarks/check_times.py [--repeats 2]

Builds the demo field and its coarse grid (flow-based, sealed, 5 x 5 x 5), then times
``upscale.check`` with ``checks="steady"`` and with ``checks="transient"`` (the transient
with the check's default time grid and with the demo's lighter one), interleaved, each
``--repeats`` times, and prints the least time of each and the ratios to the steady
check. The target of the check-speed issue: the transient check at most 2 x the steady one.
Both use the same worker processes (``upscale.checks.steady.worker_count``).
"""

from __future__ import annotations

import argparse
import time

import upscale
from upscale.cli.demo import DEMO_RATIO, DEMO_TRANSIENT
from upscale.gallery.demo_field import demo_field
from upscale.io.validation import validate

TRANSIENT_TARGET = 2.0  # the transient check at most this many times the steady one


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--repeats", type=int, default=2)
    repeats = parser.parse_args().repeats
    fine = validate(demo_field())
    coarse = upscale.coarsen(fine, ratio=DEMO_RATIO, method="flow", bc="sealed")
    runs = {"steady": {"checks": "steady"},
            "transient (check defaults)": {"checks": "transient"},
            "transient (the demo's time grid)": {"checks": "transient", "transient": DEMO_TRANSIENT}}
    best = {name: float("inf") for name in runs}
    for _ in range(repeats):
        for name, options in runs.items():
            start = time.perf_counter()
            upscale.check(fine, coarse, **options)
            best[name] = min(best[name], time.perf_counter() - start)
    print(f"demo field {fine.sizes['x']} x {fine.sizes['y']} x {fine.sizes['z']}, least of {repeats} interleaved runs")
    for name, seconds in best.items():
        ratio = seconds / best["steady"]
        verdict = "" if name == "steady" else (f"   {ratio:4.2f} x the steady check (target <= "
                                               f"{TRANSIENT_TARGET:.0f} x: {'met' if ratio <= TRANSIENT_TARGET else 'missed'})")
        print(f"  {name:34s} {seconds:7.2f} s{verdict}")


if __name__ == "__main__":
    main()
