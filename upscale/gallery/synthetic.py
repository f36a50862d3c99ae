"""Synthetic fine fields: stationary random fields, lognormal permeability, test geometries.

Everything here is invented data for tests, examples and benchmarks; nothing describes a
real reservoir. Arrays are ordered [x, y, z] with z counting layers from the top down,
permeability in mD, cell sizes in m. All randomness comes from
``np.random.default_rng(seed)``, so a seed (an int, a ``SeedSequence`` or a ``Generator``)
fully determines a field. No function loops over cells in Python.

Random fields are made by FFT spectral synthesis (circulant embedding) with the
*Gaussian* covariance model by default::

    C(h) = exp(-sum_i (h_i / L_i) ** 2)

where ``h_i`` is the lag in cells along axis ``i`` and ``L_i`` the correlation length in
cells: the correlation falls to 1/e (about 0.37) at a lag of one correlation length along
an axis (about 0.05 at 1.73 L, the "practical range"). ``L_i = 0`` means no correlation
along that axis.
"""

from __future__ import annotations

import math
import operator

import numpy as np
import xarray as xr

from ..core.grid import AXES
from ..errors import InputError
from ..io.schema import fine_dataset

#: Covariance models of :func:`gaussian_field`: correlation as a function of lag / length,
#: and the padding (in correlation lengths) that makes wrap-around correlation negligible.
COVARIANCE_MODELS = {
    "gaussian": (lambda r: np.exp(-r * r), 3.0),      # C(3 L) = 1.2e-4
    "exponential": (lambda r: np.exp(-r), 6.0),        # C(6 L) = 2.5e-3
}


#: Refuse padded grids larger than this many cells (float64: 8 bytes each).
MAX_PADDED_CELLS = 200_000_000


POROSITY_CLIP = (0.02, 0.35)


#: bytes per cell :func:`lognormal_field` needs (padded FFT work arrays and the dataset; estimate)
FFT_BYTES_PER_CELL = 160


def _shape(shape, ndims=(1, 2, 3)) -> tuple[int, ...]:
    """Shape as a tuple of positive ints with an allowed number of dimensions."""
    items = (shape,) if isinstance(shape, (int, np.integer)) else shape
    try:
        out = tuple(operator.index(n) for n in items)
    except TypeError:
        raise InputError(f"shape {shape!r} must be a tuple of whole numbers, e.g. (60, 220, 85)") from None
    if len(out) not in ndims:
        wanted = " or ".join(str(n) for n in ndims)
        raise InputError(f"shape {shape!r} has {len(out)} dimension(s); give {wanted}")
    if any(n < 1 for n in out):
        raise InputError(f"shape {shape!r} has a size below 1; every axis needs at least one cell")
    return out


def _lengths(lengths, ndim: int) -> tuple[float, ...]:
    """Correlation lengths (cells) as floats, one per axis; a scalar applies to every axis."""
    values = np.atleast_1d(np.asarray(lengths, dtype=float))
    if values.size == 1:
        values = np.repeat(values, ndim)
    if values.ndim != 1 or values.size != ndim:
        raise InputError(f"correlation_lengths {lengths!r}: give one length per axis ({ndim})")
    if not np.all(np.isfinite(values)) or np.any(values < 0):
        raise InputError(f"correlation_lengths {lengths!r} must be finite and >= 0 (cells; 0 = uncorrelated)")
    return tuple(float(v) for v in values)


def _number(name: str, value, low: float | None = None, high: float | None = None,
            low_open: bool = False) -> float:
    """A finite float within [low, high] (or (low, high] when ``low_open``)."""
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{name} = {value!r} is not a number") from None
    bad = not math.isfinite(out)
    bad |= low is not None and (out <= low if low_open else out < low)
    bad |= high is not None and out > high
    if bad:
        lo = "" if low is None else (f"> {low}" if low_open else f">= {low}")
        hi = "" if high is None else f"<= {high}"
        raise InputError(f"{name} = {value!r} must be finite {' and '.join(filter(None, (lo, hi)))}".rstrip())
    return out


def _per_layer(name: str, value, nz: int, low: float, high: float | None = None) -> np.ndarray:
    """A scalar or one value per layer, as a float array of length nz, within [low, high]."""
    values = np.asarray(value, dtype=float)
    if values.ndim == 0:
        values = np.full(nz, float(values))
    if values.shape != (nz,):
        raise InputError(f"{name} has {values.size} value(s); give one or one per layer ({nz})")
    bad = ~np.isfinite(values) | (values < low) | ((values > high) if high is not None else False)
    if bad.any():
        limit = f"in [{low}, {high}]" if high is not None else f">= {low}"
        raise InputError(f"{name} is not finite {limit} at layer {int(np.argmax(bad))}")
    return values


def _fft_length(n: int) -> int:
    """Smallest length >= n whose only prime factors are 2, 3, 5 and 7 (fast FFT sizes)."""
    m = n
    while True:
        k = m
        for p in (2, 3, 5, 7):
            while k % p == 0:
                k //= p
        if k == 1:
            return m
        m += 1


def _spectral_amplitude(n: int, length: float, correlation, half: bool) -> np.ndarray:
    """Square root of the eigenvalues of the periodic 1-D correlation matrix of size n.

    The eigenvalues of a symmetric circulant matrix are the DFT of its first column;
    ``half`` returns only the non-negative frequencies (for the rfft axis).
    """
    j = np.arange(n)
    with np.errstate(over="ignore"):  # tiny lengths: lag / length -> inf, correlation -> 0
        column = correlation(np.minimum(j, n - j) / length)
    eigen = (np.fft.rfft(column) if half else np.fft.fft(column)).real
    return np.sqrt(np.clip(eigen, 0.0, None))


def gaussian_field(shape, correlation_lengths, seed, kind: str = "gaussian") -> np.ndarray:
    """Stationary standard normal random field on a 1-, 2- or 3-D grid of cells.

    White noise on a periodic grid padded by 3 L (gaussian) or 6 L (exponential) per
    axis is filtered in Fourier space by the square root of the exact spectrum of the
    sampled covariance, then cropped to ``shape``; wrap-around correlation is below 0.003.
    Peak work memory is about three float64 arrays of the padded grid (noise, its half
    spectrum, the inverse transform); no wavenumber grids.

    Parameters
    ----------
    shape : int or tuple of int
        Cells along each of 1, 2 or 3 axes; at least two cells in all.
    correlation_lengths : float or sequence of float
        Correlation lengths L (cells), one per axis or one for all; 0 = uncorrelated
        along that axis. The correlation is 1/e (about 0.37) at a lag of one length
        along one axis.
    seed : int, SeedSequence or Generator
        Determines the field (``np.random.default_rng(seed)``).
    kind : str
        The covariance model: "gaussian", C(h) = exp(-sum (h_i / L_i)^2), smooth;
        "exponential", C(h) = exp(-sum |h_i| / L_i) (separable), rough.

    Returns
    -------
    numpy.ndarray
        Float64 array of ``shape``, shifted and scaled to sample mean 0 and standard
        deviation 1 exactly (population std, ``ddof=0``).
    """
    shape = _shape(shape)
    lengths = _lengths(correlation_lengths, len(shape))
    if kind not in COVARIANCE_MODELS:
        raise InputError(f"kind {kind!r} is not a covariance model; use one of {', '.join(COVARIANCE_MODELS)}")
    if math.prod(shape) < 2:
        raise InputError(f"shape {shape} has a single cell; mean 0 and std 1 need at least two")
    correlation, pad = COVARIANCE_MODELS[kind]
    padded = tuple(_fft_length(n + math.ceil(pad * length)) if length > 0 else n
                   for n, length in zip(shape, lengths))
    if math.prod(padded) > MAX_PADDED_CELLS:
        raise InputError(f"correlation_lengths {correlation_lengths!r} need a padded grid of {padded} cells, "
                         f"too large; lengths are in cells, not metres")
    field = _filtered_noise(np.random.default_rng(seed), padded, lengths, correlation)
    field = field[tuple(slice(0, n) for n in shape)]
    field = field - field.mean()
    field /= field.std()
    return field


def _filtered_noise(rng: np.random.Generator, padded, lengths, correlation) -> np.ndarray:
    """White noise on the periodic grid ``padded``, filtered along every correlated axis
    by the square root of the covariance spectrum (one real FFT over those axes)."""
    field = rng.standard_normal(padded)
    axes = [a for a, length in enumerate(lengths) if length > 0]
    if not axes:
        return field
    spectrum = np.fft.rfftn(field, axes=axes)
    del field
    for a in axes:
        amplitude = _spectral_amplitude(padded[a], lengths[a], correlation, half=a == axes[-1])
        view = [1] * len(padded)
        view[a] = amplitude.size
        spectrum *= amplitude.reshape(view)
    return np.fft.irfftn(spectrum, s=[padded[a] for a in axes], axes=axes)


def lognormal_permeability(shape, geometric_mean_md: float, sigma_ln: float,
                           correlation_lengths, seed) -> np.ndarray:
    """Lognormal permeability, geometric_mean_md * exp(sigma_ln * gaussian_field(...)).

    Parameters
    ----------
    shape, correlation_lengths, seed
        As for :func:`gaussian_field` (gaussian covariance).
    geometric_mean_md : float
        Geometric mean, mD (> 0).
    sigma_ln : float
        Standard deviation of ln k (>= 0).

    Returns
    -------
    numpy.ndarray
        Permeability (mD) of ``shape``; ln k has sample mean ln(geometric_mean_md) and
        sample std ``sigma_ln`` exactly.
    """
    mean = _number("geometric_mean_md", geometric_mean_md, low=0.0, low_open=True)
    sigma = _number("sigma_ln", sigma_ln, low=0.0)
    k = gaussian_field(shape, correlation_lengths, seed)
    k *= sigma
    np.exp(k, out=k)
    k *= mean
    return k


def _cell_sizes(name: str, value, axes: tuple[str, ...]) -> np.ndarray:
    """Uniform cell sizes (m), one per axis of ``axes``, all finite and > 0."""
    sizes = np.asarray(value, dtype=float)
    if sizes.shape != (len(axes),) or not np.all(np.isfinite(sizes)) or np.any(sizes <= 0):
        count = {2: "two", 3: "three"}[len(axes)]
        raise InputError(f"{name} {value!r} must be {count} sizes ({', '.join(axes)}) in m, all > 0")
    return sizes


def _lognormal_parameters(shape, kv_kh, porosity_mean, cell_size, sigma_ln, geometric_mean_md):
    """Checked parameters of the lognormal fields: shape, kv/kh, mean porosity, cell sizes
    (m), sigma of ln k, geometric mean (mD)."""
    shape = _shape(shape, ndims=(3,))
    kv_kh = _number("kv_kh", kv_kh, low=0.0)
    porosity_mean = _number("porosity_mean", porosity_mean, *POROSITY_CLIP)
    sizes = _cell_sizes("cell_size", cell_size, ("dx", "dy", "dz"))
    sigma = _number("sigma_ln", sigma_ln, low=0.0)
    mean = _number("geometric_mean_md", geometric_mean_md, low=0.0, low_open=True)
    return shape, kv_kh, porosity_mean, sizes, sigma, mean


def _porosity(score: np.ndarray, noise: np.ndarray, porosity_mean: float) -> np.ndarray:
    """porosity_mean + 0.25 porosity_mean (0.8 score + 0.6 noise), clipped (in place on noise)."""
    noise *= 0.6
    noise += 0.8 * score
    noise *= 0.25 * porosity_mean
    noise += porosity_mean
    return np.clip(noise, *POROSITY_CLIP, out=noise)


def lognormal_field(shape=(60, 220, 85), sigma_ln: float = 2.0, correlation_lengths=(8, 8, 2),
                    kv_kh: float = 0.1, cell_size=(20.0, 10.0, 2.0), geometric_mean_md: float = 100.0,
                    porosity_mean: float = 0.2, seed=0) -> xr.Dataset:
    """Complete fine field with lognormal permeability (the benchmark field).

    kx = ky = k (mD) from :func:`lognormal_permeability`, kz = kv_kh * k; porosity =
    porosity_mean + 0.25 * porosity_mean * (0.8 g + 0.6 w), g the normal score of ln k and
    w white noise (correlation with ln k about 0.8), clipped to [0.02, 0.35]; ntg = 1.

    Parameters
    ----------
    shape : tuple of int
        (nx, ny, nz) cells.
    sigma_ln : float
        Standard deviation of ln k (>= 0).
    correlation_lengths : float or sequence of float
        Correlation lengths of ln k, cells (gaussian covariance; 0 = uncorrelated).
    kv_kh : float
        kz / kx (>= 0).
    cell_size : sequence of float
        (dx, dy, dz), uniform, m.
    geometric_mean_md : float
        Geometric mean of k, mD (> 0).
    porosity_mean : float
        Mean porosity, within [0.02, 0.35].
    seed : int, SeedSequence or Generator
        Determines the field.

    Returns
    -------
    xarray.Dataset
        A field in the fine-field schema, held in memory.
    """
    shape, kv_kh, porosity_mean, sizes, sigma, mean = _lognormal_parameters(
        shape, kv_kh, porosity_mean, cell_size, sigma_ln, geometric_mean_md)
    field_seed, noise_seed = np.random.default_rng(seed).spawn(2)

    score = gaussian_field(shape, correlation_lengths, field_seed)
    k = mean * np.exp(sigma * score)  # = lognormal_permeability(shape, mean, sigma, lengths, field_seed)
    porosity = _porosity(score, np.random.default_rng(noise_seed).standard_normal(shape), porosity_mean)
    del score
    attrs = {
        "title": "Lognormal permeability field, synthetic",
        "source": "upscale.gallery.synthetic.lognormal_field",
        "comment": _lognormal_comment(mean, sigma, _lengths(correlation_lengths, 3), "", kv_kh, seed),
    }
    return fine_dataset(kx=k, ky=k.copy(), kz=kv_kh * k, porosity=porosity, **_uniform_sizes(shape, sizes),
                        ntg=np.ones(shape), attrs=attrs)


def _lognormal_comment(mean: float, sigma: float, lengths, how: str, kv_kh: float, seed) -> str:
    """The ``comment`` attribute of a lognormal field; ``how`` adds to the covariance note."""
    return (f"invented test data: geometric mean {mean:g} mD, sigma_ln {sigma:g}, "
            f"correlation lengths {lengths} cells (gaussian covariance{how}), kv/kh {kv_kh:g}, seed {seed!r}")


def _uniform_sizes(shape, sizes) -> dict[str, np.ndarray]:
    """dx, dy, dz arrays (nx,), (ny,), (nz,) of uniform cell sizes (dx, dy, dz)."""
    return {name: np.full(n, size) for name, n, size in zip(("dx", "dy", "dz"), shape, sizes)}


#: shape of the noise tiles of :func:`convolved_gaussian_field`: the noise of a tile is
#: drawn from its own seed, so any chunk of the field can be made alone
NOISE_TILE = (16, 64, 64)


#: the kernel is cut where it has fallen to exp(-8) = 3e-4 of its peak (4 standard deviations)
KERNEL_CUT = 4.0


def _kernel(length: float) -> np.ndarray:
    """Discrete Gaussian kernel (1-D) for a correlation length of ``length`` cells.

    A Gaussian kernel of standard deviation s convolved with itself is a Gaussian of
    standard deviation s sqrt(2), so s = L / 2 gives the covariance exp(-(h / L)^2); the
    weights are scaled to a unit sum of squares (unit variance). ``length`` 0: no filter.
    """
    if length <= 0:
        return np.ones(1)
    sd = length / 2.0
    radius = math.ceil(KERNEL_CUT * sd)
    h = np.arange(-radius, radius + 1, dtype=float)
    weights = np.exp(-0.5 * (h / sd) ** 2)
    return weights / np.sqrt(np.sum(weights ** 2))


def _tile_noise(seed: np.random.SeedSequence, start, stop) -> np.ndarray:
    """Standard normal noise on the global cell box [start, stop) (indices may be
    negative): each noise tile comes from ``seed`` and the tile's own index."""
    out = np.empty(tuple(b - a for a, b in zip(start, stop)))
    first = [a // t for a, t in zip(start, NOISE_TILE)]
    last = [(b - 1) // t for b, t in zip(stop, NOISE_TILE)]
    for tile in np.ndindex(*[l - f + 1 for f, l in zip(first, last)]):
        index = [f + i for f, i in zip(first, tile)]
        origin = [i * t for i, t in zip(index, NOISE_TILE)]
        key = tuple(int(i) + 2 ** 31 for i in index)  # spawn keys are non-negative
        noise = np.random.default_rng(np.random.SeedSequence(seed.entropy, spawn_key=seed.spawn_key + key)
                                      ).standard_normal(NOISE_TILE)
        lo = [max(a, o) for a, o in zip(start, origin)]
        hi = [min(b, o + t) for b, o, t in zip(stop, origin, NOISE_TILE)]
        out[tuple(slice(l - a, h - a) for l, h, a in zip(lo, hi, start))] = \
            noise[tuple(slice(l - o, h - o) for l, h, o in zip(lo, hi, origin))]
    return out


def convolved_gaussian_field(correlation_lengths, seed, region: tuple[slice, slice, slice]) -> np.ndarray:
    """Some cells of a 3-D stationary normal random field with mean 0, variance 1 and the
    Gaussian covariance exp(-sum (h_i / L_i)^2).

    Made by filtering tiled white noise with a separable Gaussian kernel (moving average;
    e.g. Oliver 1995, Math. Geol. 27, from memory). Any chunk is computed alone and equals
    the same cells of any other chunking; unlike :func:`gaussian_field` the sample mean and
    standard deviation are 0 and 1 only in expectation.

    Parameters
    ----------
    correlation_lengths : float or sequence of float
        Correlation lengths L (cells), one per axis or one for all; 0 = uncorrelated.
    seed : int or numpy.random.SeedSequence
        Determines the whole field.
    region : tuple of slice
        The cells wanted, as global index slices along x, y, z (with start and stop).

    Returns
    -------
    numpy.ndarray
        The field on ``region``.
    """
    lengths = _lengths(correlation_lengths, 3)
    seed = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    kernels = [_kernel(length) for length in lengths]
    radius = [k.size // 2 for k in kernels]
    start = [r.start - h for r, h in zip(region, radius)]
    stop = [r.stop + h for r, h in zip(region, radius)]
    field = _tile_noise(seed, start, stop)
    from scipy.ndimage import correlate1d

    for axis, (kernel, h) in enumerate(zip(kernels, radius)):
        if h:
            field = correlate1d(field, kernel, axis=axis, mode="constant")
            field = field[tuple(slice(h, -h) if a == axis else slice(None) for a in range(3))]
    return field


def lognormal_field_in_chunks(shape, sigma_ln: float = 2.0, correlation_lengths=(8, 8, 2), kv_kh: float = 0.1,
                              cell_size=(20.0, 10.0, 2.0), geometric_mean_md: float = 100.0,
                              porosity_mean: float = 0.2, seed=0, chunk_cells: int = 4_000_000) -> xr.Dataset:
    """A lazy (dask) lognormal field of any size, made chunk by chunk.

    The normal score comes from :func:`convolved_gaussian_field`; the same rules as
    :func:`lognormal_field` otherwise (kx = ky, kz = kv_kh kx, porosity from the normal
    score and white noise, ntg = 1). The same seed gives a different field from
    :func:`lognormal_field`.

    Parameters
    ----------
    shape, sigma_ln, correlation_lengths, kv_kh, cell_size, geometric_mean_md, porosity_mean
        As for :func:`lognormal_field`.
    seed : int
        Determines the field (``np.random.SeedSequence(seed)``).
    chunk_cells : int
        Cells per chunk, about: the chunks are slabs along x.

    Returns
    -------
    xarray.Dataset
        A field in the fine-field schema, dask-backed; write it with
        :func:`upscale.write`, which streams it chunk by chunk.
    """
    import dask.array as da

    shape, kv_kh, porosity_mean, sizes, sigma, mean = _lognormal_parameters(
        shape, kv_kh, porosity_mean, cell_size, sigma_ln, geometric_mean_md)
    lengths = _lengths(correlation_lengths, 3)
    field_seed, noise_seed = np.random.SeedSequence(seed).spawn(2)
    nx, ny, nz = shape
    chunks = (max(1, min(nx, int(chunk_cells) // max(ny * nz, 1))), ny, nz)

    def score(block, block_info=None):
        """The normal score on this chunk's cells."""
        region = tuple(slice(*loc) for loc in block_info[0]["array-location"])
        return convolved_gaussian_field(lengths, field_seed, region)

    def porosity(g, block_info=None):
        """Porosity from the chunk's score and its cells' own white noise."""
        start, stop = zip(*block_info[0]["array-location"])
        return _porosity(g, _tile_noise(noise_seed, start, stop), porosity_mean)

    g = da.map_blocks(score, da.empty(shape, chunks=chunks), dtype=float)
    k = mean * da.exp(sigma * g)
    attrs = {
        "title": "Lognormal permeability field, synthetic, made in chunks",
        "source": "upscale.gallery.synthetic.lognormal_field_in_chunks",
        "comment": _lognormal_comment(mean, sigma, lengths, ", moving average of tiled noise", kv_kh, seed),
    }
    return fine_dataset(kx=k, ky=k, kz=kv_kh * k, porosity=da.map_blocks(porosity, g, dtype=float),
                        **_uniform_sizes(shape, sizes), ntg=da.ones(shape, chunks=chunks), attrs=attrs)


def layered_field(thicknesses_m, permeabilities_md, shape_xy=(10, 10), cell_size_xy=(10.0, 10.0),
                  kv_kh=1.0, porosity=0.2) -> xr.Dataset:
    """Laterally uniform layer cake: one fine layer per entry, top first.

    Parameters
    ----------
    thicknesses_m : sequence of float
        Thickness of each layer, m (>= 0; 0 = pinched-out layer); dz is per layer (1-D).
    permeabilities_md : sequence of float
        Permeability of each layer, mD (kx = ky).
    shape_xy : tuple of int
        (nx, ny) cells laterally.
    cell_size_xy : tuple of float
        (dx, dy), m.
    kv_kh : float or sequence of float
        kz / kx, one value or one per layer.
    porosity : float or sequence of float
        One value or one per layer.

    Returns
    -------
    xarray.Dataset
        A field in the fine-field schema with ntg = 1.
    """
    thickness = np.atleast_1d(np.asarray(thicknesses_m, dtype=float))
    if thickness.ndim != 1 or thickness.size == 0:
        raise InputError(f"thicknesses_m {thicknesses_m!r}: give one thickness (m) per layer")
    nz = thickness.size
    thickness = _per_layer("thicknesses_m", thickness, nz, 0.0)
    if not np.any(thickness > 0):
        raise InputError("thicknesses_m are all 0; at least one layer must be thicker than 0 m")
    k = _per_layer("permeabilities_md", np.atleast_1d(np.asarray(permeabilities_md, dtype=float)), nz, 0.0)
    ratio = _per_layer("kv_kh", kv_kh, nz, 0.0)
    phi = _per_layer("porosity", porosity, nz, 0.0, 1.0)
    nx, ny = _shape(shape_xy, ndims=(2,))
    sizes = _cell_sizes("cell_size_xy", cell_size_xy, ("dx", "dy"))
    shape = (nx, ny, nz)
    uniform = lambda per_layer: np.broadcast_to(per_layer, shape).copy()  # noqa: E731
    attrs = {"title": "Layered field, synthetic", "source": "upscale.gallery.synthetic.layered_field",
             "comment": f"invented test data: {nz} laterally uniform layer(s)"}
    return fine_dataset(kx=uniform(k), ky=uniform(k), kz=uniform(ratio * k),
                        porosity=uniform(phi), dx=np.full(nx, sizes[0]),
                        dy=np.full(ny, sizes[1]), dz=thickness, ntg=np.ones(shape), attrs=attrs)


def channel_mask(shape, y_centre, amplitude, wavelength, phase, width, z_top, thickness) -> np.ndarray:
    """Mask of sinuous channels running along x.

    Channel c has centre line y = y_centre + amplitude sin(2 pi x / wavelength + phase)
    (cell centres at x + 0.5), a width measured across the centre line (so wider in y
    where the line is steep) and layers z_top <= z < z_top + thickness.

    Parameters
    ----------
    shape : tuple of int
        (nx, ny, nz) cells.
    y_centre, amplitude, wavelength, phase, width, z_top, thickness : array_like, shape (count,)
        One value per channel; all sizes in cells, phase in radians.

    Returns
    -------
    numpy.ndarray
        Boolean (nx, ny, nz): True in the cells of any channel.
    """
    nx, ny, nz = shape
    x = np.arange(nx) + 0.5
    y = np.arange(ny) + 0.5
    z = np.arange(nz)
    col = lambda v: np.asarray(v, dtype=float)[:, None]  # noqa: E731 - (count, 1)
    angle = 2.0 * np.pi * x[None, :] / col(wavelength) + col(phase)              # (count, nx)
    centre = col(y_centre) + col(amplitude) * np.sin(angle)
    slope = col(amplitude) * 2.0 * np.pi / col(wavelength) * np.cos(angle)
    half_width = 0.5 * col(width) * np.sqrt(1.0 + slope * slope)
    lateral = np.abs(y[None, None, :] - centre[:, :, None]) <= half_width[:, :, None]  # (count, nx, ny)
    vertical = (z[None, :] >= col(z_top)) & (z[None, :] < col(z_top) + col(thickness))  # (count, nz)
    # any over channels of lateral & vertical, as one matrix product (no (count, nx, ny, nz) array)
    hits = np.tensordot(lateral.astype(np.float32), vertical.astype(np.float32), axes=(0, 0))
    return hits > 0.5


def channel_field(shape, channel_count: int, channel_width_cells: float, seed,
                  k_channel: float = 1000.0, k_background: float = 5.0, channel_thickness_cells: int = 3,
                  amplitude_cells: float | None = None, wavelength_cells: float | None = None,
                  cell_size=(20.0, 20.0, 1.0), kv_kh_channel: float = 0.3, kv_kh_background: float = 0.1,
                  porosity_channel: float = 0.25, porosity_background: float = 0.1) -> xr.Dataset:
    """Sinuous high-permeability channels along x in a uniform low-permeability background.

    Each channel has a sine-wave centre line with random y position, phase, amplitude
    (0.5..1 x ``amplitude_cells``) and wavelength (0.7..1.3 x ``wavelength_cells``), a
    rectangular cross-section ``channel_width_cells`` wide and ``channel_thickness_cells``
    thick, at a random layer.

    Parameters
    ----------
    shape : tuple of int
        (nx, ny, nz) cells.
    channel_count : int
        Number of channels (>= 0).
    channel_width_cells : float
        Width across the centre line, cells (>= 1).
    seed : int, SeedSequence or Generator
        Determines the channels.
    k_channel, k_background : float
        Permeability of each facies, mD (kx = ky).
    channel_thickness_cells : int
        Layers of each channel, 1..nz.
    amplitude_cells, wavelength_cells : float, optional
        Scale of amplitude (default ny / 8) and wavelength (default nx / 2), cells.
    cell_size : sequence of float
        (dx, dy, dz), m.
    kv_kh_channel, kv_kh_background : float
        kz / kx of each facies.
    porosity_channel, porosity_background : float
        Porosity of each facies.

    Returns
    -------
    xarray.Dataset
        A field in the fine-field schema (ntg = 1) with a ``facies`` variable marking
        channel cells with 1, background with 0.
    """
    shape = _shape(shape, ndims=(3,))
    count, width, thickness, amplitude, wavelength = _channel_geometry(
        shape, channel_count, channel_width_cells, channel_thickness_cells, amplitude_cells, wavelength_cells)
    k_values = _per_facies("k", k_background, k_channel)
    ratios = _per_facies("kv_kh", kv_kh_background, kv_kh_channel)
    phis = _per_facies("porosity", porosity_background, porosity_channel, high=1.0)
    sizes = _cell_sizes("cell_size", cell_size, ("dx", "dy", "dz"))
    facies = _random_channels(shape, count, width, thickness, amplitude, wavelength, seed).astype(np.int8)
    kh = k_values[facies]
    attrs = {"title": "Channel field, synthetic", "source": "upscale.gallery.synthetic.channel_field",
             "comment": (f"invented test data: {count} sinuous channel(s), {width:g} cells wide, "
                         f"{thickness} cells thick, seed {seed!r}")}
    ds = fine_dataset(kx=kh, ky=kh.copy(), kz=ratios[facies] * kh, porosity=phis[facies],
                      **_uniform_sizes(shape, sizes), ntg=np.ones(shape), attrs=attrs)
    ds["facies"] = xr.Variable(AXES, facies, {"long_name": "facies code", "flag_values": np.array([0, 1], np.int8),
                                              "flag_meanings": "background channel_sand"})
    return ds


def _whole(name: str, value) -> int:
    """``value`` as an int, refused unless it is a whole number."""
    try:
        return operator.index(value)
    except TypeError:
        raise InputError(f"{name} {value!r} must be a whole number") from None


def _channel_geometry(shape, channel_count, channel_width_cells, channel_thickness_cells, amplitude_cells,
                      wavelength_cells) -> tuple[int, float, int, float, float]:
    """Checked channel count (>= 0), width (cells, >= 1), thickness (layers, 1..nz) and
    the scales of amplitude (>= 0, default ny / 8) and wavelength (> 0, default nx / 2)."""
    nx, ny, nz = shape
    count = _whole("channel_count", channel_count)
    if count < 0:
        raise InputError(f"channel_count {channel_count!r} must be >= 0")
    width = _number("channel_width_cells", channel_width_cells, low=1.0)
    thickness = _whole("channel_thickness_cells", channel_thickness_cells)
    if not 1 <= thickness <= nz:
        raise InputError(f"channel_thickness_cells = {thickness} must be between 1 and nz = {nz}")
    amplitude = _number("amplitude_cells", ny / 8 if amplitude_cells is None else amplitude_cells, low=0.0)
    wavelength = _number("wavelength_cells", nx / 2 if wavelength_cells is None else wavelength_cells,
                         low=0.0, low_open=True)
    return count, width, thickness, amplitude, wavelength


def _per_facies(name: str, background, channel, high: float | None = None) -> np.ndarray:
    """Checked values (>= 0, <= ``high``) of ``name``_background and ``name``_channel,
    indexed by facies code (0 background, 1 channel)."""
    return np.asarray([_number(f"{name}_{facies}", value, low=0.0, high=high)
                       for facies, value in (("background", background), ("channel", channel))])


def _random_channels(shape, count: int, width: float, thickness: int, amplitude: float, wavelength: float,
                     seed) -> np.ndarray:
    """The channel mask of :func:`channel_field`: random y position, amplitude,
    wavelength, phase and top layer of each channel, drawn in that order from ``seed``."""
    _, ny, nz = shape
    rng = np.random.default_rng(seed)
    return channel_mask(shape,
                        y_centre=rng.uniform(0.0, ny, count),
                        amplitude=amplitude * rng.uniform(0.5, 1.0, count),
                        wavelength=wavelength * rng.uniform(0.7, 1.3, count),
                        phase=rng.uniform(0.0, 2.0 * np.pi, count),
                        width=np.full(count, width),
                        z_top=rng.integers(0, nz - thickness + 1, count),
                        thickness=np.full(count, thickness))
