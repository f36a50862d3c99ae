"""``upscale.two_phase`` and ``upscale two-phase``: the curve file, in memory and in boxes.

The numbers themselves are checked against closed forms in tests/core/test_two_phase.py;
here: a run in boxes gives the in-memory answer to round-off (the boxes run the same
numerics on windows of the field), the file is a valid field for its geometry with CF
attributes, the region curves and the report are there.
"""

from __future__ import annotations

import hashlib
import re
import subprocess
import sys
import tomllib

import numpy as np
import pytest
import xarray as xr
from helpers import ROCKS

import upscale
from upscale.io.schema import fine_dataset


def field(shape=(8, 6, 6), seed=2) -> xr.Dataset:
    """Lognormal k, two facies (codes 3 'sand' and 7 named by code), ntg, a few inactive cells."""
    rng = np.random.default_rng(seed)
    k = np.exp(rng.normal(4.0, 1.2, shape))
    active = (rng.random(shape) > 0.04).astype(np.int8)
    ds = fine_dataset(k, 0.8 * k, 0.2 * k, rng.uniform(0.08, 0.3, shape), rng.uniform(5, 15, shape[0]),
                      rng.uniform(5, 15, shape[1]), rng.uniform(0.5, 2.0, shape), ntg=rng.uniform(0.5, 1.0, shape),
                      active=active)
    codes = np.where(rng.random(shape) < 0.6, 3, 7).astype(np.int8)
    codes[active == 0] = -1  # fill value in inactive cells: no rock needed there
    ds["facies"] = (("x", "y", "z"), codes, {"flag_values": np.array([3, 7], np.int8), "flag_meanings": "sand mud"})
    return ds


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    folder = tmp_path_factory.mktemp("two_phase")
    upscale.write(field(), folder / "fine.nc")
    (folder / "rocks.toml").write_text(ROCKS)
    return folder


def assert_same(expected: xr.Dataset, got: xr.Dataset) -> None:
    assert set(expected.data_vars) == set(got.data_vars)
    for name in expected.data_vars:
        a, b = expected[name].values, got[name].values
        scale = float(np.nanmax(np.abs(a))) if np.isfinite(a).any() else 0.0
        np.testing.assert_allclose(b, a, rtol=1e-12, atol=1e-12 * scale, err_msg=name)  # round-off of the solves


@pytest.mark.parametrize("options,box", [(dict(limit="capillary", border=1), (2, 1, 1)),
                                         (dict(limit="viscous", bc="periodic", regions="facies"), (1, 2, 2))])
def test_boxes_give_the_in_memory_answer(files, options, box):
    fine = upscale.open_field(files / "fine.nc")
    memory = upscale.two_phase(fine, files / "rocks.toml", ratio=(2, 2, 3), points=6, **options)
    lazy = upscale.open_field(files / "fine.nc", chunks={"x": 3})
    boxed = upscale.two_phase(lazy, files / "rocks.toml", ratio=(2, 2, 3), points=6, box=box, **options)
    assert_same(memory, boxed)
    assert np.isfinite(memory["krw_x"].values[memory["active"].values == 1]).all()


def test_rock_types_by_flag_meaning_and_by_quoted_code_reach_their_cells(tmp_path):
    # Two homogeneous blocks: facies 3, named 'sand' by its flag meaning (second in the
    # flag lists), and facies 7, a rock type given by its code as [rock."7"]. Each block must
    # give back the curves of its own rock (Corey 1954: kr = kr_max Sn^n; Brooks & Corey
    # 1964 with Leverett 1941: Pc = sigma J_entry sqrt(phi / k) Sn^(-1/lambda), k in m2,
    # 1 D = 9.869233e-13 m2, API RP 27, from memory), written out here from the table itself.
    table = tomllib.loads(ROCKS)
    sigma = table["fluids"]["interfacial_tension"]
    k = np.empty((4, 2, 2))
    k[:2], k[2:] = 150.0, 12.0
    ds = fine_dataset(k, k, 0.1 * k, np.full(k.shape, 0.2), np.full(4, 10.0), np.full(2, 10.0), np.full(2, 1.0))
    codes = np.full(k.shape, 3, np.int8)
    codes[2:] = 7
    ds["facies"] = (("x", "y", "z"), codes, {"flag_values": np.array([7, 3], np.int8), "flag_meanings": "mud sand"})
    (tmp_path / "rocks.toml").write_text(ROCKS)
    curves = upscale.two_phase(ds, tmp_path / "rocks.toml", ratio=(2, 2, 2), points=6)
    sn = np.linspace(0, 1, 6)
    for block, name, block_k in (((0, 0, 0), "sand", 150.0), ((1, 0, 0), "7", 12.0)):
        r = table["rock"][name]
        sw = r["swc"] + (1 - r["swc"] - r["sor"]) * sn
        np.testing.assert_allclose(curves["sw"].values[block], sw, rtol=1e-12)  # sums of pore volumes
        entry = sigma * r["j_entry"] * np.sqrt(0.2 / (block_k * 9.869233e-16)) / 1e5
        np.testing.assert_allclose(curves["pc"].values[block][1:], entry * sn[1:] ** (-1 / r["pore_size_index"]),
                                   rtol=1e-11)  # the powers and the root search, to round-off
        for axis in "xyz":  # the solves' relative residual of 1e-12
            np.testing.assert_allclose(curves[f"krw_{axis}"].values[block], r["krw_max"] * sn ** r["nw"],
                                       rtol=1e-11, atol=1e-15)
            np.testing.assert_allclose(curves[f"kro_{axis}"].values[block], r["kro_max"] * (1 - sn) ** r["no"],
                                       rtol=1e-11, atol=1e-15)


def test_cli_writes_a_curve_file_readable_as_a_field(files, tmp_path):
    out, report = tmp_path / "curves.nc", tmp_path / "report"
    done = subprocess.run([sys.executable, "-m", "upscale.cli", "two-phase", str(files / "fine.nc"), "--rocks",
                           str(files / "rocks.toml"), "-o", str(out), "--ratio", "4", "3", "2", "--points", "5",
                           "--regions", "facies", "--report", str(report)], capture_output=True, text=True,
                          timeout=300)
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith(f"wrote {out} (2 x 2 x 3 blocks, 5 saturation points, capillary limit)")
    geometry = upscale.open_field(out)  # its geometry is a valid field
    assert geometry.sizes["x"] == 2 and float(geometry["kx"].min()) >= 0
    curves = xr.load_dataset(out)
    for name in ("sw", "pc", "krw_x", "krw_y", "krw_z", "kro_x", "kro_y", "kro_z"):
        assert curves[name].dims == ("x", "y", "z", "saturation_point")
        assert curves[name].attrs["units"] in ("1", "bar") and curves[name].attrs["long_name"]
    assert curves["pc"].attrs["units"] == "bar"
    # the connate end of the capillary limit has no finite Pc: written as missing
    assert np.isnan(curves["pc"].values[..., 0]).all() and np.isfinite(curves["pc"].values[..., 1:]).all()
    assert curves.attrs["two_phase_limit"] == "capillary"
    assert curves.attrs["rock_table_sha256"] == hashlib.sha256((files / "rocks.toml").read_bytes()).hexdigest()
    assert curves.attrs["input_sha256"] and "qualified engineers" in curves.attrs["two_phase_caution"]
    assert sorted(curves["region_code"].values.tolist()) == [3, 7]
    assert curves["region_krw_x"].dims == ("region", "saturation_point")
    # the region's Sw: the pore-volume-weighted mean of its blocks' (blocks of one region summed by hand)
    pore = curves["pore_volume"].values
    for index, code in enumerate(curves["region_code"].values):
        mine = curves["block_region"].values == code
        expected = (pore[mine][:, None] * curves["sw"].values[mine]).sum(axis=0) / pore[mine].sum()
        np.testing.assert_allclose(curves["region_sw"].values[index], expected, rtol=1e-12)
    page = (report / "index.html").read_text()
    assert page.count("<img") == 1 and "capillary limit" in page.lower() and "qualified engineers" in page
    assert re.search(r"Rock table .*rocks\.toml", page)


def test_cli_in_boxes_gives_the_in_memory_answer(files, tmp_path):
    paths = []
    for extra in ([], ["--box", "1", "2", "1"]):
        out = tmp_path / f"curves{len(extra)}.nc"
        done = subprocess.run([sys.executable, "-m", "upscale.cli", "two-phase", str(files / "fine.nc"), "--rocks",
                               str(files / "rocks.toml"), "-o", str(out), "--ratio", "4", "3", "2", "--limit",
                               "viscous", "--points", "4", *extra], capture_output=True, text=True, timeout=300)
        assert done.returncode == 0, done.stderr
        paths.append(out)
    assert "in boxes" in done.stdout
    with xr.open_dataset(paths[0]) as memory, xr.open_dataset(paths[1]) as boxed:
        assert_same(memory.load(), boxed.load())
