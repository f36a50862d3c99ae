"""``upscale check``: metrics.json keys and meaning, the HTML report, and a real browser."""

import base64
import html
import io
import json
import os
import re
import shutil
import subprocess
import sys

import numpy as np
import pytest
import xarray as xr
from flow_reference import sealed_permeability
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
    # The fine model's k against an independent SciPy solve (tests/flow_reference.py; the
    # check's solver stops at a relative residual of 1e-10: 1e-8).
    fine = xr.load_dataset(folder / "fine.nc")
    k = (fine["kx"].values, fine["ky"].values, fine["kz"].values)
    sizes = (fine["dx"].values, fine["dy"].values, fine["dz"].values)
    for axis, name in enumerate("xyz"):
        assert metrics["global"][name]["fine_k"] == pytest.approx(sealed_permeability(k, *sizes, axis), rel=1e-8)
    # Across the tight layer (1e-3 of its neighbours) the arithmetic kz alone makes the
    # coarse model about 100 x too permeable; the multipliers restore the fine vertical
    # connectivity. The bound: the Cardwell-Parsons bounds of the whole fine model along z
    # (Cardwell & Parsons 1945; computed here: columns of cells in series side by side,
    # layers side by side in series; uniform dx, dy), 0.1292 and 0.1333 mD. The fine k lies
    # between them (any arrangement of the flow between no lateral flow and perfect lateral
    # mixing), and so must a coarse model that keeps the fine connectivity: its error is
    # then at most their 3.2 % gap (measured: +0.47 %).
    dz = np.broadcast_to(sizes[2], k[2].shape)
    lower = np.mean(dz.sum(axis=2) / np.sum(dz / k[2], axis=2))
    upper = dz[0, 0].sum() / np.sum(dz[0, 0] / k[2].mean(axis=(0, 1)))
    z = metrics["global"]["z"]
    assert lower <= z["fine_k"] * (1 + 1e-8) and z["fine_k"] <= upper * (1 + 1e-8)
    assert lower <= z["coarse_k"] <= upper
    assert abs(z["relative_error"]) <= (upper - lower) / lower < 0.04
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


# Written into a copy of the page: when the page has loaded, each <img>'s content box in
# page coordinates, its decoded size and whether it decoded, and the page height, as
# attributes of <body> (no change to the layout).
BOX_SCRIPT = """<script>
window.addEventListener('load', function () {
  var boxes = Array.from(document.images).map(function (img) {
    var r = img.getBoundingClientRect();
    return {x: r.left + img.clientLeft + window.scrollX, y: r.top + img.clientTop + window.scrollY,
            width: img.clientWidth, height: img.clientHeight,
            natural: [img.naturalWidth, img.naturalHeight], complete: img.complete};
  });
  document.body.setAttribute('data-boxes', JSON.stringify(boxes));
  document.body.setAttribute('data-height', String(document.documentElement.scrollHeight));
});
</script>"""


def _browser() -> str:
    """Chromium's path; a skip without one, but a failure under CI (CI=true), where
    .ci/run installs Debian's chromium."""
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail("no Chromium under CI: .ci/run installs Debian's chromium package")
        pytest.skip("no Chromium on this machine (CI installs Debian's chromium package)")
    return browser


def _run_browser(browser, profile, *args, url):
    """One headless Chromium run with a fresh profile; its exit code must be 0."""
    flags = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
             "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-quic",
             "--hide-scrollbars", "--force-device-scale-factor=1", f"--user-data-dir={profile}"]
    done = subprocess.run([browser, *flags, *args, url], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    return done


def _laid_out(dom: str) -> tuple[list, int]:
    """The boxes and page height the script wrote into the DOM the browser dumped."""
    found = re.search(r'data-boxes="([^"]*)"', dom)
    height = re.search(r'data-height="(\d+)"', dom)
    assert found and height, "the page's load handler did not run in the browser"
    return json.loads(html.unescape(found.group(1))), int(height.group(1))


def _block_means(pixels: np.ndarray, n: int = 4) -> np.ndarray:
    h, w = pixels.shape[0] // n * n, pixels.shape[1] // n * n
    return pixels[:h, :w].reshape(h // n, n, w // n, n, -1).mean(axis=(1, 3))


def _drawn(figure, box) -> np.ndarray:
    """4 x 4 pixel means of ``figure`` (a PIL image) drawn at the size of ``box``."""
    from PIL import Image

    size = (int(box["width"]), int(box["height"]))
    resized = figure.resize(size, Image.BILINEAR) if figure.size != size else figure
    return _block_means(np.asarray(resized, dtype=float) / 255)


def _crops(shot: np.ndarray, box: dict) -> list[np.ndarray]:
    """4 x 4 pixel means of the screenshot inside ``box``, at the nine placements within a
    pixel of its corner (boxes start at fractional positions)."""
    width, height = int(box["width"]), int(box["height"])
    out = []
    for dy in (-1, 0, 1):
        for dx in (-1, 0, 1):
            x, y = int(np.floor(box["x"])) + dx, int(np.floor(box["y"])) + dy
            crop = shot[max(y, 0):y + height, max(x, 0):x + width]
            if crop.shape[:2] == (height, width):
                out.append(_block_means(crop))
    return out


def _likeness(crops: list[np.ndarray], drawn: np.ndarray) -> float:
    """The best correlation of a figure drawn at the box's size with the screenshot there,
    over 4 x 4 pixel means (the browser's and PIL's resampling filters differ for scaled
    figures)."""
    return max(float(np.corrcoef(crop.ravel(), drawn.ravel())[0, 1]) for crop in crops)


def test_report_renders_in_a_headless_browser(report, tmp_path):
    # Each figure embedded in the page (base64 PNG) is decoded here with Pillow and must
    # appear, decoded by the browser, inside its <img> box on a screenshot of the page:
    # boxes from the browser itself (a load handler in a copy of the page writes them into
    # the DOM, read back with --dump-dom), pixels from --screenshot of the same page at the
    # same width. Thresholds: a correlation of 0.95 over 4 x 4 pixel means, and a mean
    # absolute difference of those below 0.03 (of full scale). Measured: 1.000 and 0 for
    # figures shown at their own size (the pixels are identical), 0.994 and 0.999, 0.004 and
    # 0.001 for the two scaled down to the page width; any figure against another's box at
    # most 0.34 (checked below: the comparison tells the figures apart).
    from PIL import Image

    browser = _browser()
    folder, _ = report
    page = (folder / "report" / "index.html").read_text()
    encoded = re.findall(r"<img[^>]*\ssrc='data:image/png;base64,([A-Za-z0-9+/=]+)'", page)
    assert len(encoded) == page.count("<img") >= 8
    figures = [Image.open(io.BytesIO(base64.b64decode(data))).convert("RGB") for data in encoded]
    for figure in figures:   # real figures, not blank images
        rgb = np.asarray(figure, dtype=np.int32)
        assert rgb.std() > 0.05 * 255 and np.unique(rgb[..., 0] << 16 | rgb[..., 1] << 8 | rgb[..., 2]).size > 50
    probe = folder / "report" / "probe.html"
    probe.write_text(page.replace("</body>", BOX_SCRIPT + "</body>"))
    url = probe.as_uri()
    _, height = _laid_out(_run_browser(browser, tmp_path / "p1", "--window-size=1200,1000", "--dump-dom",
                                       url=url).stdout)
    size = f"--window-size=1200,{height}"
    boxes, _ = _laid_out(_run_browser(browser, tmp_path / "p2", size, "--dump-dom", url=url).stdout)
    shot_path = tmp_path / "page.png"
    _run_browser(browser, tmp_path / "p3", size, f"--screenshot={shot_path}", url=url)
    assert shot_path.exists()
    shot = np.asarray(Image.open(shot_path).convert("RGB"), dtype=float) / 255
    assert shot.shape[:2] == (height, 1200)
    assert len(boxes) == len(figures)
    for i, (box, figure) in enumerate(zip(boxes, figures)):
        assert box["complete"] and box["natural"] == list(figure.size), (i, box)   # decoded by the browser
        assert box["width"] > 100 and box["y"] + box["height"] <= height, (i, box)
        crops = _crops(shot, box)
        drawn = _drawn(figure, box)
        assert _likeness(crops, drawn) > 0.95, i
        best = max(crops, key=lambda crop: _likeness([crop], drawn))
        assert np.abs(best - drawn).mean() < 0.03, i   # and not faded or tinted (a correlation would not see it)
        # control: no other figure fits this box
        assert max(_likeness([best], _drawn(other, box)) for j, other in enumerate(figures) if j != i) < 0.6, i


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
