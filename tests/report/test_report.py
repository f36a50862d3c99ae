"""``upscale check``: metrics.json keys and meaning, the HTML report, and a real browser."""

import json
import shutil
import subprocess
import sys

import numpy as np
import pytest
from helpers import lognormal

from upscale import write
from upscale.io.schema import fine_dataset


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    folder = tmp_path_factory.mktemp("check")
    k = lognormal((12, 10, 8), 1.0, 3) * 50.0
    k[:, :, 3] *= 1e-3  # a tight layer
    fine = fine_dataset(k, k, 0.2 * k, np.full(k.shape, 0.2), np.full(12, 10.0), np.full(10, 10.0),
                        np.linspace(0.5, 2.0, 8))
    write(fine, folder / "fine.nc")
    done = subprocess.run([sys.executable, "-m", "upscale.cli", "coarsen", str(folder / "fine.nc"), "-o",
                           str(folder / "coarse.nc"), "--ratio", "3", "2", "2", "--method", "arithmetic",
                           "--multipliers"], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    done = subprocess.run([sys.executable, "-m", "upscale.cli", "check", str(folder / "fine.nc"),
                           str(folder / "coarse.nc"), "--report", str(folder / "report")],
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr
    return folder, done.stdout


def test_metrics_keys_and_meaning(report):
    folder, stdout = report
    metrics = json.loads((folder / "report" / "metrics.json").read_text())
    for axis in "xyz":
        g = metrics["global"][axis]
        assert set(g) >= {"fine_k", "coarse_k", "relative_error"}
        assert g["relative_error"] == pytest.approx((g["coarse_k"] - g["fine_k"]) / g["fine_k"], rel=1e-9)
    # arithmetic kz across the tight layer: the coarse model is far too permeable vertically,
    # but multipliers restore the fine connectivity (the coarse file carries them)
    assert abs(metrics["global"]["z"]["relative_error"]) < 0.5
    assert len(metrics["layer_flow_share"]["x"]["fine"]) == 4
    assert sum(metrics["layer_flow_share"]["x"]["fine"]) == pytest.approx(1.0, rel=1e-9)
    assert metrics["pore_volume"]["relative_difference"] == pytest.approx(0.0, abs=1e-12)
    assert metrics["blocks"]["z"]["methods"]["arithmetic"]["flagged_blocks"] > 0
    assert metrics["multipliers"]["z"]["below"] > 0
    assert metrics["coarse"]["input_matches_fine"] is True
    assert metrics["transient"]["final_cumulative_relative_error"] is not None


def test_html_is_self_contained(report):
    folder, _ = report
    page = (folder / "report" / "index.html").read_text()
    assert page.count("<img") >= 8 and page.count("data:image/png;base64,") == page.count("<img")
    assert "src='http" not in page and "href=" not in page
    assert "qualified engineers" in page and "licensed professional practice" in page
    assert "SHA-256" in page


def test_report_renders_in_a_headless_browser(report, tmp_path):
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        pytest.skip("no Chromium on this machine (CI installs Debian's chromium package)")
    folder, _ = report
    shot = tmp_path / "page.png"
    flags = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             f"--user-data-dir={tmp_path / 'profile'}"]
    url = (folder / "report" / "index.html").as_uri()
    dom = subprocess.run([browser, *flags, "--dump-dom", url], capture_output=True, text=True, timeout=120)
    assert "upscale check report" in dom.stdout
    subprocess.run([browser, *flags, "--window-size=1200,3000", f"--screenshot={shot}", url],
                   capture_output=True, timeout=120)
    from matplotlib.image import imread

    pixels = imread(shot)[..., :3]
    colours = np.unique((pixels.reshape(-1, 3) * 255).astype(np.uint8), axis=0)
    assert len(colours) > 500  # rendered figures, not just text on white


@pytest.mark.parametrize("option, words", [
    (("--steps-per-doubling", "3"), "steps per doubling"),
    (("--compressibility", "-1"), "compressibility"),
    (("--viscosity", "0"), "viscosity"),
    (("--face", "w-"), "face"),
    (("--drainage", "well", "--well-column", "99", "0"), "well column"),
])
def test_check_refuses_bad_transient_options_before_solving(report, option, words):
    folder, _ = report
    out = folder / f"refused{option[1]}"
    done = subprocess.run([sys.executable, "-m", "upscale.cli", "check", str(folder / "fine.nc"),
                           str(folder / "coarse.nc"), "--report", str(out), *option],
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 2
    last = done.stderr.strip().splitlines()[-1]
    assert last.startswith("upscale: error:") and words in last
    assert "whole-model" not in done.stdout  # nothing solved or printed before the refusal
    assert not out.exists()
