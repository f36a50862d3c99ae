"""The README's two setup commands and the demo they run."""

import json
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

ROOT = Path(__file__).resolve().parents[2]


def _readme_commands():
    text = (ROOT / "README.md").read_text()
    setup = text.split("## Setup on a fresh machine", 1)[1].split("\n## ", 1)[0]
    return re.findall(r"```\n(.+?)\n```", setup)


def test_readme_gives_exactly_two_setup_commands_and_ci_runs_the_test_one():
    commands = _readme_commands()
    assert len(commands) == 2
    demo, tests = commands
    assert demo.endswith("upscale demo")
    assert "pytest" in tests
    assert tests in (ROOT / ".ci" / "run").read_text().splitlines()


def test_demo_command_runs_end_to_end(tmp_path):
    # The demo part of the README command, run as the console entry point would.
    done = subprocess.run([sys.executable, "-m", "upscale.cli", "demo", "--dir", str(tmp_path)],
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr
    coarse = xr.open_dataset(tmp_path / "fields" / "demo_coarse.nc")
    fine = xr.open_dataset(tmp_path / "fields" / "demo.nc")
    assert coarse.attrs["method"] == "flow"
    # pore volume conserved exactly (to round-off) from fine to coarse
    fine_pv = float((fine.porosity * fine.ntg * fine.dx * fine.dy * fine.dz).sum())
    assert abs(float(coarse.pore_volume.sum()) - fine_pv) <= 1e-9 * fine_pv
    static = xr.open_dataset(tmp_path / "fields" / "demo_coarse_arithmetic.nc")
    assert float(static.tz_multiplier.min()) < 0.1  # cemented streaks hidden by arithmetic kz
    assert "tz_multiplier" in coarse
    summary = (tmp_path / "reports" / "demo" / "summary.txt").read_text()
    assert "Caution" in summary and "qualified engineers" in summary
    listed = [line.split(maxsplit=1)[1] for line in done.stdout.splitlines() if line.startswith("  ")]
    assert len(listed) == 12 and all(Path(p).exists() for p in listed)
    # The demo ends with the full report and prints where it is.
    report = tmp_path / "reports" / "demo" / "index.html"
    assert done.stdout.splitlines()[-1].startswith(f"report: {report}")
    page = report.read_text()
    assert page.count("<img") >= 9 and "qualified" in page
    # the two-phase curves of the demo's own rock table, and their section in the report
    curves = xr.open_dataset(tmp_path / "fields" / "demo_curves.nc")
    assert curves.attrs["two_phase_limit"] == "capillary" and curves.sizes["saturation_point"] == 20
    assert "Two-phase curves (capillary limit)" in page and "Capillary limit: capillary equilibrium" in page
    # every fine cell of the demo's four facies is at least swc 0.12 and sor 0.18 of its rock
    # (the demo table): so is every block, a pore-volume-weighted mean of its cells
    active = curves["pore_volume"].values > 0
    assert curves["swc"].values[active].min() >= 0.12 - 1e-12 and curves["sor"].values[active].min() >= 0.18 - 1e-12
    assert "Two-phase curves (capillary limit" in summary
    # the viscous limit beside it: at F = 0 every cell is at its swc, at F = 1 at 1 - sor, so its
    # end points are the capillary limit's (every active cell of the demo has k > 0 and is entered
    # by oil); both are pore-volume-weighted sums, to round-off
    viscous = xr.open_dataset(tmp_path / "fields" / "demo_curves_viscous.nc")
    assert viscous.attrs["two_phase_limit"] == "viscous" and "Two-phase curves (viscous limit)" in page
    assert "Two-phase curves (viscous limit" in summary
    for name in ("swc", "sor"):
        np.testing.assert_allclose(viscous[name].values[active], curves[name].values[active], rtol=1e-12)
    assert np.isfinite(viscous["krw_x"].values[active]).all() and np.isfinite(viscous["kro_z"].values[active]).all()
    metrics = json.loads((tmp_path / "reports" / "demo" / "metrics.json").read_text())
    for axis in "xyz":
        g = metrics["global"][axis]
        assert g["fine_k"] > 0 and g["fine_residual"] <= 1e-10
        assert g["relative_error"] == pytest.approx((g["coarse_k"] - g["fine_k"]) / g["fine_k"])
    assert metrics["transient"]["fine"]["balance_error"] < 1e-6
    assert metrics["multipliers"]["z"]["faces"] > 0
    # How far the coarse models are from the fine one. README "## Accuracy" (benchmarks/
    # accuracy.py, the demo field, seed 7): local-global x -8.3 %, y -7.7 %, z +1.1 %;
    # sealed + multipliers -12.0 %, -12.0 %, -5.9 % (seed 8: -8.7/-7.0/+1.1 against
    # -15.8/-15.2/-0.0). So: on x and y local-global strictly closer to the fine model than
    # sealed + multipliers (its purpose: 3.7 and 4.3 points here, 7-8 on seed 8), and every
    # axis error of both below 15 % (the largest seen, 15.8 %, is seed 8's sealed x).
    assert coarse.attrs["boundary_condition"] == "global"
    comparison = metrics["comparison"]
    this = next(label for label in comparison if label.startswith("this grid"))
    assert set(comparison) == {this, "demo_coarse_sealed.nc"}
    local_global, sealed = comparison[this], comparison["demo_coarse_sealed.nc"]
    for axis in "xyz":
        assert local_global[axis] == pytest.approx(metrics["global"][axis]["relative_error"], rel=1e-9, abs=1e-12)
        assert abs(local_global[axis]) < 0.15 and abs(sealed[axis]) < 0.15, (axis, local_global, sealed)
    for axis in "xy":
        assert abs(local_global[axis]) < abs(sealed[axis]), (axis, local_global, sealed)
