"""A 100 M-cell field in 2 GB: ``inspect`` of the whole field and ``check --window`` of a 1 M-cell sector.

    python benchmarks/large_checks.py [--work DIR] [--shape 500 500 400] [--keep]

1. writes a seeded synthetic field of 500 x 500 x 400 = 100 M cells slab by slab with
   netCDF4 (float32, four x planes per slab and per stored chunk: it is never whole in
   memory; about 2 GB on disk): lognormal permeability (sigma of ln k 1.5 around a mean
   that varies by layer), porosity following ln k, net-to-gross 1 in a third of the cells;
2. ``upscale inspect --memory 2GB`` of the whole field (target: the process within 2 GB);
3. ``upscale coarsen --ratio 5 5 5 --method flow --bc sealed --memory 4GB`` (in boxes), the
   coarse grid the sector check needs;
4. ``upscale check --window 0:100,0:100,0:100 --memory 2GB`` (1 M fine cells, whole coarse
   blocks, every check; target: within 2 GB).

Memory is the peak over time of the command's process tree, sampled every 0.2 s from /proc:
the summed resident memory (which counts pages a forked worker shares with its parent
twice: an upper bound) and the summed proportional set size (shared pages split between
the processes that share them). Times are wall-clock, each command run once. The work
folder is removed at the end unless ``--keep``.
"""

from __future__ import annotations

import argparse
import math
import os
import shutil
import subprocess
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
from large_models import UPSCALE, process_tree

SLAB = 4  # x planes per slab written, and per stored chunk


def write_field(path: Path, shape, seed: int = 1) -> float:
    """Write the synthetic field slab by slab; seconds taken."""
    import netCDF4

    start = time.perf_counter()
    nx, ny, nz = shape
    layer_mean = np.log(50.0) + 1.0 * np.sin(np.linspace(0, 6 * np.pi, nz))   # ln mD, by layer
    with netCDF4.Dataset(path, "w") as nc:
        nc.Conventions = "CF-1.10"
        for name, size in zip("xyz", shape):
            nc.createDimension(name, size)
        for name, dim, size in (("dx", "x", 20.0), ("dy", "y", 20.0), ("dz", "z", 1.0)):
            variable = nc.createVariable(name, "f8", (dim,))
            variable.units = "m"
            variable[:] = np.full(nc.dimensions[dim].size, size)
        cells = {}
        for name, units in (("kx", "mD"), ("ky", "mD"), ("kz", "mD"), ("porosity", "1"), ("ntg", "1")):
            cells[name] = nc.createVariable(name, "f4", ("x", "y", "z"), chunksizes=(SLAB, ny, nz))
            cells[name].units = units
        for index, lo in enumerate(range(0, nx, SLAB)):
            hi = min(lo + SLAB, nx)
            rng = np.random.default_rng([seed, index])
            score = rng.standard_normal((hi - lo, ny, nz), dtype=np.float32)
            kx = np.exp(layer_mean[None, None, :] + 1.5 * score).astype(np.float32)
            cells["kx"][lo:hi] = kx
            cells["ky"][lo:hi] = 0.8 * kx
            cells["kz"][lo:hi] = 0.1 * kx
            cells["porosity"][lo:hi] = np.clip(0.18 + 0.04 * score, 0.02, 0.35)
            cells["ntg"][lo:hi] = np.where(rng.random(score.shape) < 1 / 3, 1.0,
                                           rng.uniform(0.3, 1.0, score.shape)).astype(np.float32)
    return time.perf_counter() - start


def _memory_mb(pids) -> tuple[float, float]:
    """Summed resident memory and proportional set size of ``pids``, MB."""
    rss = pss = 0
    for pid in pids:
        try:
            with open(f"/proc/{pid}/smaps_rollup") as handle:
                for line in handle:
                    if line.startswith("Rss:"):
                        rss += int(line.split()[1])
                    elif line.startswith("Pss:"):
                        pss += int(line.split()[1])
        except OSError:
            continue
    return rss / 1024, pss / 1024


def measured(*args) -> dict:
    """Run an upscale command: wall time (s), peak tree RSS and PSS (MB), its stderr."""
    start = time.perf_counter()
    process = subprocess.Popen([*UPSCALE, *map(str, args)], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                               text=True)
    peak = [0.0, 0.0]

    def sample():
        while process.poll() is None:
            rss, pss = _memory_mb(process_tree(process.pid))
            peak[0], peak[1] = max(peak[0], rss), max(peak[1], pss)
            time.sleep(0.2)

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    stdout, stderr = process.communicate()
    sampler.join()
    if process.returncode != 0:
        raise SystemExit(f"upscale {' '.join(map(str, args))} failed:\n{stderr}")
    return {"seconds": time.perf_counter() - start, "rss": peak[0], "pss": peak[1], "out": stdout,
            "err": stderr.strip()}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--work", type=Path, default=Path(tempfile.gettempdir()) / "upscale-large-checks")
    parser.add_argument("--shape", nargs=3, type=int, default=(500, 500, 400))
    parser.add_argument("--keep", action="store_true", help="keep the work folder")
    args = parser.parse_args()
    args.work.mkdir(parents=True, exist_ok=True)
    fine, coarse = args.work / "fine.nc", args.work / "coarse.nc"
    shape = tuple(args.shape)
    cells = math.prod(shape)
    try:
        seconds = write_field(fine, shape)
        print(f"field {' x '.join(map(str, shape))} = {cells:,} cells, float32, written slab by slab in "
              f"{seconds:.1f} s: {fine.stat().st_size / 2 ** 30:.2f} GB on disk", flush=True)
        inspect = measured("inspect", fine, "--memory", "2GB", "--json")
        print(f"inspect --memory 2GB: {inspect['seconds']:7.1f} s, peak {inspect['rss']:6.0f} MB resident "
              f"({inspect['pss']:.0f} MB proportional)  [{inspect['err'].splitlines()[-1]}]", flush=True)
        made = measured("coarsen", fine, "-o", coarse, "--ratio", 5, 5, 5, "--method", "flow", "--bc", "sealed",
                        "--memory", "4GB", "--quiet")
        print(f"coarsen sealed in boxes --memory 4GB: {made['seconds']:7.1f} s, peak {made['rss']:6.0f} MB resident",
              flush=True)
        window = "0:100,0:100,0:100"
        sector = measured("check", fine, coarse, "--window", window, "--memory", "2GB", "--report",
                          args.work / "sector", "--quiet")
        print(f"check --window {window} (1,000,000 cells, every check) --memory 2GB: {sector['seconds']:7.1f} s, "
              f"peak {sector['rss']:6.0f} MB resident ({sector['pss']:.0f} MB proportional)", flush=True)
        print()
        for label, run in (("inspect of the whole field", inspect), ("check --window of 1 M cells", sector)):
            verdict = "met" if run["pss"] <= 2048 else "NOT met"
            print(f"target {label}: peak {run['pss']:.0f} MB proportional, {run['rss']:.0f} MB resident "
                  f"(an upper bound) <= 2048 MB: {verdict}")
    finally:
        if not args.keep:
            shutil.rmtree(args.work, ignore_errors=True)


if __name__ == "__main__":
    main()
