"""Compare the outputs of two ``upscale demo`` runs: are the fields and metrics identical?

    python tools/compare_runs.py BEFORE_DIR AFTER_DIR [--tolerance 0]

For a change meant to leave behaviour alone (a redesign, a speed-up): run the demo before
and after into two folders and compare. Every variable of every NetCDF file under
``fields/`` must agree (exactly by default, or to a relative ``--tolerance``), and so
must every number and text of ``reports/demo/metrics.json``, except what names the run
itself: creation times, paths, the coarse file's checksum (its creation time is inside)
and solver iteration counts when a tolerance is given. Exit code 0 when identical, 1 when
not, with the differences listed.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path

import numpy as np
import xarray as xr

RUN_ATTRIBUTES = {"created", "input_file", "source_path"}
RUN_KEYS = {"path", "created"}


def differences_in_file(a: Path, b: Path, tolerance: float) -> list[str]:
    out = []
    with xr.open_dataset(a) as da, xr.open_dataset(b) as db:
        if set(da.variables) != set(db.variables):
            out.append(f"{a.name}: variables differ: {sorted(set(da.variables) ^ set(db.variables))}")
        for name in sorted(set(da.variables) & set(db.variables)):
            x, y = da[name].values, db[name].values
            if x.shape != y.shape:
                out.append(f"{a.name}:{name}: shapes {x.shape} and {y.shape}")
            elif x.dtype.kind in "fc" and not np.allclose(x, y, rtol=tolerance, atol=0.0, equal_nan=True):
                worst = np.nanmax(np.abs(x - y) / np.maximum(np.abs(x), np.finfo(float).tiny))
                out.append(f"{a.name}:{name}: values differ (largest relative difference {worst:.3g})")
            elif x.dtype.kind not in "fc" and not np.array_equal(x, y):
                out.append(f"{a.name}:{name}: values differ")
        for key in sorted((set(da.attrs) | set(db.attrs)) - RUN_ATTRIBUTES):
            if str(da.attrs.get(key)) != str(db.attrs.get(key)):
                out.append(f"{a.name}: attribute {key}: {da.attrs.get(key)!r} != {db.attrs.get(key)!r}")
    return out


def differences_in_json(a, b, tolerance: float, where: str = "metrics") -> list[str]:
    if isinstance(a, dict) and isinstance(b, dict):
        out = [f"{where}: keys differ: {sorted(set(a) ^ set(b))}"] if set(a) != set(b) else []
        for key in sorted(set(a) & set(b)):
            if key in RUN_KEYS or (where.endswith("coarse") and key == "sha256"):
                continue
            if tolerance and key in ("iterations", "factorisations"):
                continue
            out += differences_in_json(a[key], b[key], tolerance, f"{where}.{key}")
        return out
    if isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            return [f"{where}: lengths {len(a)} and {len(b)}"]
        return [d for i, (x, y) in enumerate(zip(a, b)) for d in differences_in_json(x, y, tolerance, f"{where}[{i}]")]
    if isinstance(a, float) and isinstance(b, float):
        same = a == b or math.isclose(a, b, rel_tol=tolerance, abs_tol=0.0)
        return [] if same else [f"{where}: {a!r} != {b!r}"]
    return [] if a == b else [f"{where}: {a!r} != {b!r}"]


def compare(before: Path, after: Path, tolerance: float = 0.0) -> list[str]:
    out = []
    files = sorted(p.relative_to(before) for p in (before / "fields").glob("*.nc"))
    if not files:
        out.append(f"{before}/fields holds no NetCDF file")
    for name in files:
        if not (after / name).exists():
            out.append(f"{after / name}: missing")
            continue
        out += differences_in_file(before / name, after / name, tolerance)
    metrics = Path("reports/demo/metrics.json")
    out += differences_in_json(json.loads((before / metrics).read_text()), json.loads((after / metrics).read_text()),
                               tolerance)
    return out


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("before", type=Path)
    parser.add_argument("after", type=Path)
    parser.add_argument("--tolerance", type=float, default=0.0, help="relative tolerance on numbers (default exact)")
    args = parser.parse_args()
    found = compare(args.before, args.after, args.tolerance)
    print("\n".join(found) if found else "identical: every field variable and every metric")
    return 1 if found else 0


if __name__ == "__main__":
    sys.exit(main())
