"""Fine and coarse field files: schema, reading, validation, unit conversion, writing.

A field is an xarray Dataset on dimensions (x, y, z), z counting layers from the top.
After :func:`open_field` (or :func:`validate`) a field is *normalised*: sizes are in
metres, ``dz`` is three-dimensional, ``kx``, ``ky``, ``kz`` (mD), ``porosity``, ``ntg``
and ``active`` are all present, and inactive cells hold zeros instead of fill values.
"""

from __future__ import annotations

import hashlib
import os
import select
import signal
import sys
import tempfile
import threading
import warnings
from contextlib import contextmanager, nullcontext
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import xarray as xr

from .errors import InputError
from .units import LENGTH_TO_M, PERMEABILITY_TO_MD

DIMS = ("x", "y", "z")
PERMEABILITY = ("kx", "ky", "kz")
CELL_VALUES = PERMEABILITY + ("porosity", "ntg")


@dataclass(frozen=True)
class FineArrays:
    """A normalised field as plain numpy arrays, shapes (nx, ny, nz) unless noted.

    dx (nx,), dy (ny,), dz: cell sizes in m; kx, ky, kz in mD (inactive cells 0);
    porosity, ntg fractions; active bool.
    """

    dx: np.ndarray
    dy: np.ndarray
    dz: np.ndarray
    kx: np.ndarray
    ky: np.ndarray
    kz: np.ndarray
    porosity: np.ndarray
    ntg: np.ndarray
    active: np.ndarray

    @property
    def shape(self) -> tuple[int, int, int]:
        return self.kx.shape

    @property
    def bulk_volume(self) -> np.ndarray:
        """Cell bulk volume, m3."""
        return self.dx[:, None, None] * self.dy[None, :, None] * self.dz

    @property
    def pore_volume(self) -> np.ndarray:
        """Cell pore volume porosity * ntg * bulk volume, m3 (0 in inactive cells)."""
        return self.porosity * self.ntg * self.bulk_volume * self.active

    def crop(self, cells: tuple[slice, slice, slice]) -> "FineArrays":
        """The arrays of a box of cells (fine index slices per axis)."""
        sx, sy, _ = cells
        three = {n: getattr(self, n)[cells] for n in ("dz", "kx", "ky", "kz", "porosity", "ntg", "active")}
        return FineArrays(dx=self.dx[sx], dy=self.dy[sy], **three)

    def flow_permeability(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Permeability that carries flow, mD: kx*ntg, ky*ntg, kz; 0 in inactive cells."""
        a = self.active
        return self.kx * self.ntg * a, self.ky * self.ntg * a, self.kz * a


def fine_dataset(kx, ky, kz, porosity, dx, dy, dz, ntg=None, active=None,
                 length_units: str = "m", attrs: dict | None = None) -> xr.Dataset:
    """Build a dataset in the fine-field schema from numpy (or dask) arrays.

    Permeability in mD; dx (nx,), dy (ny,), dz (nz,) or (nx, ny, nz) in ``length_units``.
    """
    def floats(a):  # dask arrays stay lazy
        return a.astype(float) if hasattr(a, "dask") else np.asarray(a, dtype=float)

    kx = floats(kx)
    dz = floats(dz)
    cell = DIMS
    data = {
        "dx": (("x",), np.asarray(dx, dtype=float), {"units": length_units, "long_name": "cell size along x"}),
        "dy": (("y",), np.asarray(dy, dtype=float), {"units": length_units, "long_name": "cell size along y"}),
        "dz": (("z",) if dz.ndim == 1 else cell, dz, {"units": length_units, "long_name": "cell thickness"}),
        "kx": (cell, kx, {"units": "mD", "long_name": "permeability along x"}),
        "ky": (cell, floats(ky), {"units": "mD", "long_name": "permeability along y"}),
        "kz": (cell, floats(kz), {"units": "mD", "long_name": "permeability along z"}),
        "porosity": (cell, floats(porosity), {"units": "1", "long_name": "porosity"}),
    }
    if ntg is not None:
        data["ntg"] = (cell, floats(ntg), {"units": "1", "long_name": "net-to-gross"})
    if active is not None:
        data["active"] = (cell, np.asarray(active, dtype=np.int8), {"long_name": "active cell flag"})
    ds = xr.Dataset({name: xr.Variable(*spec) for name, spec in data.items()})
    ds.attrs.update({"Conventions": "CF-1.10"}, **(attrs or {}))
    return ds


def file_checksum(path: str | os.PathLike) -> str:
    """SHA-256 of a file's bytes, hex."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for chunk in iter(lambda: handle.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


#: seconds the NetCDF library may take to open a file's header in the probe (see _probe_header)
PROBE_SECONDS = 20.0
#: bytes of address space the probe may use beyond what the process already has
PROBE_MEMORY = 1 << 30


def _probe_header(path: Path) -> None:
    """Open the file's header in a forked child first; raise InputError if that fails.

    On corrupt files the NetCDF and HDF5 libraries can crash (SIGSEGV), loop forever or
    try to allocate gigabytes while opening, and no exception handler catches that. The
    child has a time and memory limit; its death or silence marks the file as corrupt.
    """
    if not hasattr(os, "fork"):
        return
    import netCDF4  # imported before forking: the parent needs it next anyway

    read_end, write_end = os.pipe()
    pid = os.fork()
    if pid == 0:  # child: never returns
        status = 0
        try:
            os.close(read_end)
            null = os.open(os.devnull, os.O_WRONLY)
            os.dup2(null, 1)
            os.dup2(null, 2)  # HDF5 prints diagnostics on errors
            try:  # a header that claims gigabytes fails to allocate instead of taking the memory
                import resource

                with open("/proc/self/status") as status_file:
                    size = next(int(line.split()[1]) * 1024 for line in status_file if line.startswith("VmSize:"))
                hard = resource.getrlimit(resource.RLIMIT_AS)[1]
                resource.setrlimit(resource.RLIMIT_AS, (size + PROBE_MEMORY, hard))
            except Exception:
                pass  # no limit available here
            try:
                with netCDF4.Dataset(path) as nc:
                    for var in nc.variables.values():
                        var.ncattrs()
            except BaseException as exc:
                reason = (str(exc).splitlines() or [""])[0] or type(exc).__name__
                os.write(write_end, reason.encode("utf-8", "replace")[:2000] or b"?")
                status = 3
        finally:
            os._exit(status)
    os.close(write_end)
    try:
        ready, _, _ = select.select([read_end], [], [], PROBE_SECONDS)
        message = os.read(read_end, 4096).decode("utf-8", "replace") if ready else ""
    except BaseException:  # e.g. Ctrl-C while waiting: do not leave the child behind
        os.kill(pid, signal.SIGKILL)
        os.waitpid(pid, 0)
        raise
    finally:
        os.close(read_end)
    if not ready:
        os.kill(pid, signal.SIGKILL)
    try:
        _, status = os.waitpid(pid, 0)
    except ChildProcessError:  # reaped elsewhere (SIGCHLD ignored): judge by the message alone
        status = 3 << 8 if message else 0
    if not ready:
        raise InputError(f"{path}: not a readable NetCDF file (the NetCDF library did not finish opening it "
                         f"within {PROBE_SECONDS:g} s; the file is probably corrupt)")
    if os.WIFSIGNALED(status):
        name = signal.Signals(os.WTERMSIG(status)).name
        raise InputError(f"{path}: not a readable NetCDF file (the NetCDF library crashed on it with {name}; "
                         f"the file is probably corrupt)")
    if os.WEXITSTATUS(status) != 0:
        raise InputError(f"{path}: not a readable NetCDF file ({message})")


def check_readable(path: str | os.PathLike) -> Path:
    """Refuse a missing file, a folder, or a file whose header the NetCDF library cannot
    open (:func:`_probe_header`)."""
    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: no such file")
    if path.is_dir():
        raise InputError(f"{path}: is a folder, expected a NetCDF file")
    _probe_header(path)
    return path


def open_field(path: str | os.PathLike, chunks=None) -> xr.Dataset:
    """Read and validate a fine (or coarse) field file; returns a normalised Dataset.

    ``chunks`` (a dask chunk spec, e.g. ``{"x": 100}`` or ``"auto"``) opens the file lazily:
    the checks run chunk by chunk in one pass and the values stay on disk until used
    (``coarsen`` aligns the chunks to whole coarse blocks). Raises :class:`InputError`
    naming the variable, the problem and the first bad cell.
    """
    path = check_readable(path)
    try:
        # no time decoding: a field holds no times, and units such as 'days since ...' on a
        # cell size must be refused as unknown units, not turned into dates
        # errstate: overflow or NaN from scale_factor/add_offset is reported by validate, not as
        # numpy warnings that break the one-line error
        with np.errstate(all="ignore"), warnings.catch_warnings():
            # chunks along x also cut the (small) cell-size variables, stored whole
            warnings.filterwarnings("ignore", message="The specified chunks separate", category=UserWarning)
            raw = xr.open_dataset(path, engine="netcdf4", decode_times=False, decode_timedelta=False,
                                  chunks=chunks)
            if chunks is None:
                with raw:
                    raw = raw.load()
    except Exception as exc:  # netCDF4 raises OSError, ValueError, RuntimeError...
        raise _unreadable(path, exc) from None
    raw.attrs["source_path"] = str(path.resolve())
    raw.attrs["source_sha256"] = file_checksum(path)
    try:
        with np.errstate(all="ignore"):
            return validate(raw, where=str(path))
    except InputError:
        raw.close()
        raise
    except Exception as exc:
        raw.close()
        if chunks is None:  # the data were read above: a fault of ours, not of the file
            raise
        raise _unreadable(path, exc) from None  # a lazy read failing part-way through the file


def _unreadable(path: Path, exc: Exception) -> InputError:
    reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
    return InputError(f"{path}: not a readable NetCDF file ({reason})")


@dataclass(frozen=True)
class _Check:
    """One rule on the cells: ``mask`` (DataArray, numpy or dask) marks the bad ones."""

    mask: xr.DataArray
    name: str
    problem: str
    fix: str


def _first_flat_index(mask) -> int:
    """C-order flat index of the first set cell of a numpy or dask boolean array."""
    if not hasattr(mask, "dask"):
        return int(np.argmax(np.ravel(mask)))
    import dask.array as da

    def first(block, block_info=None):
        found = np.flatnonzero(block)
        if found.size == 0:
            return np.full((1,) * block.ndim, np.iinfo(np.int64).max)
        local = np.unravel_index(found[0], block.shape)
        where = [lo + i for (lo, _), i in zip(block_info[0]["array-location"], local)]
        return np.full((1,) * block.ndim, np.ravel_multi_index(where, mask.shape))

    return int(da.map_blocks(first, mask, dtype=np.int64, chunks=(1,) * mask.ndim).min().compute(scheduler="threads"))


def _count(checks: list[_Check]) -> tuple[int, ...]:
    """Bad cells of every check. A lazy field is counted slab by slab along x (its
    chunks along x), one slab at a time, so that the pass holds one slab in memory."""
    import dask

    cube = next((c.mask for c in checks if c.mask.chunks is not None and c.mask.ndim == 3), None)
    if cube is None:
        return tuple(int(n) for n in dask.compute(*[c.mask.data.sum() for c in checks], scheduler="sync"))
    edges = np.cumsum((0,) + cube.chunksizes["x"])
    totals = np.zeros(len(checks), dtype=np.int64)
    for first, (start, stop) in enumerate(zip(edges[:-1], edges[1:])):
        parts = [c.mask.isel(x=slice(start, stop)).data.sum() if "x" in c.mask.dims
                 else (c.mask.data.sum() if first == 0 else 0) for c in checks]
        totals += np.array(dask.compute(*parts, scheduler="sync"), dtype=np.int64)
    return tuple(int(n) for n in totals)


def _refuse_first(checks: list[_Check], counts: tuple[int, ...], where: str) -> None:
    """Raise for the first check with bad cells: count, first index and a hint."""
    for check, count in zip(checks, counts):
        if count:
            index = np.unravel_index(_first_flat_index(check.mask.data), check.mask.shape)
            at = "(" + ", ".join(f"{d}={i}" for d, i in zip(check.mask.dims, index)) + ")"
            raise InputError(f"{where}: variable '{check.name}' {check.problem} in {count} cell(s), first at "
                             f"{at}; {check.fix}")


def _unit_scale(ds: xr.Dataset, name: str, where: str, table: dict, default: str, wanted: str) -> float:
    """Factor converting variable ``name`` from its ``units`` attribute (``default`` when
    absent) with ``table``; an unknown unit is refused, naming the ones accepted."""
    units = str(ds[name].attrs.get("units", default)).strip()
    scale = table.get(units.lower())
    if scale is None:
        raise InputError(f"{where}: variable '{name}' has unknown units {units!r}; use {wanted}")
    return scale


def _length_scale(ds: xr.Dataset, name: str, where: str) -> float:
    return _unit_scale(ds, name, where, LENGTH_TO_M, "m", "'m' or 'ft'")


def _permeability_scale(ds: xr.Dataset, name: str, where: str) -> float:
    return _unit_scale(ds, name, where, PERMEABILITY_TO_MD, "mD", "'mD'")


def _require_dims(ds: xr.Dataset, name: str, allowed: tuple[tuple[str, ...], ...], where: str) -> None:
    dims = ds[name].dims
    if dims in allowed:
        return
    wanted = " or ".join("(" + ", ".join(a) + ")" for a in allowed)
    got = "(" + ", ".join(dims) + ")"
    if any(sorted(dims) == sorted(a) for a in allowed):
        raise InputError(f"{where}: variable '{name}' has dimension order {got}, expected {wanted}; "
                         f"transpose it, e.g. ds.transpose('x', 'y', 'z')")
    raise InputError(f"{where}: variable '{name}' has dimensions {got}, expected {wanted}")


def validate(ds: xr.Dataset, where: str = "field") -> xr.Dataset:
    """Check a dataset against the fine-field schema and return it normalised (see module
    doc). Numpy- and dask-backed datasets go through the same rules; for a lazy one the
    cell checks run chunk by chunk and the result stays lazy."""
    where = ds.attrs.get("source_path", where) if where == "field" else where
    missing = [n for n in ("dx", "dy", "dz", "porosity") if n not in ds]
    has_tensor = all(n in ds for n in PERMEABILITY)
    if not has_tensor and "k" not in ds:
        present = [n for n in PERMEABILITY if n in ds]
        missing += [n for n in PERMEABILITY if n not in ds] if present else ["kx, ky, kz (or k)"]
    if missing:
        found = ", ".join(sorted(map(str, ds.data_vars))) or "none"
        raise InputError(f"{where}: missing variable(s) {', '.join(missing)} (found: {found})")
    for name in DIMS:
        if name not in ds.dims:
            raise InputError(f"{where}: missing dimension '{name}' (dimensions are x, y, z)")
        if ds.sizes[name] == 0:
            raise InputError(f"{where}: dimension '{name}' has length 0")
    _require_dims(ds, "dx", (("x",),), where)
    _require_dims(ds, "dy", (("y",),), where)
    _require_dims(ds, "dz", (("z",), DIMS), where)
    k_names = PERMEABILITY if has_tensor else ("k",)
    optional = [n for n in ("ntg", "active") if n in ds]
    for name in (*k_names, "porosity", *optional):
        _require_dims(ds, name, (DIMS,), where)
    for name in ("dx", "dy", "dz", *k_names, "porosity", *optional):
        if ds[name].dtype.kind not in "biuf":
            raise InputError(f"{where}: variable '{name}' is not numeric (type {ds[name].dtype}); "
                             f"store it as numbers")

    def variable(name: str, scale: float = 1.0) -> xr.DataArray:
        return xr.DataArray(ds[name].variable.astype(float) * scale)

    sizes = {n: variable(n, _length_scale(ds, n, where)) for n in ("dx", "dy", "dz")}
    size_checks = []
    for name, values in sizes.items():
        size_checks.append(_Check(~np.isfinite(values), name, "is NaN or infinite", "cell sizes must be finite"))
        if name == "dz":
            size_checks.append(_Check(values < 0, name, "is negative", "thickness must be >= 0 (0 = pinched out)"))
        else:
            size_checks.append(_Check(values <= 0, name, "is zero or negative", "cell sizes must be > 0"))
    template = xr.DataArray(ds[k_names[0]].variable)
    dz = sizes["dz"].broadcast_like(template).transpose(*DIMS)
    active = dz > 0
    checks = []
    if "active" in ds:
        flag = variable("active")
        checks.append(_Check(~flag.isin((0.0, 1.0)), "active", "is not 0 or 1", "use 1 for active, 0 for inactive"))
        active = active & (flag == 1.0)
    values = {name: variable(name, _permeability_scale(ds, name, where)) for name in k_names}
    values["porosity"] = variable("porosity")
    values["ntg"] = variable("ntg") if "ntg" in ds else xr.ones_like(template, dtype=float)
    for name, data in values.items():
        fix = ("flag such cells inactive with an 'active' variable, or fill them" if name != "ntg"
               else "flag such cells inactive, or fill them")
        checks.append(_Check(active & ~np.isfinite(data), name, "is NaN or infinite in active cells", fix))
        checks.append(_Check(active & (data < 0), name, "is negative in active cells",
                             "permeability and fractions must be >= 0"))
        if name in ("porosity", "ntg"):
            checks.append(_Check(active & (data > 1), name, "is above 1 in active cells",
                                 "give fractions (0..1), not percent"))
    _refuse_first(size_checks, _count(size_checks), where)  # first: the other rules read dz
    inactive, *counts = _count([_Check(~active, "active", "", "")] + checks)
    if inactive == active.size:
        raise InputError(f"{where}: no active cell (all cells pinched out or flagged inactive)")
    _refuse_first(checks, tuple(counts), where)
    if not has_tensor:
        values.update(kx=values["k"], ky=values["k"], kz=values["k"])
    normal = {n: xr.where(active, values[n], 0.0) for n in (*PERMEABILITY, "porosity", "ntg")}
    out = xr.Dataset(
        {
            "dx": (("x",), sizes["dx"].data, {"units": "m"}),
            "dy": (("y",), sizes["dy"].data, {"units": "m"}),
            "dz": (DIMS, dz.data, {"units": "m"}),
            **{n: (DIMS, normal[n].data, {"units": "mD"}) for n in PERMEABILITY},
            "porosity": (DIMS, normal["porosity"].data, {"units": "1"}),
            "ntg": (DIMS, normal["ntg"].data, {"units": "1"}),
            "active": (DIMS, active.astype(np.int8).data, {}),
        },
        attrs=dict(ds.attrs),
    )
    for name in ds.data_vars:
        if name not in out and name != "k":
            out[name] = ds[name]  # carried along unchanged: coarse-file extras such as tx, x_start
    out.attrs["length_units_in"] = str(ds["dx"].attrs.get("units", "m"))
    return out


def arrays(ds: xr.Dataset) -> FineArrays:
    """The numpy arrays of a normalised field (see :func:`validate`)."""
    return FineArrays(
        dx=np.asarray(ds["dx"].values, dtype=float),
        dy=np.asarray(ds["dy"].values, dtype=float),
        dz=np.asarray(ds["dz"].values, dtype=float),
        kx=np.asarray(ds["kx"].values, dtype=float),
        ky=np.asarray(ds["ky"].values, dtype=float),
        kz=np.asarray(ds["kz"].values, dtype=float),
        porosity=np.asarray(ds["porosity"].values, dtype=float),
        ntg=np.asarray(ds["ntg"].values, dtype=float),
        active=np.asarray(ds["active"].values).astype(bool),
    )


def check_output_path(path: str | os.PathLike, inputs: tuple = ()) -> Path:
    """Refuse an output path whose folder is missing or that names one of the inputs."""
    path = Path(path)
    if not path.parent.resolve().is_dir():
        raise InputError(f"{path}: output folder '{path.parent}' does not exist; create it first")
    if path.is_dir():
        raise InputError(f"{path}: is a folder; give a file name for the output")
    for source in inputs:
        if source and path.resolve() == Path(source).resolve():
            raise InputError(f"{path}: output would overwrite the input file; choose another name")
    return path


@contextmanager
def interrupt_after(until: str = "the file being written is closed"):
    """Hold Ctrl-C (SIGINT) back until the block has finished, then raise KeyboardInterrupt;
    ``until`` ends the message printed when one arrives.

    A KeyboardInterrupt raised inside the NetCDF library's Python layer can land between
    taking a file lock and the code that releases it; closing the file then waits on that
    lock for ever (seen once in CI as a hung Ctrl-C test). Outside the main thread, where
    no signal handler can be set, the block runs unguarded.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    received = []

    def hold(signum, frame):
        if not received:
            print(f"upscale: interrupt received; stopping once {until}", file=sys.stderr, flush=True)
        received.append(signum)

    previous = signal.signal(signal.SIGINT, hold)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)
    if received:
        raise KeyboardInterrupt


def atomic_write(path: str | os.PathLike, write_to, hold_interrupt: bool = True) -> Path:
    """Call ``write_to(temporary_path)`` next to ``path`` and rename it into place when
    complete; Ctrl-C during the call ends it cleanly (held back until the call returns,
    :func:`interrupt_after`, unless ``write_to`` guards its own file operations) and the
    temporary file is removed."""
    path = Path(path)
    handle, temporary = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    os.close(handle)
    try:
        with interrupt_after() if hold_interrupt else nullcontext():
            write_to(temporary)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(temporary, 0o666 & ~umask)  # mkstemp creates 0600; give the usual permissions
        os.replace(temporary, path)
    except BaseException:
        if os.path.exists(temporary):
            os.unlink(temporary)
        raise
    return path


def write(ds: xr.Dataset, path: str | os.PathLike, progress=None) -> Path:
    """Write a field atomically to NetCDF; refuses to write over the file it came from.

    A lazy (dask-backed) dataset is computed and written box by box
    (:func:`upscale.parallel.stream_write`; ``progress`` receives 1 per box); Ctrl-C
    then stops the computation, and the temporary file is removed either way.
    """
    sources = (ds.attrs.get("source_path"), ds.attrs.get("input_file"))
    path = check_output_path(path, inputs=sources)
    if any(v.chunks is not None for v in ds.variables.values()):
        from .parallel import stream_write

        return atomic_write(path, lambda tmp: stream_write(ds, tmp, progress), hold_interrupt=False)
    active = xr.DataArray(ds["active"].variable).astype(bool) if "active" in ds else True
    checks = [_Check(active & ~(np.isfinite(ds[name]) & (ds[name] >= 0)), name, "would be NaN, infinite or negative",
                     "this is a bug: please report it") for name in PERMEABILITY if name in ds]
    _refuse_first(checks, _count(checks), str(path))
    encoding = {name: {"zlib": True, "complevel": 1} for name in ds.data_vars}
    return atomic_write(path, lambda tmp: ds.to_netcdf(tmp, engine="netcdf4", encoding=encoding))
