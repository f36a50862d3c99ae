"""Large models in bounded memory: the targets of the chunked path, through the CLI.

    python benchmarks/large_models.py [--work DIR] [--skip-100m]

1. makes seeded lognormal fields of 1 M (100^3), 8 M (200^3) and 100 M (500 x 500 x 400)
   cells with ``upscale make-field lognormal --in-chunks``;
2. coarsens the 8 M field through ``upscale coarsen --ratio 5 5 5`` (flow, sealed) with
   ``--memory 800MB`` (target: the whole process tree stays under 800 MB);
3. coarsens the 100 M field the same way with ``--memory 4GB`` (target: under 4 GB) and
   the 1 M field with the same options, and compares the cells per second (target: the
   100 M throughput within 1.5 x of the 1 M one).

Memory is the peak over time of the summed resident memory of the command and all its
child processes, sampled every 0.1 s from /proc. Times are wall-clock on this machine,
each command run once; the throughput ratio compares two runs made one after the other.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

UPSCALE = [sys.executable, "-m", "upscale.cli"]


def process_tree(root: int) -> set[int]:
    """``root`` and all its descendants, from /proc."""
    parents = {}
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            with open(f"/proc/{entry}/stat") as handle:
                parents[int(entry)] = int(handle.read().rsplit(")", 1)[1].split()[1])
        except (OSError, IndexError, ValueError):
            continue
    tree, grew = {root}, True
    while grew:
        grew = False
        for pid, parent in parents.items():
            if parent in tree and pid not in tree:
                tree.add(pid)
                grew = True
    return tree


def _tree_rss_mb(root: int) -> float:
    """Summed resident memory (MB) of ``root`` and all its descendants, from /proc."""
    total = 0
    for pid in process_tree(root):
        try:
            with open(f"/proc/{pid}/stat") as handle:
                total += int(handle.read().rsplit(")", 1)[1].split()[21]) * os.sysconf("SC_PAGE_SIZE")
        except (OSError, IndexError, ValueError):
            continue
    return total / 2 ** 20


def measured(*args) -> dict:
    """Run an upscale command; wall time (s) and peak memory of its process tree (MB)."""
    start = time.perf_counter()
    process = subprocess.Popen([*UPSCALE, *map(str, args), "--quiet"], stdout=subprocess.PIPE,
                               stderr=subprocess.PIPE, text=True)
    peak = [0.0]

    def sample():
        while process.poll() is None:
            peak[0] = max(peak[0], _tree_rss_mb(process.pid))
            time.sleep(0.1)

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    stdout, stderr = process.communicate()
    sampler.join()
    seconds = time.perf_counter() - start
    if process.returncode != 0:
        raise SystemExit(f"upscale {' '.join(map(str, args))} failed:\n{stderr}")
    return {"seconds": seconds, "peak_mb": peak[0], "out": stdout.strip()}


def make(path: Path, shape, memory: str) -> dict:
    if path.exists():
        return {"seconds": float("nan"), "peak_mb": float("nan"), "out": f"(kept {path})"}
    return measured("make-field", "lognormal", "--in-chunks", "--memory", memory, "-o", path,
                    "--shape", *shape, "--seed", 1)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--work", type=Path, default=Path(tempfile.gettempdir()) / "upscale-large",
                        help="folder for the fields (about 5 GB with the 100 M field)")
    parser.add_argument("--skip-100m", action="store_true", help="only the 1 M and 8 M cases")
    args = parser.parse_args()
    args.work.mkdir(parents=True, exist_ok=True)
    cases = [("1M", (100, 100, 100), "4GB"), ("8M", (200, 200, 200), "800MB")]
    if not args.skip_100m:
        cases.append(("100M", (500, 500, 400), "4GB"))
    rows = {}
    for label, shape, memory in cases:
        fine = args.work / f"lognormal_{label}.nc"
        made = make(fine, shape, memory)
        cells = shape[0] * shape[1] * shape[2]
        run = measured("coarsen", fine, "-o", args.work / f"coarse_{label}.nc", "--ratio", 5, 5, 5,
                       "--method", "flow", "--bc", "sealed", "--memory", memory)
        rows[label] = dict(cells=cells, memory=memory, made=made, run=run)
        print(f"{label:>5} cells {cells:>11,}  make-field {made['seconds']:6.1f} s, peak {made['peak_mb']:6.0f} MB | "
              f"coarsen sealed --memory {memory:>5}: {run['seconds']:7.1f} s, peak {run['peak_mb']:6.0f} MB, "
              f"{cells / run['seconds'] / 1e6:5.2f} M cells/s  [{run['out'].split('(')[-1].rstrip(')')}]",
              flush=True)
    print()
    budget = {"800MB": 800, "4GB": 4096}
    for label, row in rows.items():
        verdict = "met" if row["run"]["peak_mb"] <= budget[row["memory"]] else "NOT met"
        print(f"target {label}: process tree peak {row['run']['peak_mb']:.0f} MB <= {row['memory']}: {verdict}")
    if "100M" in rows:
        per_cell = {k: rows[k]["run"]["seconds"] / rows[k]["cells"] for k in rows}
        ratio = per_cell["100M"] / per_cell["1M"]
        print(f"target throughput: time per cell 100M / 1M = {ratio:.2f} (<= 1.5: {'met' if ratio <= 1.5 else 'NOT met'}); "
              f"100M / 8M = {per_cell['100M'] / per_cell['8M']:.2f} (the 1 M run carries the start-up, "
              f"about 2-3 s, the 8 M one does not much)")


if __name__ == "__main__":
    main()
