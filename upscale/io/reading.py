"""Opening field files: a guarded first look at the header, lazy or eager reading,
checksums; every field read is validated.
"""

from __future__ import annotations

import hashlib
import os
import select
import signal
import warnings
from pathlib import Path

import numpy as np
import xarray as xr

from ..core.grid import AXES
from ..errors import InputError
from .validation import validate


def file_checksum(path: str | os.PathLike) -> str:
    """SHA-256 of a file's bytes.

    Parameters
    ----------
    path : str or os.PathLike
        The file, read in pieces of 1 MiB.

    Returns
    -------
    str
        The digest, hex.
    """
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
    import netCDF4  # noqa: F401 - imported before forking: the parent needs it next anyway

    read_end, write_end = os.pipe()
    pid = os.fork()
    if pid == 0:
        _probe_in_child(path, read_end, write_end)
    os.close(write_end)
    ready, message = _probe_message(pid, read_end)
    if not ready:
        os.kill(pid, signal.SIGKILL)
    _judge_probe(path, ready, _probe_status(pid, message), message)


def _probe_in_child(path: Path, read_end: int, write_end: int) -> None:
    """The forked child: open the header quietly within the memory limit, write the
    reason of a failure to the pipe, and exit (status 3 on failure); never returns."""
    status = 0
    try:
        os.close(read_end)
        null = os.open(os.devnull, os.O_WRONLY)
        os.dup2(null, 1)
        os.dup2(null, 2)  # HDF5 prints diagnostics on errors
        _limit_address_space()
        try:
            import netCDF4

            with netCDF4.Dataset(path) as nc:
                for var in nc.variables.values():
                    var.ncattrs()
        except BaseException as exc:
            reason = (str(exc).splitlines() or [""])[0] or type(exc).__name__
            os.write(write_end, reason.encode("utf-8", "replace")[:2000] or b"?")
            status = 3
    finally:
        os._exit(status)


def _limit_address_space() -> None:
    """Cap this process's address space at its size now plus :data:`PROBE_MEMORY`, so
    that a header claiming gigabytes fails to allocate instead of taking the memory."""
    try:
        import resource

        with open("/proc/self/status") as status_file:
            size = next(int(line.split()[1]) * 1024 for line in status_file if line.startswith("VmSize:"))
        hard = resource.getrlimit(resource.RLIMIT_AS)[1]
        resource.setrlimit(resource.RLIMIT_AS, (size + PROBE_MEMORY, hard))
    except Exception:
        pass  # no limit available here


def _probe_message(pid: int, read_end: int) -> tuple[bool, str]:
    """Wait up to :data:`PROBE_SECONDS` for the child: (whether it answered, the reason
    it wrote). The child is killed if the wait itself is interrupted."""
    try:
        ready, _, _ = select.select([read_end], [], [], PROBE_SECONDS)
        message = os.read(read_end, 4096).decode("utf-8", "replace") if ready else ""
    except BaseException:  # e.g. Ctrl-C while waiting: do not leave the child behind
        os.kill(pid, signal.SIGKILL)
        os.waitpid(pid, 0)
        raise
    finally:
        os.close(read_end)
    return bool(ready), message


def _probe_status(pid: int, message: str) -> int:
    """The child's wait status, once it has ended."""
    try:
        _, status = os.waitpid(pid, 0)
    except ChildProcessError:  # reaped elsewhere (SIGCHLD ignored): judge by the message alone
        status = 3 << 8 if message else 0
    return status


def _judge_probe(path: Path, ready: bool, status: int, message: str) -> None:
    """Refuse the file if the child stayed silent, died of a signal or failed to open it."""
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
    open (:func:`_probe_header`).

    Parameters
    ----------
    path : str or os.PathLike
        The file to read.

    Returns
    -------
    pathlib.Path
        ``path``, once it has passed.

    Raises
    ------
    InputError
        Naming the file and why it cannot be read.
    """
    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: no such file")
    if path.is_dir():
        raise InputError(f"{path}: is a folder, expected a NetCDF file")
    _probe_header(path)
    return path


def grid_sizes(path: str | os.PathLike) -> dict[str, int]:
    """The lengths of the dimensions x, y, z (those present) from a file's header alone.

    Parameters
    ----------
    path : str or os.PathLike
        A NetCDF file (refused as by :func:`check_readable`).

    Returns
    -------
    dict
        Dimension name -> length.
    """
    import netCDF4

    with netCDF4.Dataset(check_readable(path)) as nc:
        return {d: len(nc.dimensions[d]) for d in AXES if d in nc.dimensions}


def limit_chunk_cache(size: int) -> None:
    """Hold at most ``size`` bytes of decompressed file chunks per variable of the files
    opened from now on, in this process (the NetCDF library's default, 64 MB a variable,
    keeps whole variables of a field read slab by slab: about 400 MB for eight).

    Parameters
    ----------
    size : int
        Bytes per variable.
    """
    import netCDF4

    _, elements, preemption = netCDF4.get_chunk_cache()
    netCDF4.set_chunk_cache(int(size), elements, preemption)


def open_field(path: str | os.PathLike, chunks=None, window=None) -> xr.Dataset:
    """Read and validate a fine (or coarse) field file.

    Parameters
    ----------
    path : str or os.PathLike
        A NetCDF field file.
    chunks : dict or str, optional
        A dask chunk spec, e.g. ``{"x": 100}`` or ``"auto"``: opens the file lazily; the
        checks run chunk by chunk in one pass and the values stay on disk until used
        (``coarsen`` aligns the chunks to whole coarse blocks). None reads it all now.
    window : tuple of slice, optional
        Fine-index slices per axis: only that sector is read (and validated), as a field
        of its own.

    Returns
    -------
    xarray.Dataset
        The normalised field (:func:`~upscale.io.validation.validate`), with attributes
        ``source_path`` and ``source_sha256``.

    Raises
    ------
    InputError
        Naming the variable, the problem and the first bad cell, or why the file cannot
        be read.
    """
    path = check_readable(path)
    try:
        # errstate: overflow or NaN from scale_factor/add_offset is reported by validate, not as
        # numpy warnings that break the one-line error
        with np.errstate(all="ignore"), warnings.catch_warnings():
            # chunks along x also cut the (small) cell-size variables, stored whole
            warnings.filterwarnings("ignore", message="The specified chunks separate", category=UserWarning)
            # no time decoding: a field holds no times, and units such as 'days since ...' on a
            # cell size must be refused as unknown units, not turned into dates
            raw = xr.open_dataset(path, engine="netcdf4", decode_times=False, decode_timedelta=False,
                                  chunks=chunks if window is None else {})
            if window is not None:
                raw = _sector(raw, window)
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


def _sector(raw: xr.Dataset, window) -> xr.Dataset:
    """The window of a lazily opened file, loaded (cell-size variables cut along their axis)."""
    selection = {d: w for d, w in zip(("x", "y", "z"), window) if d in raw.dims}
    with raw:
        return raw.isel(selection).load()


def _unreadable(path: Path, exc: Exception) -> InputError:
    """The refusal of a file the NetCDF library failed on, with the first line of its error."""
    reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
    return InputError(f"{path}: not a readable NetCDF file ({reason})")
