"""Sector checks (``upscale check --window``) and the refusal of a model too big to check."""

import json
import subprocess

import numpy as np
import pytest

import upscale
from helpers import lognormal
from upscale.io.schema import fine_dataset
from upscale.io.sector import parse_window


def _field(shape, seed):
    k = 50.0 * lognormal(shape, 1.5, seed)
    nx, ny, nz = shape
    return fine_dataset(k, 0.7 * k, 0.1 * k, np.full(shape, 0.2), np.linspace(8, 12, nx), np.full(ny, 10.0),
                        np.random.default_rng(seed).uniform(0.5, 2.0, shape))


def test_a_sector_check_equals_the_check_of_the_sector_cut_by_hand(tmp_path, cli_command, cli_env):
    # Sealed flow-based k of a block depends on its own cells only, so the coarse grid of a
    # sector cut by hand from the fine field (xarray's own isel) equals the sector of the
    # whole coarse grid: the two checks must agree to round-off.
    fine = _field((12, 10, 6), seed=5)
    upscale.write(fine, tmp_path / "fine.nc")
    upscale.write(upscale.coarsen(fine, ratio=(2, 2, 3), method="flow"), tmp_path / "coarse.nc")
    cut = fine.isel(x=slice(4, 12), y=slice(2, 8))
    cut.attrs = {"Conventions": "CF-1.10"}
    upscale.write(cut, tmp_path / "cut.nc")
    upscale.write(upscale.coarsen(upscale.open_field(tmp_path / "cut.nc"), ratio=(2, 2, 3), method="flow"),
                  tmp_path / "cut_coarse.nc")
    runs = {}
    for name, args in (("window", ["fine.nc", "coarse.nc", "--window", "4:12,2:8,:"]),
                       ("by hand", ["cut.nc", "cut_coarse.nc"])):
        report = tmp_path / name.replace(" ", "_")
        done = subprocess.run([*cli_command, "check", *args, "--checks", "steady,diagonal,blocks", "--report",
                               str(report), "--quiet"], cwd=tmp_path, env=cli_env, capture_output=True, text=True)
        assert done.returncode == 0, done.stderr
        runs[name] = json.loads((report / "metrics.json").read_text())
    window, hand = runs["window"], runs["by hand"]
    assert window["sector"] == "x 4:12, y 2:8, z 0:6" and hand["sector"] is None
    for axis in "xyz":
        assert window["global"][axis]["fine_k"] == pytest.approx(hand["global"][axis]["fine_k"], rel=1e-9)
        assert window["global"][axis]["coarse_k"] == pytest.approx(hand["global"][axis]["coarse_k"], rel=1e-9)
    for name, d in hand["diagonal"].items():
        assert window["diagonal"][name]["relative_error"] == pytest.approx(d["relative_error"], rel=1e-7, abs=1e-12)
    assert window["coarse"]["shape"] == [4, 3, 2]


@pytest.mark.parametrize("window, message", [
    ("1:12,2:8,:", "nearest is --window 0:12,2:8,0:6"),
    ("0:12,2:8", "give X0:X1,Y0:Y1,Z0:Z1"),
    ("0:99,:,:", "must lie in 0..12"),
    ("a:4,:,:", "not whole numbers"),
])
def test_a_bad_window_is_refused_in_one_line_and_nothing_is_written(tmp_path, cli_command, cli_env, window,
                                                                      message):
    fine = _field((12, 10, 6), seed=2)
    upscale.write(fine, tmp_path / "fine.nc")
    upscale.write(upscale.coarsen(fine, ratio=(2, 2, 3), method="arithmetic"), tmp_path / "coarse.nc")
    done = subprocess.run([*cli_command, "check", "fine.nc", "coarse.nc", "--window", window, "--report", "out"],
                          cwd=tmp_path, env=cli_env, capture_output=True, text=True)
    assert done.returncode == 2
    assert message in done.stderr and len(done.stderr.strip().splitlines()) == 1
    assert not (tmp_path / "out").exists()


def test_a_model_too_big_for_the_budget_is_refused_with_a_hint(tmp_path, cli_command, cli_env):
    # 72,000 cells at about 1.3 kB each plus a process's own 300 MB exceed a 380 MB budget.
    fine = _field((60, 60, 20), seed=1)
    upscale.write(fine, tmp_path / "fine.nc")
    upscale.write(upscale.coarsen(fine, ratio=(10, 10, 10), method="arithmetic"), tmp_path / "coarse.nc")
    done = subprocess.run([*cli_command, "check", "fine.nc", "coarse.nc", "--memory", "380MB", "--report", "out"],
                          cwd=tmp_path, env=cli_env, capture_output=True, text=True)
    assert done.returncode == 2 and "--window" in done.stderr and "72,000 cells" in done.stderr
    assert not (tmp_path / "out").exists()


def test_window_bounds_may_be_left_open():
    assert parse_window(":5,2:,:", (10, 4, 3)) == (slice(0, 5), slice(2, 4), slice(0, 3))
