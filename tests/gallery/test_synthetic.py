"""Tests of the synthetic field generators (upscale.synthetic).

Random results are checked through statistics and features, never through stored numbers.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st

from upscale import write
from upscale.core.grid import GridArrays
from upscale.errors import InputError
from upscale.gallery.demo_field import FACIES, demo_field
from upscale.gallery.synthetic import (
    COVARIANCE_MODELS,
    channel_field,
    gaussian_field,
    layered_field,
    lognormal_field,
    lognormal_permeability,
)
from upscale.io.reading import open_field
from upscale.io.schema import arrays
from upscale.io.validation import validate

FAST = settings(max_examples=25, deadline=None)


def lag_correlation(values: np.ndarray, axis: int, lag: int) -> float:
    """Sample correlation between cells ``lag`` apart along ``axis``."""
    n = values.shape[axis]
    head = np.take(values, np.arange(0, n - lag), axis=axis).ravel()
    tail = np.take(values, np.arange(lag, n), axis=axis).ravel()
    return float(np.corrcoef(head, tail)[0, 1])


@pytest.fixture(scope="module")
def demo() -> xr.Dataset:
    return demo_field()


@pytest.fixture(scope="module")
def demo_arrays(demo) -> GridArrays:
    return arrays(validate(demo))


# ----------------------------------------------------------------------------- gaussian_field

shapes = st.lists(st.integers(2, 24), min_size=1, max_size=3).map(tuple)


@FAST
@given(shape=shapes, data=st.data(), seed=st.integers(0, 2**32 - 1),
       kind=st.sampled_from(sorted(COVARIANCE_MODELS)))
def test_gaussian_field_is_exactly_standardised(shape, data, seed, kind):
    lengths = data.draw(st.lists(st.floats(0.0, 6.0), min_size=len(shape), max_size=len(shape)))
    values = gaussian_field(shape, lengths, seed, kind=kind)
    assert values.shape == shape
    assert values.dtype == np.float64
    assert np.all(np.isfinite(values))
    assert abs(values.mean()) < 1e-12
    assert abs(values.std() - 1.0) < 1e-12


SEEDS = 16


@pytest.mark.parametrize("axis", [0, 1, 2])
def test_gaussian_correlation_is_one_over_e_at_one_length(axis):
    # The Gaussian covariance C(h) = exp(-(h / L)^2) along one axis: C(L / 2) = exp(-1/4),
    # C(L) = exp(-1), C(2 L) = exp(-4) (the exponential model exp(-h / L) would give
    # exp(-1/2), exp(-1), exp(-2): the half and double lags tell the two apart). Estimated
    # from SEEDS independent fields of 400 x 48 x 48 cells; the tolerance is four standard
    # errors of the mean over seeds (from their own spread; with 15 degrees of freedom a
    # two-sided 0.1 % level), plus 1e-3 for the bias of correlations of a field whose
    # sample mean is removed: about Var(sample mean) = (1 / N) sum_h C(h) =
    # (sqrt(pi) 8)(sqrt(pi) 2)^2 / 921600 = 2e-4.
    length = 8
    shape = [48, 48, 48]
    shape[axis] = 400
    lengths = [2, 2, 2]
    lengths[axis] = length
    lags = {length // 2: math.exp(-0.25), length: math.exp(-1.0), 2 * length: math.exp(-4.0)}
    estimates = {lag: [] for lag in lags}
    for seed in range(SEEDS):
        values = gaussian_field(tuple(shape), lengths, seed=100 * axis + seed)
        for lag in lags:
            estimates[lag].append(lag_correlation(values, axis, lag))
    for lag, expected in lags.items():
        sample = np.array(estimates[lag])
        standard_error = sample.std(ddof=1) / math.sqrt(SEEDS)
        assert 0 < standard_error < 0.01, (lag, standard_error)  # the test stays sharp
        assert sample.mean() == pytest.approx(expected, abs=4 * standard_error + 1e-3), (lag, standard_error)


def test_gaussian_and_exponential_models_differ_at_short_lag():
    length = 6
    smooth = gaussian_field((600, 600), (length, length), seed=3, kind="gaussian")
    rough = gaussian_field((600, 600), (length, length), seed=3, kind="exponential")
    assert lag_correlation(smooth, 0, 1) == pytest.approx(math.exp(-1 / length**2), abs=0.02)
    assert lag_correlation(rough, 0, 1) == pytest.approx(math.exp(-1 / length), abs=0.03)
    assert lag_correlation(smooth, 0, length) == pytest.approx(math.exp(-1), abs=0.08)
    assert lag_correlation(rough, 0, length) == pytest.approx(math.exp(-1), abs=0.08)


def test_zero_length_means_uncorrelated_along_that_axis():
    values = gaussian_field((200, 300), (0, 10), seed=5)
    assert abs(lag_correlation(values, 0, 1)) < 0.05
    assert lag_correlation(values, 1, 1) > 0.95


def test_all_zero_lengths_give_white_noise():
    values = gaussian_field((100, 100, 20), 0, seed=5)
    for axis in range(3):
        assert abs(lag_correlation(values, axis, 1)) < 0.05


def test_gaussian_field_is_not_periodic_over_the_crop():
    # Without padding the first and last slabs would be neighbours on the periodic grid.
    values = gaussian_field((32, 128, 128), (16, 3, 3), seed=2)
    assert lag_correlation(values, 0, 1) > 0.9
    assert abs(float(np.corrcoef(values[0].ravel(), values[-1].ravel())[0, 1])) < 0.3


def test_gaussian_field_one_dimensional():
    values = gaussian_field(20000, 5, seed=9)
    assert values.shape == (20000,)
    assert lag_correlation(values, 0, 5) == pytest.approx(math.exp(-1), abs=0.08)


def test_gaussian_field_seeding():
    first = gaussian_field((30, 20, 10), (4, 4, 1), seed=42)
    again = gaussian_field((30, 20, 10), (4, 4, 1), seed=42)
    other = gaussian_field((30, 20, 10), (4, 4, 1), seed=43)
    np.testing.assert_array_equal(first, again)
    assert not np.allclose(first, other)
    from_generator = gaussian_field((30, 20, 10), (4, 4, 1), np.random.default_rng(42))
    np.testing.assert_array_equal(first, from_generator)


@pytest.mark.parametrize("shape, lengths, kind, words", [
    ((4, 4, 4, 4), (1, 1, 1, 1), "gaussian", "dimension"),
    ((), (), "gaussian", "dimension"),
    ((10, 0), (1, 1), "gaussian", "below 1"),
    ((10, 2.5), (1, 1), "gaussian", "whole numbers"),
    ((10, 10), (1, -1), "gaussian", ">= 0"),
    ((10, 10), (1, float("nan")), "gaussian", "finite"),
    ((10, 10), (1, 1, 1), "gaussian", "one length per axis"),
    ((10, 10), (1, 1), "spherical", "covariance model"),
    ((1,), (0,), "gaussian", "single cell"),
    ((100, 100, 100), (5000, 5000, 5000), "gaussian", "not metres"),
])
def test_gaussian_field_refuses_bad_input(shape, lengths, kind, words):
    with pytest.raises(InputError, match=words):
        gaussian_field(shape, lengths, seed=0, kind=kind)


# ----------------------------------------------------------------------------- lognormal

@FAST
@given(sigma=st.floats(0.1, 3.0), mean=st.floats(0.1, 5000.0), seed=st.integers(0, 2**32 - 1))
def test_lognormal_permeability_statistics(sigma, mean, seed):
    k = lognormal_permeability((40, 40, 20), mean, sigma, (4, 4, 1), seed)
    assert np.all(k > 0) and np.all(np.isfinite(k))
    ln_k = np.log(k)
    assert ln_k.std() == pytest.approx(sigma, rel=1e-9)
    assert ln_k.mean() == pytest.approx(math.log(mean), abs=1e-9 * max(1.0, abs(math.log(mean))))
    assert abs(math.log(np.median(k) / mean)) < 0.15 * sigma


def test_lognormal_permeability_zero_sigma_is_uniform():
    k = lognormal_permeability((10, 10, 5), 50.0, 0.0, (2, 2, 1), seed=1)
    np.testing.assert_allclose(k, 50.0)


@pytest.mark.parametrize("mean, sigma", [(0.0, 1.0), (-5.0, 1.0), (10.0, -1.0), (10.0, float("inf"))])
def test_lognormal_permeability_refuses_bad_parameters(mean, sigma):
    with pytest.raises(InputError):
        lognormal_permeability((10, 10, 5), mean, sigma, (2, 2, 1), seed=1)


def test_lognormal_benchmark_field_is_valid():
    ds = lognormal_field()
    normal = validate(ds)
    fine = arrays(normal)
    assert fine.shape == (60, 220, 85)
    np.testing.assert_array_equal(fine.dx, 20.0)
    np.testing.assert_array_equal(fine.dy, 10.0)
    np.testing.assert_array_equal(fine.dz, 2.0)
    np.testing.assert_array_equal(fine.kx, fine.ky)
    np.testing.assert_allclose(fine.kz, 0.1 * fine.kx)
    assert fine.active.all()
    np.testing.assert_array_equal(fine.ntg, 1.0)
    ln_k = np.log(fine.kx)
    assert ln_k.std() == pytest.approx(2.0, rel=1e-9)
    assert abs(np.median(ln_k) - math.log(100.0)) < 0.3
    assert fine.porosity.min() >= 0.02 and fine.porosity.max() <= 0.35
    assert fine.porosity.mean() == pytest.approx(0.2, abs=0.01)
    assert np.corrcoef(ln_k.ravel(), fine.porosity.ravel())[0, 1] > 0.6
    assert ds.attrs["Conventions"] == "CF-1.10"


def test_lognormal_field_options_and_seeding():
    kwargs = dict(shape=(12, 10, 6), sigma_ln=0.5, correlation_lengths=(3, 3, 1), kv_kh=0.25,
                  cell_size=(5.0, 6.0, 0.5), geometric_mean_md=20.0, porosity_mean=0.1)
    first = lognormal_field(seed=3, **kwargs)
    xr.testing.assert_identical(first, lognormal_field(seed=3, **kwargs))
    assert not np.allclose(first.kx, lognormal_field(seed=4, **kwargs).kx)
    assert first.sizes == {"x": 12, "y": 10, "z": 6}
    np.testing.assert_array_equal(first.dy, 6.0)
    np.testing.assert_allclose(first.kz, 0.25 * first.kx)
    assert float(np.log(first.kx).std()) == pytest.approx(0.5)
    validate(first)


@pytest.mark.parametrize("kwargs", [
    dict(shape=(10, 10)), dict(porosity_mean=0.5), dict(kv_kh=-0.1), dict(cell_size=(10.0, 0.0, 1.0)),
    dict(geometric_mean_md=0.0),
])
def test_lognormal_field_refuses_bad_parameters(kwargs):
    kwargs = {"shape": (8, 8, 4), **kwargs}
    with pytest.raises(InputError):
        lognormal_field(**kwargs)


# ----------------------------------------------------------------------------- layered

@FAST
@given(layers=st.lists(st.tuples(st.floats(0.1, 20.0), st.floats(0.0, 5000.0)), min_size=1, max_size=8),
       kv_kh=st.floats(0.0, 1.0), nx=st.integers(1, 6), ny=st.integers(1, 6))
def test_layered_field_matches_its_layers(layers, kv_kh, nx, ny):
    thickness, k = (np.array(v) for v in zip(*layers))
    ds = layered_field(thickness, k, shape_xy=(nx, ny), cell_size_xy=(7.0, 3.0), kv_kh=kv_kh)
    assert ds["dz"].dims == ("z",)
    fine = arrays(validate(ds))
    assert fine.shape == (nx, ny, len(layers))
    np.testing.assert_allclose(fine.dz, np.broadcast_to(thickness, fine.shape))
    np.testing.assert_allclose(fine.kx, np.broadcast_to(k, fine.shape))
    np.testing.assert_array_equal(fine.kx, fine.ky)
    np.testing.assert_allclose(fine.kz, kv_kh * fine.kx)
    assert np.all(fine.kz <= fine.kx)
    np.testing.assert_array_equal(fine.porosity, 0.2)
    np.testing.assert_array_equal(fine.dx, 7.0)


def test_layered_field_per_layer_options_and_pinched_layer():
    ds = layered_field([2.0, 0.0, 3.0], [100.0, 50.0, 1.0], kv_kh=[0.5, 0.1, 0.01],
                                 porosity=[0.25, 0.2, 0.1])
    fine = arrays(validate(ds))
    assert fine.active[:, :, 0].all() and not fine.active[:, :, 1].any() and fine.active[:, :, 2].all()
    np.testing.assert_allclose(fine.kz[0, 0], [50.0, 0.0, 0.01])
    np.testing.assert_allclose(fine.porosity[0, 0], [0.25, 0.0, 0.1])


@pytest.mark.parametrize("thickness, k, kwargs", [
    ([1.0, 2.0], [10.0], {}),
    ([1.0, -2.0], [10.0, 10.0], {}),
    ([0.0, 0.0], [10.0, 10.0], {}),
    ([1.0], [-10.0], {}),
    ([1.0], [10.0], {"porosity": 1.5}),
    ([1.0], [10.0], {"kv_kh": [0.1, 0.2]}),
    ([1.0], [10.0], {"shape_xy": (10, 10, 2)}),
    ([], [], {}),
])
def test_layered_field_refuses_bad_input(thickness, k, kwargs):
    with pytest.raises(InputError):
        layered_field(thickness, k, **kwargs)


# ----------------------------------------------------------------------------- channels

def test_channel_field_is_valid_with_two_facies():
    ds = channel_field((80, 60, 20), channel_count=5, channel_width_cells=4, seed=1)
    fine = arrays(validate(ds))
    channel = ds["facies"].values == 1
    assert 0.01 < channel.mean() < 0.5
    np.testing.assert_array_equal(fine.kx[channel], 1000.0)
    np.testing.assert_array_equal(fine.kx[~channel], 5.0)
    np.testing.assert_array_equal(fine.kx, fine.ky)
    assert np.all(fine.kz <= fine.kx)
    np.testing.assert_allclose(fine.kz[channel], 300.0)
    np.testing.assert_allclose(fine.porosity[channel], 0.25)


def test_single_channel_is_sinuous_with_the_given_cross_section():
    nx, ny, nz, width, thickness = 120, 80, 12, 5, 3
    ds = channel_field((nx, ny, nz), 1, width, seed=4, channel_thickness_cells=thickness,
                                 amplitude_cells=15, wavelength_cells=60)
    channel = ds["facies"].values == 1
    layers = np.flatnonzero(channel.any(axis=(0, 1)))
    assert layers.size == thickness and np.all(np.diff(layers) == 1)  # one contiguous layer band
    section = channel[:, :, layers[0]]
    np.testing.assert_array_equal(channel[:, :, layers], np.repeat(section[:, :, None], thickness, axis=2))
    cells_across = section.sum(axis=1)                               # y cells per x column
    inside = (cells_across > 0) & ~(section[:, 0] | section[:, -1])  # columns not cut by the y edges
    assert inside.mean() > 0.3
    assert cells_across[inside].min() >= width - 1                   # a band in every column...
    assert cells_across.max() <= 3 * width                           # ...not a slab
    y = np.arange(ny) + 0.5
    centre = (section * y).sum(axis=1)[inside] / cells_across[inside]
    assert np.ptp(centre) > 5.0                                      # sine amplitude 7.5..15 cells


def test_channel_field_without_channels_is_background():
    ds = channel_field((10, 10, 5), 0, 3, seed=0, k_background=2.0)
    np.testing.assert_array_equal(ds["kx"].values, 2.0)
    assert not ds["facies"].values.any()


def test_channel_field_seeding():
    args = ((40, 30, 10), 3, 3)
    first = channel_field(*args, seed=8)
    xr.testing.assert_identical(first, channel_field(*args, seed=8))
    assert not np.array_equal(first["facies"].values, channel_field(*args, seed=9)["facies"].values)


@pytest.mark.parametrize("kwargs", [
    dict(channel_count=-1), dict(channel_count=1.5), dict(channel_width_cells=0.5),
    dict(channel_thickness_cells=50), dict(k_channel=-1.0), dict(porosity_channel=2.0),
    dict(shape=(10, 10)), dict(wavelength_cells=0.0),
])
def test_channel_field_refuses_bad_input(kwargs):
    kwargs = {"shape": (20, 20, 10), "channel_count": 2, "channel_width_cells": 3, "seed": 0, **kwargs}
    with pytest.raises(InputError):
        channel_field(**kwargs)


# ----------------------------------------------------------------------------- demo

def test_demo_is_valid_and_labelled(demo, demo_arrays):
    assert demo_arrays.shape == (100, 100, 50)
    np.testing.assert_array_equal(demo_arrays.dx, 25.0)
    np.testing.assert_array_equal(demo_arrays.dy, 25.0)
    assert demo["dz"].dims == ("x", "y", "z")
    for name in demo.data_vars:
        assert np.all(np.isfinite(demo[name].values)), name
    assert demo.attrs["Conventions"] == "CF-1.10"
    assert "synthetic" in demo.attrs["title"].lower()
    assert "synthetic" in demo.attrs["scenario"].lower() and "invented" in demo.attrs["scenario"].lower()


def test_demo_seeding(demo):
    xr.testing.assert_identical(demo, demo_field(seed=7))
    assert not np.allclose(demo["kx"].values, demo_field(seed=8)["kx"].values)


def test_demo_thickness_and_pinched_wedge(demo_arrays):
    a = demo_arrays
    pinched = a.dz == 0
    assert 0.01 < pinched.mean() < 0.10
    assert np.array_equal(pinched, ~a.active)
    i, j, k = np.nonzero(pinched)
    assert i.max() < 50 and j.max() < 50                      # near the x=0, y=0 corner
    assert k.min() >= 25                                      # bottom layers only (onlap)
    assert pinched[0, 0].sum() > pinched[30, 0].sum() > 0      # a wedge: thins away from the corner
    assert a.dz[a.active].min() >= 0.3 and a.dz[a.active].max() <= 3.0
    assert np.ptp(a.dz[60:, 60:, :], axis=(0, 1)).max() > 0.2  # laterally varying thickness
    assert np.ptp(np.median(a.dz[60:, 60:, :], axis=(0, 1))) > 0.5  # and by layer
    assert 55.0 < np.median(a.dz.sum(axis=2)) < 65.0


def test_demo_permeability_ranges_and_anisotropy(demo, demo_arrays):
    a = demo_arrays
    facies = demo["facies"].values
    on = a.active
    assert np.all(a.kx[on] > 0) and np.all(a.kz[on] > 0)
    np.testing.assert_array_equal(a.kx, a.ky)
    assert np.all(a.kz <= a.kx)
    ratio = a.kz[on] / a.kx[on]
    assert ratio.min() >= 0.01 - 1e-12 and ratio.max() <= 0.3 + 1e-12
    assert np.any(np.isclose(ratio, 0.01)) and np.any(np.isclose(ratio, 0.3))
    channel = on & (facies == FACIES["channel_sand"])
    background = on & (facies == FACIES["tidal_flat_heterolithic"])
    assert channel.mean() > 0.05
    assert a.kx[channel].min() >= 300.0 and a.kx[channel].max() <= 3000.0
    assert a.kx[background].min() >= 20.0 and a.kx[background].max() <= 100.0
    layers_with_channels = np.flatnonzero(channel.any(axis=(0, 1)))
    assert np.ptp(layers_with_channels) > 20                  # stacked channel stories


def test_demo_cemented_streaks_are_thin_patchy_barriers(demo_arrays):
    a = demo_arrays
    cemented = a.active & (a.kx < 1.0)
    assert cemented.any()
    assert np.all(a.kx[cemented] >= 0.01 - 1e-12) and np.all(a.kx[cemented] <= 0.1 + 1e-12)
    layers = np.flatnonzero(cemented.any(axis=(0, 1)))
    assert 2 <= layers.size <= 6
    assert np.all(np.diff(layers) > 1)                        # single fine layers
    cover = cemented[:, :, layers].mean(axis=(0, 1))
    assert np.all(cover > 0.3) and np.all(cover < 0.95)         # laterally extensive, but patchy
    assert np.all(a.dz[:, :, layers][cemented[:, :, layers]] <= 1.0)  # thin


def test_demo_shale_drapes_porosity_and_ntg(demo, demo_arrays):
    a = demo_arrays
    facies = demo["facies"].values
    on = a.active
    assert a.ntg[on].min() >= 0.0 and a.ntg[on].max() <= 1.0
    layer_ntg = (a.ntg * on).sum(axis=(0, 1)) / on.sum(axis=(0, 1))
    assert (layer_ntg < 0.35).sum() >= 3                        # shale-draped layers
    drape = on & (facies == FACIES["shale_drape"])
    assert a.ntg[drape].min() >= 0.1 and a.ntg[drape].max() <= 0.3
    assert a.porosity[on].min() >= 0.05 and a.porosity[on].max() <= 0.3
    means = [a.porosity[on & (facies == FACIES[name])].mean()
             for name in ("channel_sand", "tidal_flat_heterolithic", "shale_drape", "cemented_streak")]
    assert means == sorted(means, reverse=True)                # porosity follows facies quality


def test_demo_survives_a_file_round_trip(demo, tmp_path):
    path = write(demo, tmp_path / "demo.nc")
    back = open_field(path)
    np.testing.assert_array_equal(back["kx"].values, validate(demo)["kx"].values)
    assert back.attrs["scenario"] == demo.attrs["scenario"]
    assert "facies" in back


def test_make_field_demo_writes_the_demo_field(demo, tmp_path, capsys):
    # `upscale make-field demo` (an example of its --help) once failed: it looked for the
    # generator in the wrong module. The file it writes is the demo field of seed 7.
    from upscale.cli.main import main

    path = tmp_path / "demo.nc"
    assert main(["make-field", "demo", "-o", str(path)]) == 0
    assert capsys.readouterr().out == f"wrote {path}\n"
    back = open_field(path)
    for name in ("kx", "kz", "porosity", "ntg", "dz", "facies"):
        np.testing.assert_array_equal(back[name].values, validate(demo)[name].values, err_msg=name)
