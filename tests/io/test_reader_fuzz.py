"""Fuzzing ``upscale.open_field``: whatever the bytes or header values of a file, the outcome
is a validated Dataset or an ``InputError`` -- never another exception, never a crash or a hang.

Two sources of bad files: (1) byte-level mutations (bit flips, overwritten or zeroed
ranges, 32-bit integers planted in the header, truncation) of a small valid file, in the
netCDF-4 (HDF5) format the tool writes and in the classic format; (2) files written
through netCDF4 with odd but writable header values: dimensions of size 0, odd units and
types, variables on the wrong dimensions, decoding attributes (_FillValue, scale_factor,
missing_value, valid_range) with odd values.

Corrupt files can make the NetCDF/HDF5 libraries segfault, loop forever or allocate
gigabytes while opening them (all were seen here); ``open_field`` opens the header in a
time- and memory-limited child first (``upscale.field._probe_header``). The tests lower
its time limit so that a hang costs about a second.
"""

from __future__ import annotations

import faulthandler
import math
import os
from collections import Counter
from pathlib import Path

import netCDF4
import numpy as np
import pytest
import xarray as xr
from hypothesis import HealthCheck, event, example, given, reject, settings
from hypothesis import strategies as st

import upscale
from upscale.io import reading
from upscale.io.validation import validate

# No per-example deadline: timing on a loaded CI box is noisy; hangs are caught by the probe
# time limit below and by the watchdog.
FUZZ = settings(deadline=None, max_examples=60, suppress_health_check=[HealthCheck.too_slow])
FORMATS = ("NETCDF4", "NETCDF3_CLASSIC")
SHAPE = (3, 4, 5)
PROBE_SECONDS = 1.0   # for these tests: a file the library cannot open within 1 s counts as corrupt
WATCHDOG_SECONDS = 120  # a hang outside the probe kills the run with tracebacks instead of hanging it


@pytest.fixture(scope="module", autouse=True)
def short_probe():
    saved = reading.PROBE_SECONDS
    reading.PROBE_SECONDS = PROBE_SECONDS
    faulthandler.dump_traceback_later(WATCHDOG_SECONDS, exit=True)
    try:
        yield
    finally:
        faulthandler.cancel_dump_traceback_later()
        reading.PROBE_SECONDS = saved


@pytest.fixture(scope="module")
def scratch(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("fuzz")


@pytest.fixture(scope="module")
def base_bytes(scratch, small_fine_factory) -> dict[str, bytes]:
    """The bytes of the small valid fine field, per format (the files netCDF4 writes are reproducible)."""
    out = {}
    for fmt in FORMATS:
        path = scratch / f"base_{fmt}.nc"
        small_fine_factory(shape=SHAPE).to_netcdf(path, format=fmt, engine="netcdf4")
        out[fmt] = path.read_bytes()
    return out


def check_outcome(path: Path) -> str:
    """open_field(path) gives a validated Dataset or raises InputError (which passes); the
    outcome, "dataset" or "refused"."""
    try:
        ds = upscale.open_field(path)
    except upscale.InputError as exc:
        message = str(exc)
        assert message and "\n" not in message.strip(), repr(message)
        return "refused"
    assert isinstance(ds, xr.Dataset)
    for name in ("dx", "dy", "dz", "kx", "ky", "kz", "porosity", "ntg", "active"):
        assert name in ds
    assert ds["kx"].dims == ("x", "y", "z") and ds["dz"].dims == ("x", "y", "z")
    active = ds["active"].values.astype(bool)
    assert active.any()
    for name in ("kx", "ky", "kz", "porosity", "ntg"):
        values = ds[name].values
        assert np.isfinite(values).all() and (values >= 0).all(), name
    assert (ds["porosity"].values <= 1).all() and (ds["ntg"].values <= 1).all()
    assert np.isfinite(ds["dx"].values).all() and (ds["dx"].values > 0).all()
    validate(ds)  # a validated field stays valid
    return "dataset"


# ----------------------------------------------------------------------------- byte mutations

INTERESTING_INT32 = (0, 1, 0x7FFFFFFF, 0x80000000, 0xFFFFFFFF, 0x80000003, 0x40000000, 1_000_000, 255)


# Positions are taken modulo the file size; the classic header is the first ~1.2 kB and the
# netCDF-4 metadata the first ~5 kB of the files used here: most mutations aim there.
WHERE = st.one_of(st.integers(0, 1199), st.integers(0, 5999), st.integers(0, 1 << 16))
OPERATION = st.one_of(
    st.tuples(st.just("flip"), WHERE, st.integers(0, 7)),
    st.tuples(st.just("overwrite"), WHERE, st.binary(min_size=1, max_size=32)),
    st.tuples(st.just("zero"), WHERE, st.integers(1, 256)),
    st.tuples(st.just("int32"), WHERE, st.sampled_from(INTERESTING_INT32)),
    st.tuples(st.just("truncate"), WHERE),
)
MUTATIONS = st.tuples(st.sampled_from(FORMATS), st.lists(OPERATION, min_size=1, max_size=4))


def mutate(data: bytes, operations) -> bytes:
    out = bytearray(data)
    for op, *args in operations:
        if not out:
            break
        pos = args[0] % len(out)
        if op == "truncate":
            del out[pos:]
            continue
        if op == "flip":
            out[pos] ^= 1 << args[1]
        elif op == "overwrite":
            out[pos:pos + len(args[1])] = args[1]
        elif op == "zero":
            end = min(len(out), pos + args[1])
            out[pos:end] = bytes(end - pos)
        elif op == "int32":
            pos -= pos % 4
            out[pos:pos + 4] = args[1].to_bytes(4, "big")
    return bytes(out)


@FUZZ
@given(MUTATIONS)
# Regressions seen while fuzzing (netCDF-C 4.10.1, HDF5 2.2.0): the dimension count of a
# classic header made huge (the library segfaulted), and one byte of the HDF5 metadata
# changed (the library looped forever opening the file).
@example(("NETCDF3_CLASSIC", [("overwrite", 12, b"\x80")]))
@example(("NETCDF3_CLASSIC", [("int32", 12, 0x7FFFFFFF)]))
@example(("NETCDF4", [("overwrite", 4552, b"\x80")]))
@example(("NETCDF4", [("zero", 4280, 1)]))
@example(("NETCDF4", [("truncate", 100)]))
def test_mutated_bytes(scratch, base_bytes, case):
    fmt, operations = case
    path = scratch / "mutated.nc"
    path.write_bytes(mutate(base_bytes[fmt], operations))
    check_outcome(path)


# ----------------------------------------------------------------------------- odd headers

CANONICAL = {"dx": ("x",), "dy": ("y",), "dz": ("z",), "kx": ("x", "y", "z"), "ky": ("x", "y", "z"),
             "kz": ("x", "y", "z"), "porosity": ("x", "y", "z"), "ntg": ("x", "y", "z"),
             "active": ("x", "y", "z")}
GOOD = {"dx": 20.0, "dy": 10.0, "dz": 2.0, "kx": 100.0, "ky": 100.0, "kz": 10.0, "porosity": 0.2,
        "ntg": 0.9, "active": 1}
GOOD_UNITS = {"dx": "m", "dy": "m", "dz": "m", "kx": "mD", "ky": "mD", "kz": "mD", "porosity": "1", "ntg": "1"}
ODD_UNITS = st.one_of(
    st.sampled_from(["m", "ft", "FT", " metre ", "mD", "D", "darcy", "furlong", "", "1", "%",
                     "days since 2000-01-01", "seconds", "hours since 1970-01-01 00:00", "µm", "m2", "nan"]),
    st.text(max_size=12))
ODD_VALUES = st.sampled_from([0.0, 1.0, -1.0, 0.5, 2.0, 1e30, -1e30, math.nan, math.inf, -math.inf, 1e-300, 3.0])
DTYPES = ("f8", "f4", "i4", "i2", "i1", "u1", "i8", "S1")
DECODING = st.sampled_from(["_FillValue", "missing_value", "scale_factor", "add_offset", "valid_range",
                            "valid_min", "calendar", "coordinates", "units"])


@st.composite
def odd_headers(draw):
    """A description of a file (format, dimension sizes, variables with dims, dtype, value,
    one odd cell and attributes, a renamed variable, global attributes): the valid small
    field with zero to four odd changes."""
    fmt = draw(st.sampled_from(FORMATS + ("NETCDF3_64BIT_OFFSET",)))
    sizes = dict(zip("xyz", SHAPE))
    extra_dim, rename, global_attrs = None, None, {}
    variables = {n: [CANONICAL[n], "f8", GOOD[n], None, {"units": GOOD_UNITS[n]} if n in GOOD_UNITS else {}]
                 for n in CANONICAL}
    names = st.sampled_from(sorted(CANONICAL))
    for change in draw(st.lists(st.sampled_from(["size", "extra_dim", "drop", "dims", "dtype", "value", "cell",
                                                 "units", "decoding", "rename", "global"]), max_size=4)):
        if change == "size":
            sizes[draw(st.sampled_from("xyz"))] = draw(st.sampled_from([0, 1, 2]))  # 0: unlimited, no records
        elif change == "extra_dim":
            extra_dim = draw(st.sampled_from([("w", 0), ("w", 3), ("x2", SHAPE[0])]))
        elif change == "drop":
            variables.pop(draw(names), None)
        elif change == "rename":
            rename = draw(st.sampled_from([("kx", "perm"), ("porosity", "phi"), ("dz", "thickness"), ("kx", "k")]))
        elif change == "global":
            global_attrs[draw(st.sampled_from(["source_path", "title", "Conventions", "units"]))] = draw(
                st.one_of(st.text(max_size=8), ODD_VALUES))
        else:
            var = variables.get(draw(names))
            if var is None:
                continue
            if change == "dims":
                pool = ["x", "y", "z"] + ([extra_dim[0]] if extra_dim else [])
                var[0] = tuple(draw(st.lists(st.sampled_from(pool), max_size=3, unique=True)))
            elif change == "dtype":
                var[1] = draw(st.sampled_from(DTYPES))
            elif change == "value":
                var[2] = draw(ODD_VALUES)
            elif change == "cell":
                var[3] = draw(ODD_VALUES)
            elif change == "units":
                var[4]["units"] = draw(ODD_UNITS)
            else:
                var[4][draw(DECODING)] = draw(st.one_of(ODD_VALUES, st.text(max_size=8),
                                                        st.lists(ODD_VALUES, min_size=0, max_size=3)))
    return fmt, sizes, extra_dim, {n: tuple(v) for n, v in variables.items()}, rename, global_attrs


def write_header_case(path: Path, case) -> bool:
    """Write the described file with netCDF4; False if the library refuses (or fails) to write it.

    The writing happens in a forked child: some odd headers make the netCDF4 library corrupt
    memory while writing, which must not crash the test process.
    """
    pid = os.fork()
    if pid == 0:
        code = 1
        try:
            null = os.open(os.devnull, os.O_WRONLY)
            os.dup2(null, 1)
            os.dup2(null, 2)
            code = 0 if _write_header_case(path, case) else 1
        finally:
            os._exit(code)
    _, status = os.waitpid(pid, 0)
    if os.waitstatus_to_exitcode(status) != 0:
        path.unlink(missing_ok=True)
        return False
    return True


def _write_header_case(path: Path, case) -> bool:
    fmt, sizes, extra_dim, variables, rename, global_attrs = case
    dim_sizes = dict(sizes)
    if extra_dim:
        dim_sizes[extra_dim[0]] = extra_dim[1]
    try:
        with netCDF4.Dataset(path, "w", format=fmt) as nc:
            nc.set_auto_maskandscale(False)
            for dim, n in dim_sizes.items():
                nc.createDimension(dim, n if n > 0 else None)  # size 0: an unlimited dimension, no records
            for name, (dims, dtype, value, odd_cell, attrs) in variables.items():
                if rename and name == rename[0]:
                    name = rename[1]
                fill = attrs.pop("_FillValue", None)
                var = nc.createVariable(name, dtype, dims, fill_value=fill)
                for key, attr in attrs.items():
                    var.setncattr(key, attr)
                shape = tuple(dim_sizes[d] for d in dims)
                if dtype == "S1":
                    data = np.full(shape, b"a", dtype="S1")
                else:
                    with np.errstate(all="ignore"):
                        data = np.full(shape, value).astype(dtype)
                        if odd_cell is not None and data.size:
                            data.flat[data.size // 2] = np.asarray(odd_cell).astype(dtype)
                if data.size:
                    var[...] = data
            for key, attr in global_attrs.items():
                nc.setncattr(key, attr)
    except Exception:
        return False
    return True


VALID_HEADER = ("NETCDF4", dict(zip("xyz", SHAPE)), None,
                {n: (CANONICAL[n], "f8", GOOD[n], None, {"units": GOOD_UNITS[n]} if n in GOOD_UNITS else {})
                 for n in CANONICAL}, None, {})


def test_odd_header_values(scratch):
    """Odd but writable headers are read into a validated field or refused by name. Headers
    that netCDF4 itself cannot write are rejected (hypothesis draws another in their place)
    and counted; hypothesis gives up quietly, with fewer cases, when it must reject too
    many, so the cases actually read are counted and must be at least max_examples. Both
    outcomes must occur: the explicit examples guarantee it (the unchanged header is valid;
    a dimension of size 0, time units on dx and a text porosity are refused)."""
    outcomes = Counter()

    @FUZZ
    @given(odd_headers())
    @example(VALID_HEADER)
    @example(("NETCDF4", {"x": 0, "y": 4, "z": 5}, None,
              {n: (CANONICAL[n], "f8", GOOD[n], None, {"units": GOOD_UNITS.get(n, "1")}) for n in CANONICAL},
              None, {}))
    @example(("NETCDF4", dict(zip("xyz", SHAPE)), None,
              {n: (CANONICAL[n], "f8", GOOD[n], None,
                   {"units": "days since 2000-01-01" if n == "dx" else GOOD_UNITS.get(n, "1")}) for n in CANONICAL},
              None, {}))
    @example(("NETCDF4", dict(zip("xyz", SHAPE)), None,
              {n: (CANONICAL[n], "S1" if n == "porosity" else "f8", GOOD[n], None, {}) for n in CANONICAL},
              None, {}))
    def read_odd_header(case):
        path = scratch / "odd.nc"
        if path.exists():
            os.unlink(path)
        outcomes["generated"] += 1
        if not write_header_case(path, case):
            outcomes["not writable"] += 1
            event("header not writable by netCDF4")
            reject()
        outcome = check_outcome(path)
        outcomes[outcome] += 1
        event(f"read: {outcome}")

    read_odd_header()
    read = outcomes["dataset"] + outcomes["refused"]
    assert read >= FUZZ.max_examples, dict(outcomes)
    assert outcomes["dataset"] >= 1 and outcomes["refused"] >= 1, dict(outcomes)


def test_unmutated_files_open(scratch, base_bytes):
    """Sanity: the fuzzing starts from files that are valid in every format used."""
    for fmt in FORMATS:
        path = scratch / f"valid_{fmt}.nc"
        path.write_bytes(base_bytes[fmt])
        ds = upscale.open_field(path)
        assert ds.sizes["x"] == SHAPE[0] and ds.sizes["z"] == SHAPE[2]
