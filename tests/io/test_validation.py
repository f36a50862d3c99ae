"""Validating a field that is already normalised: the cheap pass must judge as the full rules do."""

import numpy as np
import pytest

from upscale.errors import InputError
from upscale.io.schema import fine_dataset
from upscale.io.validation import validate

SHAPE = (4, 3, 5)


def normalised():
    """A validated field with flagged-inactive and pinched cells."""
    rng = np.random.default_rng(2)
    dz = rng.uniform(0.5, 2.0, SHAPE)
    dz[1, 1, 1] = 0.0
    active = np.ones(SHAPE, dtype=np.int8)
    active[2, 0, 3] = 0
    kx = np.exp(rng.normal(3.0, 1.0, SHAPE))
    return validate(fine_dataset(kx, 0.5 * kx, 0.1 * kx, rng.uniform(0.1, 0.3, SHAPE), rng.uniform(5, 9, 4),
                                 rng.uniform(5, 9, 3), dz, ntg=rng.uniform(0.5, 1.0, SHAPE), active=active))


def _set(ds, name, index, value):
    out = ds.copy(deep=True)
    out[name].values[index] = value
    return out


def _cast(ds, name, dtype):
    out = ds.copy(deep=True)
    out[name] = out[name].astype(dtype)
    return out


TAMPERED = {
    "untouched": lambda ds: ds.copy(deep=True),
    "negative kx in an active cell": lambda ds: _set(ds, "kx", (0, 0, 0), -1.0),
    "NaN porosity in an active cell": lambda ds: _set(ds, "porosity", (3, 2, 4), np.nan),
    "infinite kz in an active cell": lambda ds: _set(ds, "kz", (1, 2, 0), np.inf),
    "ntg above 1": lambda ds: _set(ds, "ntg", (0, 1, 2), 1.5),
    "NaN in an inactive cell": lambda ds: _set(ds, "ky", (2, 0, 3), np.nan),
    "a value in an inactive cell": lambda ds: _set(ds, "kx", (1, 1, 1), 7.0),
    "zero dz in an active cell": lambda ds: _set(ds, "dz", (0, 2, 2), 0.0),
    "negative dz": lambda ds: _set(ds, "dz", (0, 2, 2), -1.0),
    "active flag 2": lambda ds: _set(ds, "active", (0, 0, 1), 2),
    "zero dx": lambda ds: _set(ds, "dx", 1, 0.0),
    "float32 kx": lambda ds: _cast(ds, "kx", np.float32),
    "no active cell": lambda ds: _set(ds, "active", (slice(None),) * 3, 0),
}


def _outcome(ds):
    """The validated data (as numpy arrays), or the refusal's message."""
    try:
        out = validate(ds)
    except InputError as error:
        return str(error)
    return {name: out[name].values for name in out.data_vars}


@pytest.mark.parametrize("change", sorted(TAMPERED))
def test_a_normalised_field_is_judged_as_by_the_full_rules(change):
    # The reference is the full set of rules, forced by dropping the mark that the field
    # was normalised before: the same refusal (word for word), or the same data exactly.
    ds = TAMPERED[change](normalised())
    forced = ds.copy()
    forced.attrs = {k: v for k, v in ds.attrs.items() if k != "length_units_in"}
    expected, got = _outcome(forced), _outcome(ds)
    if isinstance(expected, str):
        assert got == expected, change
        return
    assert not isinstance(got, str), got
    assert sorted(got) == sorted(expected)
    for name in expected:
        np.testing.assert_array_equal(got[name], expected[name], err_msg=f"{change}: {name}")
        assert got[name].dtype == expected[name].dtype, (change, name)


def test_a_normalised_field_that_passes_is_returned_as_it_is():
    ds = normalised()
    assert validate(ds) is ds
    # a lazy normalised field still goes through the rules chunk by chunk
    lazy = ds.chunk({"x": 2})
    assert validate(lazy) is not lazy and isinstance(validate(lazy)["kx"].data, type(lazy["kx"].data))
    # a coordinate added by the user: the full rules (which drop it) run
    with_coords = ds.assign_coords(x=np.arange(SHAPE[0]))
    assert validate(with_coords) is not with_coords
