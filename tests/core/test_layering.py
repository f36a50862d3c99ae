"""Tests of upscale.layering: layer statistics, judging groupings, the exact optimal grouping."""

import itertools
import os

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from upscale.core.grid import GridArrays
from upscale.checks.layering import field_layer_statistics
from upscale.core.layering import (
    compare_groupings,
    judge_grouping,
    layer_statistics,
    optimal_grouping,
    uniform_grouping,
)
from upscale.errors import InputError
from upscale.io.schema import arrays, fine_dataset
from upscale.io.validation import validate
from upscale.report.figures import plot_layer_profile
from upscale.report.text import format_comparison

FAST = settings(max_examples=60, deadline=None)


def make_cells(lnk, dz, dx=None, dy=None, ntg=None, active=None, kz_factor=0.1):
    """GridArrays of a field with kx = ky = exp(lnk), kz = kz_factor * kx; dz (nz,) or 3-D."""
    lnk = np.asarray(lnk, dtype=float)
    nx, ny, _ = lnk.shape
    k = np.exp(lnk)
    dx = np.ones(nx) if dx is None else dx
    dy = np.ones(ny) if dy is None else dy
    ds = fine_dataset(k, k.copy(), kz_factor * k, np.full(k.shape, 0.2), dx, dy, dz,
                            ntg=ntg, active=active)
    return arrays(validate(ds))


def random_cells(seed, nx=3, ny=4, nz=7, holes=True):
    """A field with lateral and vertical variation, uneven cells, and (optionally) pinched,
    inactive and zero-ntg cells."""
    rng = np.random.default_rng(seed)
    lnk = rng.normal(2.0, 1.5, nz)[None, None, :] + rng.normal(0.0, 0.6, (nx, ny, nz))
    dz = rng.uniform(0.2, 3.0, (nx, ny, nz))
    ntg = rng.uniform(0.3, 1.0, (nx, ny, nz))
    active = np.ones((nx, ny, nz), dtype=int)
    if holes:
        dz[rng.random(dz.shape) < 0.1] = 0.0
        active[rng.random(dz.shape) < 0.1] = 0
        ntg[rng.random(dz.shape) < 0.1] = 0.0
        active[0, 0, 0], dz[0, 0, 0], ntg[0, 0, 0] = 1, 1.0, 0.8  # keep one valid cell
    return make_cells(lnk, dz, rng.uniform(5, 50, nx), rng.uniform(5, 50, ny), ntg=ntg, active=active)


def objective_from_layers(w, m, v, edges):
    """Within-group sum of squares from per-layer moments by the law of total variance:
    sum over layers w * (v + (m - group mean)^2), written independently of the module."""
    total = 0.0
    for a, b in zip(edges[:-1], edges[1:]):
        ws, ms, vs = w[a:b], m[a:b], v[a:b]
        if ws.sum() == 0:
            continue
        mean = np.sum(ws * ms) / ws.sum()
        total += float(np.sum(ws * (vs + (ms - mean) ** 2)))
    return total


def all_groupings(nz, n_groups):
    for cuts in itertools.combinations(range(1, nz), n_groups - 1):
        yield [0, *cuts, nz]


# ---------------------------------------------------------------------------------------------
# the dynamic programme against brute force


layer = st.tuples(st.one_of(st.just(0.0), st.floats(0.01, 100.0)),  # weight, may be 0
                  st.floats(-6.0, 9.0),  # mean ln k
                  st.floats(0.0, 3.0))  # variance of ln k


@FAST
@given(st.lists(layer, min_size=1, max_size=9), st.integers(1, 4))
def test_optimal_equals_brute_force(layers, n_groups):
    w, m, v = (np.array(column) for column in zip(*layers))
    assume(n_groups <= np.count_nonzero(w > 0))
    nz = w.size
    stats = {"weight": w, "lnk_mean": np.where(w > 0, m, np.nan), "lnk_var": np.where(w > 0, v, np.nan)}
    edges = optimal_grouping(stats, n_groups)
    assert edges[0] == 0 and edges[-1] == nz and len(edges) == n_groups + 1
    assert all(b > a and w[a:b].sum() > 0 for a, b in zip(edges[:-1], edges[1:]))
    best = min(objective_from_layers(w, m, v, e) for e in all_groupings(nz, n_groups)
               if all(w[a:b].sum() > 0 for a, b in zip(e[:-1], e[1:])))
    scale = float(np.sum(w * (v + m**2))) + 1.0
    assert objective_from_layers(w, m, v, edges) == pytest.approx(best, abs=1e-9 * scale)


@FAST
@given(st.integers(0, 10_000), st.integers(1, 4))
def test_optimal_grouping_of_a_field_is_the_best_judged(seed, n_groups):
    cells = random_cells(seed, nz=6)
    stats = layer_statistics(cells)
    n_groups = min(n_groups, int(np.count_nonzero(stats["weight"] > 0)))
    edges = optimal_grouping(stats, n_groups)
    found = judge_grouping(stats, edges)
    allowed = [e for e in all_groupings(6, n_groups)
               if all(stats["weight"][a:b].sum() > 0 for a, b in zip(e[:-1], e[1:]))]
    best = max(judge_grouping(stats, e)["variance_kept"] for e in allowed)
    assert found["variance_kept"] == pytest.approx(best, abs=1e-10)


# ---------------------------------------------------------------------------------------------
# recovering known layering


@FAST
@given(st.lists(st.integers(1, 6), min_size=3, max_size=3), st.permutations([0.0, 2.0, 4.0]),
       st.integers(0, 10_000))
def test_known_groups_are_recovered(sizes, levels, seed):
    rng = np.random.default_rng(seed)
    nz = sum(sizes)
    truth = [0, *np.cumsum(sizes).tolist()]
    per_layer = np.repeat(np.array(levels) + 1.0, sizes)
    nx, ny = 4, 3
    lnk = per_layer[None, None, :] + rng.normal(0.0, 0.05, (nx, ny, nz))
    cells = make_cells(lnk, rng.uniform(0.5, 2.0, nz), rng.uniform(10, 30, nx), rng.uniform(10, 30, ny))
    stats = layer_statistics(cells)
    assert optimal_grouping(stats, 3) == truth
    result = compare_groupings(cells, 3)
    assert result["optimal"]["edges"] == truth
    kept_true = result["optimal"]["variance_kept"]
    assert kept_true > 0.99
    if uniform_grouping(nz, 3) != truth:
        assert result["uniform"]["variance_kept"] < kept_true - 1e-6


# ---------------------------------------------------------------------------------------------
# judging


@FAST
@given(st.integers(0, 10_000), st.integers(2, 8))
def test_variance_kept_for_layer_only_variation(seed, nz):
    rng = np.random.default_rng(seed)
    per_layer = rng.normal(3.0, 2.0, nz)
    assume(np.ptp(per_layer) > 1e-3)
    lnk = np.broadcast_to(per_layer, (3, 2, nz))
    cells = make_cells(lnk, rng.uniform(0.3, 2.0, (3, 2, nz)), rng.uniform(1, 9, 3), rng.uniform(1, 9, 2))
    stats = layer_statistics(cells)
    each = judge_grouping(stats, list(range(nz + 1)))
    assert each["variance_kept"] == pytest.approx(1.0, abs=1e-12)
    assert each["variance_ceiling"] == pytest.approx(1.0, abs=1e-12)
    np.testing.assert_allclose(each["within_group_std"], 0.0, atol=1e-6)
    single = judge_grouping(stats, [0, nz])
    assert single["variance_kept"] == pytest.approx(0.0, abs=1e-12)
    assert single["within_group_std"][0] > 0


def direct_judgement(cells, edges):
    """variance_kept and per-group std straight from the cells (no layer statistics)."""
    kh = cells.kx * cells.ntg
    valid = cells.active & (kh > 0)
    w = np.where(valid, cells.bulk_volume, 0.0)
    lnk = np.log(np.where(valid, kh, 1.0))
    mean = np.sum(w * lnk) / w.sum()
    total = np.sum(w * (lnk - mean) ** 2)
    within, stds = 0.0, []
    for a, b in zip(edges[:-1], edges[1:]):
        wg, lg = w[:, :, a:b], lnk[:, :, a:b]
        if wg.sum() == 0:
            stds.append(np.nan)
            continue
        mg = np.sum(wg * lg) / wg.sum()
        part = np.sum(wg * (lg - mg) ** 2)
        within += part
        stds.append(np.sqrt(part / wg.sum()))
    return 1.0 - within / total, np.array(stds), within


@FAST
@given(st.integers(0, 10_000), st.sets(st.integers(1, 6), max_size=5))
def test_judge_matches_cell_level_variance(seed, cuts):
    cells = random_cells(seed, nz=7)
    edges = [0, *sorted(cuts), 7]
    result = judge_grouping(layer_statistics(cells), edges)
    kept, stds, within = direct_judgement(cells, edges)
    assert result["variance_kept"] == pytest.approx(kept, abs=1e-10)
    assert result["within_sum"] == pytest.approx(within, rel=1e-9)
    np.testing.assert_allclose(result["within_group_std"], stds, rtol=1e-9, atol=1e-12)
    finite = np.isfinite(stds)
    if finite.any():
        assert result["worst_group"] == int(np.nanargmax(stds))


@FAST
@given(st.integers(0, 10_000), st.floats(1e-4, 1e4), st.sets(st.integers(1, 6), max_size=5))
def test_variance_kept_is_blind_to_scaling_k(seed, factor, cuts):
    cells = random_cells(seed, nz=7)
    scaled = GridArrays(**{**cells.__dict__, "kx": cells.kx * factor, "ky": cells.ky * factor,
                                 "kz": cells.kz * factor})
    edges = [0, *sorted(cuts), 7]
    plain, times = (judge_grouping(layer_statistics(c), edges) for c in (cells, scaled))
    assert times["variance_kept"] == pytest.approx(plain["variance_kept"], abs=1e-10)
    np.testing.assert_allclose(times["within_group_std"], plain["within_group_std"], rtol=1e-8, atol=1e-12)
    np.testing.assert_allclose(times["kz_ratio"], plain["kz_ratio"], rtol=1e-9)
    n = min(3, int(np.count_nonzero(layer_statistics(cells)["weight"] > 0)))
    best = [judge_grouping(layer_statistics(c), optimal_grouping(layer_statistics(c), n)) for c in (cells, scaled)]
    assert best[1]["variance_kept"] == pytest.approx(best[0]["variance_kept"], abs=1e-10)


@FAST
@given(st.lists(st.tuples(st.floats(0.2, 5.0), st.floats(-3.0, 6.0)), min_size=1, max_size=6))
def test_kz_ratio_is_series_over_arithmetic(layers):
    h, lnkz = (np.array(c) for c in zip(*layers))
    nz = h.size
    cells = make_cells(np.broadcast_to(lnkz, (2, 2, nz)), h, kz_factor=1.0)
    result = judge_grouping(layer_statistics(cells), [0, nz])
    kz = np.exp(lnkz)
    expected = (h.sum() / np.sum(h / kz)) / (np.sum(h * kz) / h.sum())
    assert result["kz_ratio"][0] == pytest.approx(expected, rel=1e-9)
    assert result["kz_ratio"][0] <= 1.0 + 1e-12


def test_front_speedup_and_uniform_field():
    # two layers, same thickness and porosity, kh 10 and 100 mD: the coarse layer moves at
    # the mean speed (55), the fast fine layer at 100
    cells = make_cells(np.log(np.broadcast_to([10.0, 100.0], (2, 2, 2))), np.array([1.0, 1.0]))
    result = judge_grouping(layer_statistics(cells), [0, 2])
    assert result["front_speedup"][0] == pytest.approx(100.0 / 55.0)
    assert judge_grouping(layer_statistics(cells), [0, 1, 2])["front_speedup"] == pytest.approx([1.0, 1.0])
    # a uniform field has no variance: nothing is lost by any grouping (uneven cells, so the
    # weighted means carry rounding, which must not count as variance)
    rng = np.random.default_rng(5)
    uniform = layer_statistics(make_cells(np.full((3, 4, 4), np.log(37.3)), rng.uniform(0.1, 3.0, (3, 4, 4)),
                                          rng.uniform(1, 30, 3), rng.uniform(1, 30, 4)))
    for edges in ([0, 4], [0, 1, 4], [0, 1, 2, 3, 4]):
        result = judge_grouping(uniform, edges)
        assert result["variance_kept"] == 1.0 and result["variance_ceiling"] == 1.0
        np.testing.assert_allclose(result["within_group_std"], 0.0, atol=1e-7)


def test_layer_statistics_by_hand():
    # two columns side by side in each of two layers; second layer: one cell has ntg 0
    lnk = np.log(np.array([[[10.0, 100.0]], [[40.0, 100.0]]]))  # shape (2, 1, 2)
    ntg = np.array([[[1.0, 1.0]], [[1.0, 0.0]]])
    cells = make_cells(lnk, np.array([2.0, 1.0]), dx=np.array([1.0, 3.0]), dy=np.array([2.0]), ntg=ntg)
    stats = layer_statistics(cells)
    # layer 0: bulk 1*2*2 = 4 and 3*2*2 = 12
    mean0 = (4 * np.log(10) + 12 * np.log(40)) / 16
    assert stats["bulk_volume"] == pytest.approx([16.0, 8.0])
    assert stats["weight"] == pytest.approx([16.0, 2.0])
    assert stats["thickness"] == pytest.approx([2.0, 1.0])
    assert stats["lnk_mean"] == pytest.approx([mean0, np.log(100)])
    assert stats["lnk_var"][0] == pytest.approx((4 * (np.log(10) - mean0) ** 2 + 12 * (np.log(40) - mean0) ** 2) / 16)
    assert stats["kh_mean"] == pytest.approx([(4 * 10 + 12 * 40) / 16, (2 * 100 + 0) / 8])
    assert stats["kz_harmonic"] == pytest.approx([16 / (4 / 1.0 + 12 / 4.0), 8 / (2 / 10.0 + 6 / 10.0)])
    cap = np.array([(10 * 2 * 2 * 1 + 40 * 2 * 2 * 3) / 4, (100 * 2 * 1 * 1 + 0) / 4])
    assert stats["capacity_x"] == pytest.approx(cap)
    assert stats["flow_share_x"] == pytest.approx(cap / cap.sum())


# ---------------------------------------------------------------------------------------------
# bad input, uniform grouping


def test_bad_number_of_groups():
    rng = np.random.default_rng(1)
    lnk = rng.normal(2.0, 1.0, (2, 2, 5))
    dz = np.array([1.0, 0.0, 1.0, 0.0, 1.0])  # two pinched layers: three layers carry weight
    stats = layer_statistics(make_cells(lnk, dz))
    for bad in (0, -1, 4, 6, 2.5, True, "2"):
        with pytest.raises(InputError):
            optimal_grouping(stats, bad)
    edges = optimal_grouping(stats, 3)
    assert all(stats["weight"][a:b].sum() > 0 for a, b in zip(edges[:-1], edges[1:]))
    with pytest.raises(InputError):
        optimal_grouping(stats, 2, objective="something else")
    for bad in (0, 6):
        with pytest.raises(InputError):
            uniform_grouping(5, bad)
    for bad_edges in ([0, 5, 5], [1, 5], [0, 3], [0, 3, 2, 5], [0, 2.5, 5], [5]):
        with pytest.raises(InputError):
            judge_grouping(stats, bad_edges)


@given(st.integers(1, 300), st.integers(1, 300))
def test_uniform_grouping_is_as_even_as_possible(nz, n_groups):
    assume(n_groups <= nz)
    edges = uniform_grouping(nz, n_groups)
    sizes = np.diff(edges)
    assert edges[0] == 0 and edges[-1] == nz and sizes.size == n_groups
    assert sizes.min() >= 1 and sizes.max() - sizes.min() <= 1


# ---------------------------------------------------------------------------------------------
# output


def test_comparison_table_shows_every_grouping():
    cells = random_cells(7, nz=7)
    result = compare_groupings(cells, 3, edges=[0, 1, 7])
    assert set(result) == {"optimal", "uniform", "given"}
    assert result["given"]["n_groups"] == 2
    text = format_comparison(result)
    header = text.splitlines()[0].split()
    assert header == ["grouping", "optimal", "uniform", "given"]
    kept_row = next(line for line in text.splitlines() if line.startswith("variance of ln kh kept"))
    assert kept_row.split()[-3:] == [f"{result[n]['variance_kept']:.3f}" for n in ("optimal", "uniform", "given")]
    assert f"given: edges {result['given']['edges']}" in text


def test_plot_writes_png_and_no_temporary_file(tmp_path):
    cells = random_cells(3, nz=7)
    stats = layer_statistics(cells)
    target = tmp_path / "profile.png"
    out = plot_layer_profile(stats, {"optimal": optimal_grouping(stats, 3), "uniform": uniform_grouping(7, 3),
                                     "single": [0, 7]}, target)
    assert os.fspath(out) == os.fspath(target)
    assert target.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["profile.png"]
    with pytest.raises(InputError):
        plot_layer_profile(stats, {"wrong": [0, 3]}, tmp_path / "other.png")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["profile.png"]


def test_layers_command_line(tmp_path):
    # The `upscale layers` verb end to end: a field of three known layer groups.
    import subprocess
    import sys

    from upscale import write
    from upscale.io.schema import fine_dataset

    levels = np.repeat([2.0, 300.0, 20.0], [2, 5, 3])
    k = np.broadcast_to(levels, (4, 3, 10)).copy()
    write(fine_dataset(k, k, k, np.full(k.shape, 0.2), np.ones(4), np.ones(3), np.ones(10)), tmp_path / "f.nc")
    done = subprocess.run([sys.executable, "-m", "upscale.cli", "layers", str(tmp_path / "f.nc"), "--target", "3",
                           "--figure", str(tmp_path / "layers.png")], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    assert "optimal: edges [0, 2, 7, 10]" in done.stdout
    assert (tmp_path / "layers.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def _dataset(cells):
    """The normalised dataset of a GridArrays (as :func:`upscale.field.open_field` gives)."""
    return validate(fine_dataset(cells.kx, cells.ky, cells.kz, cells.porosity, cells.dx, cells.dy,
                                             cells.dz, ntg=cells.ntg, active=cells.active.astype(int)))


@FAST
@given(st.integers(0, 10_000), st.lists(st.integers(1, 4), min_size=1, max_size=7))
def test_statistics_read_in_slabs_equal_those_in_memory(seed, slabs):
    # Property: per-layer sums over slabs of whole columns, the ln kh variance combined by
    # the pairwise update of Chan, Golub & LeVeque (1983), "Algorithms for computing the
    # sample variance: analysis and recommendations", The American Statistician 37
    # (from memory), give the one-pass result whatever the slabs (the in-memory
    # statistics are checked against direct sums above).
    cells = random_cells(seed, nx=7)
    sizes = []
    while sum(sizes) < 7:
        sizes.append(min(slabs[len(sizes) % len(slabs)], 7 - sum(sizes)))
    lazy = _dataset(cells).chunk({"x": tuple(sizes)})
    expected, found = layer_statistics(cells), field_layer_statistics(lazy)
    assert found.keys() == expected.keys()
    for key in expected:
        np.testing.assert_allclose(found[key], expected[key], rtol=1e-11, atol=1e-12, equal_nan=True, err_msg=key)


def test_layers_command_reads_in_slabs_and_reports_as_in_memory(tmp_path, capsys):
    from upscale.cli.main import main

    cells = random_cells(5, nx=9, ny=5, nz=8)
    path = tmp_path / "fine.nc"
    _dataset(cells).to_netcdf(path)
    assert main(["layers", str(path), "--target", "3", "--memory", "400MB"]) == 0
    assert capsys.readouterr().out.strip() == format_comparison(compare_groupings(cells, 3)).strip()


def test_layers_command_refuses_a_figure_path_before_any_work(tmp_path, capsys):
    from upscale.cli.main import main

    path = tmp_path / "fine.nc"
    _dataset(random_cells(6)).to_netcdf(path)
    assert main(["layers", str(path), "--target", "2", "--figure", str(tmp_path / "missing" / "p.png")]) == 2
    out, err = capsys.readouterr()
    assert out == "" and "does not exist" in err
