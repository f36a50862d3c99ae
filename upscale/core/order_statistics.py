"""Exact percentiles of samples that arrive slab by slab, in a few passes (radix selection).

A field larger than memory is read in slabs, so its samples can never be sorted at once.
Every float64 sample is given a 64-bit key that sorts as the value does
(:func:`sort_keys`). A :class:`StepSearch` looks for one position of the cumulative weight
of the sorted samples (a rank, when the samples are counted): each pass over the slabs
histograms the next 16 bits of the keys in the bin that holds the position, and the bin
narrows, until it holds few enough samples to be collected and sorted, or a single value.
Each pass also finds the largest sample below the bin and the smallest above it, with
their weights, so the search ends with the sorted distinct values around the position
(:class:`Neighbourhood`): enough for any interpolated percentile, which is then computed
exactly as from all samples sorted (:func:`linear_percentile`, :func:`hazen_percentile`).

Counts are exact (integers); weights are summed in floating point, so a weighted
position is exact to round-off of those sums. A search takes two passes when its bin
holds at most ``limit`` samples after the first, and one more per 16 bits otherwise
(three for 1e8 samples of a continuous distribution). :class:`Searches` runs many at
once, sharing what searches of the same samples and the same bin need.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

STEP_BITS = 16


BINS = 1 << STEP_BITS


#: samples of a bin collected and sorted rather than narrowed further
COLLECT_LIMIT = 1 << 16


TOP = np.uint64(1 << 63)


def sort_keys(values) -> np.ndarray:
    """uint64 keys that sort as the float64 ``values`` do (-0.0 counts as 0.0; no NaN)."""
    bits = (np.asarray(values, dtype=np.float64) + 0.0).view(np.uint64)  # a new array, changed in place
    flip = bits >> np.uint64(63)
    np.negative(flip, out=flip)   # all ones for a negative value (its order reversed), else 0
    flip |= TOP
    bits ^= flip
    return bits


def key_values(keys) -> np.ndarray:
    """The float64 values of :func:`sort_keys` keys."""
    keys = np.asarray(keys, dtype=np.uint64)
    return np.where(keys & TOP, keys & ~TOP, ~keys).view(np.float64)


@dataclass(frozen=True)
class Neighbourhood:
    """Sorted distinct sample values around a position of the cumulative weight.

    Attributes
    ----------
    values : ndarray
        Distinct values, increasing: every value of the searched bin, and the nearest
        value below and above it (where there is one).
    weights : ndarray
        The total weight (count) of the samples of each value.
    before : ndarray
        The total weight of all samples below each value.
    total : float
        The total weight of all samples.
    """

    values: np.ndarray
    weights: np.ndarray
    before: np.ndarray
    total: float


class KeyBin:
    """What one pass learns about the samples whose keys share their first ``depth`` bits.

    Parameters
    ----------
    depth : int
        Bits fixed, 0 (every sample) to 64 (one value).
    prefix : int
        The value of those bits.
    collect : bool
        Keep the bin's keys and weights (else histogram its next 16 bits).
    """

    def __init__(self, depth: int, prefix: int, collect: bool):
        self.depth, self.prefix, self.collect = depth, prefix, collect
        self.low = prefix << (64 - depth) if depth else 0
        self.high = self.low | ((1 << (64 - depth)) - 1)  # inclusive
        self.histogram = np.zeros(BINS)
        self.kept: list[tuple[np.ndarray, np.ndarray]] = []
        self.smallest = self.largest = None
        self.below = self.above = None  # (key, weight) of the nearest samples outside

    def feed(self, keys: np.ndarray, weights: np.ndarray | None) -> None:
        """One slab's samples: keys (:func:`sort_keys`) and weights (None: counted)."""
        if self.depth:
            below, above = keys < np.uint64(self.low), keys > np.uint64(self.high)
            self.below = _nearest(self.below, keys, weights, below, np.max, max)
            self.above = _nearest(self.above, keys, weights, above, np.min, min)
            inside = ~(below | above)
            keys = keys[inside]
            weights = None if weights is None else weights[inside]
        if keys.size == 0:
            return
        if self.collect:
            self.kept.append((keys, np.ones(keys.size) if weights is None else weights))
            return
        shift = np.uint64(64 - self.depth - STEP_BITS)
        digits = ((keys >> shift) & np.uint64(BINS - 1)).astype(np.intp)
        self.histogram += np.bincount(digits, weights=weights, minlength=BINS)
        low, high = keys.min(), keys.max()
        self.smallest = low if self.smallest is None else min(self.smallest, low)
        self.largest = high if self.largest is None else max(self.largest, high)


def _nearest(best, keys, weights, mask, reduce, pick):
    """The nearest key among ``keys[mask]`` (``reduce`` = np.max below, np.min above) merged
    with ``best`` (key, weight): the weight is that of all samples with the key."""
    if not mask.any():
        return best
    key = reduce(keys, where=mask, initial=np.uint64(0) if reduce is np.max else ~np.uint64(0))
    if best is not None and pick(best[0], key) != key:
        return best
    equal = keys == key
    weight = float(np.count_nonzero(equal)) if weights is None else float(np.sum(weights, where=equal))
    if best is not None and best[0] == key:
        weight += best[1]
    return key, weight


class StepSearch:
    """The search, over passes, for the samples around one position of the cumulative weight.

    Parameters
    ----------
    position : callable
        ``position(total)``: the position wanted, given the total weight (count) of the
        samples, known after the first pass; the search ends around the value whose
        samples span it (the last value if it is the total).
    limit : int
        A bin of at most this many samples is collected.
    """

    def __init__(self, position, limit: int = COLLECT_LIMIT):
        self.position, self.limit = position, limit
        self.depth, self.prefix, self.below, self.count = 0, 0, 0.0, None
        self.total = self.target = None
        self.neighbourhood: Neighbourhood | None = None

    @property
    def done(self) -> bool:
        return self.neighbourhood is not None

    def bin_key(self) -> tuple[int, int, bool]:
        """(depth, prefix, collect) of the bin this pass must learn about."""
        collect = self.count is not None and (self.count <= self.limit or self.depth == 64)
        return self.depth, self.prefix, collect

    def learn(self, found: KeyBin, counts: KeyBin | None) -> None:
        """End of a pass: narrow the bin, or finish. ``counts``: the same bin's sample
        counts when ``found`` holds weights (None when the samples are counted)."""
        if self.total is None:
            self.total = float(found.histogram.sum())
            self.target = float(self.position(self.total))
        if self.total == 0:  # no sample
            empty = np.zeros(0)
            self.neighbourhood = Neighbourhood(values=empty, weights=empty, before=empty, total=0.0)
            return
        if found.collect or (found.smallest is not None and found.smallest == found.largest):
            self.neighbourhood = self._finish(found)
            return
        cumulative = self.below + np.cumsum(found.histogram)
        digit = int(np.searchsorted(cumulative, self.target, side="right"))
        digit = min(digit, int(np.flatnonzero(found.histogram)[-1]))  # the total itself: the last value
        self.below = float(cumulative[digit] - found.histogram[digit])
        self.count = (counts or found).histogram[digit]
        self.depth += STEP_BITS
        self.prefix = (self.prefix << STEP_BITS) | digit

    def _finish(self, found: KeyBin) -> Neighbourhood:
        """The bin's distinct values with those just outside it."""
        if found.collect and found.kept:
            keys = np.concatenate([k for k, _ in found.kept])
            distinct, index = np.unique(keys, return_inverse=True)
            weights = np.bincount(index.ravel(), weights=np.concatenate([w for _, w in found.kept]))
        elif found.collect:
            distinct, weights = np.zeros(0, dtype=np.uint64), np.zeros(0)
        else:  # one value fills the bin
            distinct, weights = np.array([found.smallest], dtype=np.uint64), np.array([found.histogram.sum()])
        before = self.below + np.concatenate([[0.0], np.cumsum(weights)[:-1]])
        parts = [(distinct, weights, before)]
        if found.below is not None:
            parts.insert(0, (np.array([found.below[0]]), np.array([found.below[1]]), np.array([self.below - found.below[1]])))
        if found.above is not None:
            parts.append((np.array([found.above[0]]), np.array([found.above[1]]), np.array([self.below + weights.sum()])))
        keys, weights, before = (np.concatenate(column) for column in zip(*parts))
        return Neighbourhood(values=key_values(keys.astype(np.uint64)), weights=weights, before=before,
                             total=self.total)


class Searches:
    """Many :class:`StepSearch` over named streams of samples, run in the same passes.

    Searches of one stream that need the same bin in a pass share one :class:`KeyBin`.
    Each pass: :meth:`start_pass`, then :meth:`feed` every slab of every stream in
    :meth:`streams`, then :meth:`end_pass`, until :attr:`done`.
    """

    def __init__(self):
        self.searches: dict[str, tuple[str, bool, StepSearch]] = {}
        self.bins: dict[tuple, KeyBin] = {}

    def add(self, label: str, stream: str, position, counted: bool, limit: int = COLLECT_LIMIT) -> None:
        """A search named ``label`` in ``stream`` (counted: no weights)."""
        self.searches[label] = (stream, counted, StepSearch(position, limit))

    @property
    def done(self) -> bool:
        return all(search.done for _, _, search in self.searches.values())

    def streams(self) -> set[str]:
        """The streams some search still reads."""
        return {stream for stream, _, search in self.searches.values() if not search.done}

    def start_pass(self) -> None:
        self.bins = {}
        for stream, counted, search in self.searches.values():
            if not search.done:
                key = search.bin_key()
                self.bins.setdefault((stream, counted) + key, KeyBin(*key))
                if not counted and not key[2]:  # narrowing a weighted search needs the sample counts too
                    self.bins.setdefault((stream, True) + key[:2] + (False,), KeyBin(*key[:2], False))

    def feed(self, stream: str, keys: np.ndarray, weights: np.ndarray) -> None:
        """One slab of ``stream``: its keys and weights."""
        for (name, counted, *_), found in self.bins.items():
            if name == stream:
                found.feed(keys, None if counted else weights)

    def end_pass(self) -> None:
        for stream, counted, search in self.searches.values():
            if not search.done:
                key = search.bin_key()
                counts = None if counted or key[2] else self.bins[(stream, True) + key[:2] + (False,)]
                search.learn(self.bins[(stream, counted) + key], counts)
        self.bins = {}

    def result(self, label: str) -> Neighbourhood:
        return self.searches[label][2].neighbourhood


def rank_of(q: float):
    """The position of numpy's 'linear' percentile ``q`` (percent): the rank
    floor((n - 1) q / 100) of its lower sample, as a function of the count n."""
    return lambda total: min(np.floor((total - 1) * (q / 100.0)), max(total - 1, 0))


def _value_at_rank(near: Neighbourhood, rank: float) -> float:
    """The sample of 0-based rank ``rank`` (counted samples)."""
    index = int(np.searchsorted(near.before + near.weights, rank, side="right"))
    return float(near.values[min(index, near.values.size - 1)])


def linear_percentile(near: Neighbourhood, q: float) -> float:
    """numpy's default ('linear') percentile ``q`` (percent) of counted samples, with
    numpy's own arithmetic (so equal to ``numpy.percentile`` of all samples).

    Parameters
    ----------
    near : Neighbourhood
        Of the position :func:`rank_of` (q), counted samples.
    q : float

    Returns
    -------
    float
        NaN without samples.
    """
    n = int(near.total)
    if n == 0:
        return float("nan")
    virtual = (n - 1) * (q / 100.0)
    previous = min(int(np.floor(virtual)), n - 1)
    a, b = _value_at_rank(near, previous), _value_at_rank(near, min(previous + 1, n - 1))
    gamma = virtual - previous
    difference = b - a
    return b - difference * (1 - gamma) if gamma >= 0.5 else a + difference * gamma


def share_of(q: float):
    """The position of the weighted percentile ``q`` (percent): q / 100 of the total weight."""
    return lambda total: total * (q / 100.0)


def hazen_percentile(near: Neighbourhood, q: float) -> float:
    """The weighted percentile ``q`` of :func:`upscale.core.heterogeneity.weighted_percentile`
    (midpoint plotting positions, linear between them).

    Parameters
    ----------
    near : Neighbourhood
        Of the position :func:`share_of` (q).
    q : float
        Percent.

    Returns
    -------
    float
        NaN without samples.
    """
    if near.total <= 0 or near.values.size == 0:
        return float("nan")
    position = (near.before + near.weights / 2) / near.total
    return float(np.interp(q / 100.0, position, near.values))


class Percentiles:
    """Percentiles of one stream of samples read slab by slab, exact (see the module notes),
    with the count, sum, least and largest sample on the way.

    Parameters
    ----------
    q : sequence of float
        Percent, 0..100.
    method : str
        'linear' (numpy's default; counted samples) or 'hazen' (:func:`hazen_percentile`).
    weighted : bool
        Samples carry weights (else each counts once).
    limit : int, optional
        See :class:`StepSearch`; default :data:`COLLECT_LIMIT`.

    Each pass, :meth:`feed` every slab, then :meth:`end_pass`, until :attr:`done`;
    :func:`in_one_slab` does so for samples held in memory.
    """

    def __init__(self, q, method: str = "linear", weighted: bool = False, limit: int | None = None):
        if method not in ("linear", "hazen") or (method == "linear" and weighted):
            raise ValueError(f"percentile method {method!r} with weights={weighted} is not offered")
        self.q, self.method, self.weighted = [float(v) for v in q], method, weighted
        self.searches = Searches()
        position = rank_of if method == "linear" else share_of
        for value in self.q:
            self.searches.add(str(value), "samples", position(value), counted=not weighted,
                              limit=COLLECT_LIMIT if limit is None else limit)
        self.searches.start_pass()
        self.passes, self.count, self.sum = 0, 0, 0.0
        self.minimum = self.maximum = None

    def feed(self, values: np.ndarray, weights: np.ndarray | None = None) -> None:
        """One slab's samples (1-D, finite) and, when weighted, their weights (> 0)."""
        if self.passes == 0 and values.size:
            self.count += values.size
            self.sum += float(values.sum())
            low, high = float(values.min()), float(values.max())
            self.minimum = low if self.minimum is None else min(self.minimum, low)
            self.maximum = high if self.maximum is None else max(self.maximum, high)
        if not self.searches.done:
            self.searches.feed("samples", sort_keys(values), weights)

    def end_pass(self) -> None:
        self.passes += 1
        if not self.searches.done:
            self.searches.end_pass()
            self.searches.start_pass()

    @property
    def done(self) -> bool:
        return self.passes > 0 and self.searches.done

    def result(self) -> np.ndarray:
        """The percentiles, in the order of ``q`` (NaN without samples)."""
        percentile = linear_percentile if self.method == "linear" else hazen_percentile
        return np.array([percentile(self.searches.result(str(v)), v) for v in self.q])


def in_one_slab(measure, *arrays):
    """Run a slab-by-slab ``measure`` (``feed``, ``end_pass``, ``done``) on arrays held in
    memory, as one slab each pass, and return it."""
    while not measure.done:
        measure.feed(*arrays)
        measure.end_pass()
    return measure
