"""A catalogue of bad input, each run through the command line in its own process.

Every case must end with exit code 2 and a single stderr line ``upscale: error: ...`` that
names the variable or option and the problem, with no traceback, and must leave neither
the output file nor a ``.OUT.*.part`` temporary in the output folder.

Start-up of a fresh interpreter costs seconds (numpy, xarray, numba, ... are imported), so
by default the catalogue runs each case in a process *forked* from one pre-warmed
interpreter: the child runs ``upscale.cli`` as ``__main__`` exactly as ``python -m
upscale.cli ARGS`` would (own stdout/stderr files, own exit status). A sample of the cases
is also run with a fresh ``python -m upscale.cli`` and with the ``upscale`` console script,
and must give identical results. Set ``UPSCALE_TEST_FRESH=1`` to run the whole catalogue
with a fresh interpreter per case (slow).
"""

from __future__ import annotations

import json
import os
import select
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import pytest
import xarray as xr

import upscale
from helpers import ROCKS as HELPER_ROCKS
from upscale.io.reading import file_checksum
from upscale.io.validation import validate

COARSEN = ("coarsen", "{fine}", "-o", "{out}", "--ratio", "2", "2", "2", "--method", "arithmetic")
TIMEOUT = 120  # seconds per subprocess: generous, the machine may be busy


# ----------------------------------------------------------------------------- builders
# Each builder receives the case folder and ``make`` (the fixture small_fine_factory: builds the
# small valid field) and returns the path given as FINE (it may not exist).

def write(ds: xr.Dataset, folder: Path, name: str = "fine.nc") -> Path:
    path = folder / name
    ds.to_netcdf(path, engine="netcdf4")
    return path


def shape_of(ds: xr.Dataset) -> tuple[int, int, int]:
    return tuple(ds.sizes[d] for d in ("x", "y", "z"))


def valid(folder: Path, make) -> Path:
    return write(make(), folder)


def mutated(change: Callable[[xr.Dataset], xr.Dataset | None]) -> Callable[[Path], Path]:
    """A builder writing the small valid field after ``change`` (in place, or returning a new one)."""
    def build(folder: Path, make) -> Path:
        ds = make()
        out = change(ds)
        return write(ds if out is None else out, folder)
    return build


def cell(name: str, value: float, index=(1, 2, 3)):
    def change(ds):
        data = ds[name].values.copy()
        data[index] = value
        ds[name] = (ds[name].dims, data, ds[name].attrs)
    return mutated(change)


def units(name: str, text: str):
    def change(ds):
        ds[name].attrs["units"] = text
    return mutated(change)


def raw_file(content: bytes | Callable[[Callable], bytes]):
    """A builder writing ``content`` (bytes, or a function of ``make`` giving them) as FINE."""
    def build(folder: Path, make) -> Path:
        path = folder / "fine.nc"
        path.write_bytes(content(make) if callable(content) else content)
        return path
    return build


def valid_bytes(make) -> bytes:
    import tempfile

    with tempfile.TemporaryDirectory() as scratch:
        return valid(Path(scratch), make).read_bytes()


def crashing_header(folder: Path, make) -> Path:
    """A classic-format file whose dimension count is huge: netCDF-C 4.10.1 segfaults opening it."""
    path = folder / "fine.nc"
    make().to_netcdf(path, format="NETCDF3_CLASSIC", engine="netcdf4")
    data = bytearray(path.read_bytes())
    assert data[:4] == b"CDF\x01" and data[8:12] == b"\x00\x00\x00\x0a"  # NC_DIMENSION tag, then count
    data[12] = 0x80
    path.write_bytes(bytes(data))
    return path


def missing(folder: Path, make) -> Path:
    return folder / "no_such_field.nc"


def a_folder(folder: Path, make) -> Path:
    path = folder / "fine.nc"
    path.mkdir()
    return path


def two_dimensional(folder: Path, make) -> Path:
    ds = make()
    nx, ny, _ = shape_of(ds)
    ds = ds.isel(z=0, drop=True)
    ds["dz"] = (("x", "y"), np.full((nx, ny), 2.0), {"units": "m"})
    return write(ds, folder)


def drop(*names):
    return mutated(lambda ds: ds.drop_vars(list(names)))


def misnamed_permeability(ds):
    ds = ds.rename({"kx": "perm"})
    return ds.drop_vars(["ky", "kz"])


def kx_on_xy(ds):
    ds["kx"] = (("x", "y"), ds["kx"].values[:, :, 0], ds["kx"].attrs)


def kx_transposed(ds):
    ds["kx"] = ds["kx"].transpose("z", "y", "x")


def active_on_xy(ds):
    ds["active"] = (("x", "y"), np.ones(shape_of(ds)[:2], dtype=np.int8))


def all_inactive(ds):
    ds["active"] = (ds["active"].dims, np.zeros(shape_of(ds), dtype=np.int8))


def porosity_as_text(ds):
    ds["porosity"] = (ds["porosity"].dims, np.full(shape_of(ds), "high", dtype=object))


def raw_attributes(name: str, **attrs):
    """A builder: the valid file, then attributes of ``name`` set directly with netCDF4 (no encoding)."""
    def build(folder: Path, make) -> Path:
        import netCDF4

        path = valid(folder, make)
        with netCDF4.Dataset(path, "a") as nc:
            for key, value in attrs.items():
                nc[name].setncattr(key, value)
        return path
    return build


def with_args(*args):
    return ("coarsen", "{fine}", "-o", "{out}", *args)


# Two-phase: the small field with facies (flag meanings sand, shale) beside a rock table.
ROCKS = HELPER_ROCKS.replace('[rock."7"]', "[rock.shale]")


def with_facies(ds):
    codes = (np.indices(shape_of(ds)).sum(axis=0) % 2).astype(np.int8)
    ds["facies"] = (("x", "y", "z"), codes, {"flag_values": np.array([0, 1], np.int8), "flag_meanings": "sand shale"})


def two_phase_field(rocks: str = ROCKS, change=None):
    """A builder: the small field with facies (then ``change``) and ``rocks`` as rocks.toml."""
    def build(folder: Path, make) -> Path:
        (folder / "rocks.toml").write_text(rocks)
        ds = make()
        with_facies(ds)
        if change is not None:
            change(ds)
        return write(ds, folder)
    return build


def rocks_with(old: str, new: str) -> str:
    assert old in ROCKS
    return ROCKS.replace(old, new, 1)


TWO_PHASE = ("two-phase", "{fine}", "--rocks", "rocks.toml", "-o", "{out}", "--ratio", "2", "2", "2")


def two_phase_args(*args):
    return TWO_PHASE + args


def facies_fraction(ds):
    ds["facies"] = ds["facies"].astype(float)
    ds["facies"].values[1, 2, 3] = 0.5


# ----------------------------------------------------------------------------- catalogue

@dataclass(frozen=True)
class Case:
    id: str
    build: Callable[[Path, Callable[..., xr.Dataset]], Path]  # (folder, make) -> FINE
    expect: tuple[str, ...]          # substrings of the error line (case-sensitive)
    argv: tuple[str, ...] = COARSEN
    out: str = "out.nc"              # output path relative to the case folder ("{fine}": the input)


CASES = [
    # --- the file itself
    Case("missing-file", missing, ("no_such_field.nc", "no such file")),
    Case("folder-instead-of-file", a_folder, ("fine.nc", "is a folder")),
    Case("not-netcdf-text", raw_file(b"x y z kx\n1 2 3 100\n"), ("fine.nc", "not a readable NetCDF file")),
    Case("truncated-netcdf", raw_file(lambda make: valid_bytes(make)[: len(valid_bytes(make)) // 2]),
         ("fine.nc", "not a readable NetCDF file")),
    Case("empty-file", raw_file(b""), ("fine.nc", "not a readable NetCDF file")),
    Case("corrupt-header-library-crash", crashing_header, ("fine.nc", "not a readable NetCDF file")),
    # --- schema: variables and dimensions
    Case("missing-variable-porosity", drop("porosity"), ("missing variable", "porosity")),
    Case("misnamed-permeability", mutated(misnamed_permeability),
         ("missing variable", "kx, ky, kz (or k)", "perm")),
    Case("missing-permeability-component", drop("kz"), ("missing variable", "kz")),
    Case("missing-dimension", two_dimensional, ("missing dimension 'z'",)),
    Case("wrong-dimensions", mutated(kx_on_xy), ("'kx'", "dimensions (x, y)", "expected (x, y, z)")),
    Case("wrong-dimension-order", mutated(kx_transposed), ("'kx'", "dimension order (z, y, x)", "transpose")),
    Case("text-variable", mutated(porosity_as_text), ("'porosity'", "not numeric")),
    # --- cell values
    Case("nan-permeability", cell("kx", np.nan), ("'kx'", "NaN", "(x=1, y=2, z=3)")),
    Case("inf-permeability", cell("ky", np.inf), ("'ky'", "infinite", "(x=1, y=2, z=3)")),
    Case("negative-permeability", cell("kz", -5.0), ("'kz'", "negative", "(x=1, y=2, z=3)")),
    Case("porosity-above-1", cell("porosity", 20.0), ("'porosity'", "above 1", "percent")),
    Case("porosity-negative", cell("porosity", -0.1), ("'porosity'", "negative")),
    Case("ntg-above-1", cell("ntg", 1.5), ("'ntg'", "above 1")),
    Case("nan-dx", cell("dx", np.nan, index=2), ("'dx'", "NaN", "(x=2)")),
    Case("zero-dx", cell("dx", 0.0, index=2), ("'dx'", "zero or negative", "(x=2)")),
    Case("negative-dy", cell("dy", -10.0, index=1), ("'dy'", "zero or negative", "(y=1)")),
    Case("negative-dz", cell("dz", -2.0, index=3), ("'dz'", "negative", "(z=3)")),
    # --- units
    Case("unknown-length-units", units("dx", "furlong"), ("'dx'", "unknown units 'furlong'")),
    Case("unknown-permeability-units", units("kx", "cm/s"), ("'kx'", "unknown units 'cm/s'")),
    # found by the header fuzz test: a line break in the attribute must not split the message
    Case("line-break-in-units", units("dx", "0\n0"), ("'dx'", "unknown units '0\\n0'")),
    Case("decoding-overflow", raw_attributes("kx", scale_factor=1e308, add_offset=1e308),
         ("'kx'", "infinite", "(x=0, y=0, z=0)")),
    Case("time-units-on-dx", units("dx", "days since 2000-01-01"), ("'dx'", "unknown units 'days since")),
    # --- active mask
    Case("active-wrong-shape", mutated(active_on_xy), ("'active'", "dimensions (x, y)")),
    Case("active-value-2", cell("active", 2, index=(0, 0, 0)), ("'active'", "not 0 or 1", "(x=0, y=0, z=0)")),
    Case("all-cells-inactive", mutated(all_inactive), ("no active cell",)),
    # --- options
    Case("ratio-zero", valid, ("ratio along x is 0", ">= 1"), with_args("--ratio", "0", "2", "2")),
    Case("ratio-negative", valid, ("ratio along y is -2", ">= 1"), with_args("--ratio", "2", "-2", "2")),
    Case("ratio-not-a-number", valid, ("--ratio", "invalid int value: 'two'"), with_args("--ratio", "2", "two", "2")),
    Case("ratio-larger-than-grid", valid, ("ratio along z is 9", "larger than the grid"),
         with_args("--ratio", "2", "2", "9")),
    Case("edges-unsorted", valid, ("edges along z", "strictly increasing", "[0, 5, 3]"),
         with_args("--edges", "z=0,5,3", "--method", "arithmetic")),
    Case("edges-out-of-range", valid, ("edges along z", "0..6", "99"),
         with_args("--edges", "z=0,3,99", "--method", "arithmetic")),
    Case("edges-unknown-axis", valid, ("edges", "unknown axis", "'w'"),
         with_args("--edges", "w=0,3", "--method", "arithmetic")),
    Case("edges-bad-syntax", valid, ("--edges", "z=0,3,10,20", "'z:0,3'"),
         with_args("--edges", "z:0,3", "--method", "arithmetic")),
    Case("unknown-method", valid, ("unknown method 'bilinear'",),
         with_args("--ratio", "2", "2", "2", "--method", "bilinear")),
    Case("unknown-boundary-condition", valid, ("unknown boundary condition 'weird'",),
         with_args("--ratio", "2", "2", "2", "--method", "flow", "--bc", "weird")),
    Case("power-without-omega", valid, ("'power'", "omega"),
         with_args("--ratio", "2", "2", "2", "--method", "power")),
    Case("unknown-transmissibility-units", valid, ("unknown transmissibility units 'imperial'",),
         with_args("--ratio", "2", "2", "2", "--method", "arithmetic", "--units", "imperial")),
    Case("negative-border", valid, ("border", "-1", ">= 0"),
         with_args("--ratio", "2", "2", "2", "--method", "flow", "--border", "-1")),
    Case("negative-pinch-thickness", valid, ("--pinch-thickness", ">= 0", "'-0.5'"),
         with_args("--ratio", "2", "2", "2", "--pinch-thickness", "-0.5")),
    Case("pinch-thickness-not-a-number", valid, ("--pinch-thickness", "a number >= 0", "'thin'"),
         with_args("--ratio", "2", "2", "2", "--pinch-thickness", "thin")),
    Case("pinch-thickness-nan", valid, ("--pinch-thickness", "finite number >= 0", "'nan'"),
         with_args("--ratio", "2", "2", "2", "--pinch-thickness", "nan")),
    # --- two-phase: the rock table, the facies, the options
    Case("rocks-missing", valid, ("rocks.toml", "rock table not found"), TWO_PHASE),
    Case("rocks-not-toml", two_phase_field("[fluids\nwater = "), ("rocks.toml", "not a valid TOML rock table"),
         TWO_PHASE),
    Case("rocks-unknown-key", two_phase_field(rocks_with("nw = 2.0", "nw_exponent = 2.0")),
         ("[rock.sand]", "unknown key 'nw_exponent'", "pore_size_index"), TWO_PHASE),
    Case("rocks-unknown-table", two_phase_field(ROCKS.replace("[fluids]", "[fluid]")),
         ("unknown table or key 'fluid'", "[fluids]"), TWO_PHASE),
    Case("rocks-missing-key", two_phase_field(rocks_with("j_entry = 0.3\n", "")),
         ("[rock.sand] misses j_entry", "Leverett J at the entry pressure"), TWO_PHASE),
    Case("rocks-swc-in-percent", two_phase_field(rocks_with("swc = 0.1", "swc = 12")),
         ("[rock.sand] swc = 12 is outside [0, 1)", "fraction of pore volume", "not percent"), TWO_PHASE),
    Case("rocks-sor-negative", two_phase_field(rocks_with("sor = 0.2", "sor = -0.1")),
         ("[rock.sand] sor = -0.1 is outside [0, 1)", "residual oil saturation"), TWO_PHASE),
    Case("rocks-swc-plus-sor", two_phase_field(rocks_with("swc = 0.1", "swc = 0.85")),
         ("[rock.sand] swc + sor = 1.05 must be below 1",), TWO_PHASE),
    Case("rocks-value-text", two_phase_field(rocks_with("no = 2.5", 'no = "two"')),
         ("[rock.sand] no = 'two' must be a finite number", "Corey exponent of oil"), TWO_PHASE),
    Case("rocks-viscosity-zero", two_phase_field(ROCKS.replace("water_viscosity = 0.6", "water_viscosity = 0")),
         ("[fluids] water_viscosity = 0 is outside (0, inf)", "cP"), TWO_PHASE),
    Case("rocks-tension-in-dyn-per-cm", two_phase_field(ROCKS.replace("interfacial_tension = 0.03",
                                                                      "interfacial_tension = 25")),
         ("interfacial_tension = 25 is outside (0, 1]", "N/m", "mN/m"), TWO_PHASE),
    Case("rocks-no-rock-type", two_phase_field(ROCKS.split("[rock.sand]")[0]), ("no rock type", "[rock.NAME]"),
         TWO_PHASE),
    Case("facies-without-rock", two_phase_field(ROCKS.split("[rock.shale]")[0]),
         ("facies code 1 (shale) has no rock type", "first at (x=0, y=0, z=1)", "add [rock.shale]"), TWO_PHASE),
    Case("rock-names-no-facies", two_phase_field(ROCKS.replace("[rock.shale]", "[rock.shales]")),
         ("[rock.shales] names no facies", "sand (0), shale (1)"), TWO_PHASE),
    Case("rocks-two-for-one-code", two_phase_field(ROCKS + '\n[rock."1"]' + ROCKS.split("[rock.shale]")[1]),
         ("[rock.1] and [rock.shale] both give facies code 1", "keep one"), TWO_PHASE),
    Case("field-without-facies", two_phase_field(change=lambda ds: ds.__delitem__("facies")),
         ("no variable 'facies'",), TWO_PHASE),
    Case("facies-not-integer", two_phase_field(change=facies_fraction),
         ("'facies' is not an integer code", "(x=1, y=2, z=3)", "0.5"), TWO_PHASE),
    Case("two-phase-unknown-limit", two_phase_field(), ("unknown limit 'slow'", "capillary", "viscous"),
         two_phase_args("--limit", "slow")),
    Case("two-phase-one-point", two_phase_field(), ("points must be a whole number from 2", "got 1"),
         two_phase_args("--points", "1")),
    Case("two-phase-global", two_phase_field(), ("'global' is not available for two-phase",),
         two_phase_args("--bc", "global")),
    Case("two-phase-regions-missing", two_phase_field(), ("no variable 'zone'",), two_phase_args("--regions", "zone")),
    # --- output path
    Case("output-folder-missing", valid, ("no_folder", "does not exist"), out="no_folder/out.nc"),
    Case("output-equals-input", valid, ("overwrite the input file",), out="{fine}"),
    Case("output-is-a-folder", valid, ("is a folder", "file name"), out="."),
]

# A valid run through the same machinery (NaN in a cell flagged inactive is allowed): it must
# succeed and write OUT, so the harness can tell success from failure.
def nan_in_inactive_cell(ds):
    ds["kx"].values[1, 2, 3] = np.nan
    ds["active"].values[1, 2, 3] = 0


CONTROL = Case("control-valid", mutated(nan_in_inactive_cell), ())


@dataclass
class Outcome:
    folder: Path
    fine: Path
    out: Path
    returncode: int | None
    stdout: str
    stderr: str
    before: dict = field(default_factory=dict)  # file name -> checksum, taken before the run


def _snapshot(folder: Path) -> dict:
    return {p.name: (file_checksum(p) if p.is_file() else "dir") for p in folder.iterdir()}


def _prepare(case: Case, folder: Path, make):
    folder.mkdir(parents=True)
    fine = case.build(folder, make)
    out = fine if case.out == "{fine}" else folder / case.out
    argv = [a.format(fine=fine, out=out) for a in case.argv]
    return fine, out, argv, _snapshot(folder)


def run_fresh(case: Case, folder: Path, make, command: list[str], env: dict) -> Outcome:
    """The case in a fresh interpreter: ``command`` is e.g. [python, -m, upscale.cli]."""
    fine, out, argv, before = _prepare(case, folder, make)
    proc = subprocess.run([*command, *argv], cwd=folder, env=env, capture_output=True, text=True,
                          timeout=TIMEOUT)
    return Outcome(folder, fine, out, proc.returncode, proc.stdout, proc.stderr, before)


ZYGOTE = r"""
import json, os, runpy, signal, sys, time, traceback
import netCDF4, xarray, upscale, upscale.io.reading   # the slow imports, once (not upscale.cli itself)
upscale.open_field(sys.argv[1])                      # warm up what xarray loads lazily on first open
sys.stdout.write("ready\n"); sys.stdout.flush()
for line in sys.stdin:
    request = json.loads(line)
    pid = os.fork()
    if pid == 0:  # child: behave like `python -m upscale.cli ARGS` run in request["cwd"]
        code = 1
        try:
            os.chdir(request["cwd"])
            for fd, name, flags in ((0, os.devnull, os.O_RDONLY),
                                    (1, request["stdout"], os.O_WRONLY | os.O_CREAT | os.O_TRUNC),
                                    (2, request["stderr"], os.O_WRONLY | os.O_CREAT | os.O_TRUNC)):
                os.dup2(os.open(name, flags, 0o644), fd)
            sys.argv = [upscale.__path__[0] + "/cli.py", *request["argv"]]
            try:
                runpy.run_module("upscale.cli", run_name="__main__", alter_sys=True)
                code = 0
            except SystemExit as exc:  # what the interpreter does with SystemExit
                if exc.code is None or isinstance(exc.code, int):
                    code = exc.code or 0
                else:
                    print(exc.code, file=sys.stderr)
                    code = 1
            except BaseException:
                traceback.print_exc()
                code = 1
        finally:
            sys.stdout.flush(); sys.stderr.flush()
            os._exit(code)
    deadline = time.monotonic() + request["timeout"]
    while True:
        done, status = os.waitpid(pid, os.WNOHANG)
        if done:
            returncode = os.waitstatus_to_exitcode(status)
            break
        if time.monotonic() > deadline:
            os.kill(pid, signal.SIGKILL); os.waitpid(pid, 0)
            returncode = None
            break
        time.sleep(0.002)
    sys.stdout.write(json.dumps({"returncode": returncode}) + "\n"); sys.stdout.flush()
"""


class Zygote:
    """One pre-warmed interpreter that forks a child per command line."""

    def __init__(self, env: dict, cwd: Path, make):
        self.make = make
        warm_up = valid(cwd, make)
        self.log = cwd / "zygote.stderr"
        with open(self.log, "w") as log:
            self.proc = subprocess.Popen([sys.executable, "-c", ZYGOTE, str(warm_up)], cwd=cwd, env=env, text=True,
                                         stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=log)
        assert self._reply(TIMEOUT) == "ready", f"the pre-warmed interpreter did not start: {self.log.read_text()}"

    def _reply(self, timeout: float) -> str:
        ready, _, _ = select.select([self.proc.stdout], [], [], timeout)
        if not ready:
            self.close()
            raise TimeoutError("no answer from the pre-warmed interpreter")
        return self.proc.stdout.readline().strip()

    def run(self, case: Case, folder: Path) -> Outcome:
        fine, out, argv, before = _prepare(case, folder, self.make)
        streams = folder.parent / f"{folder.name}.stdout", folder.parent / f"{folder.name}.stderr"
        request = {"argv": argv, "cwd": str(folder), "stdout": str(streams[0]), "stderr": str(streams[1]),
                   "timeout": TIMEOUT}
        self.proc.stdin.write(json.dumps(request) + "\n")
        self.proc.stdin.flush()
        returncode = json.loads(self._reply(TIMEOUT + 10))["returncode"]
        return Outcome(folder, fine, out, returncode, streams[0].read_text(), streams[1].read_text(), before)

    def close(self):
        if self.proc.poll() is None:
            self.proc.stdin.close()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()


def _selected(request, test_name: str) -> set[str]:
    return {item.callspec.params["case"].id for item in request.session.items
            if getattr(item, "originalname", None) == test_name and hasattr(item, "callspec")}


@pytest.fixture(scope="module")
def outcomes(request, tmp_path_factory, small_fine_factory, cli_command, cli_env) -> dict[str, Outcome]:
    """Run every selected case once per module (in forked children, or fresh interpreters)."""
    wanted = set().union(*(_selected(request, name) for name in
                           ("test_bad_input", "test_fresh_interpreter", "test_api_same_message_as_cli")))
    selected = [CONTROL] + [c for c in CASES if c.id in wanted]
    root = tmp_path_factory.mktemp("bad_input")
    if os.environ.get("UPSCALE_TEST_FRESH") == "1":
        workers = max(2, min(4, os.cpu_count() or 2))
        with ThreadPoolExecutor(max_workers=workers) as pool:
            futures = {c.id: pool.submit(run_fresh, c, root / c.id, small_fine_factory, cli_command, cli_env)
                       for c in selected}
            return {name: future.result() for name, future in futures.items()}
    zygote = Zygote(cli_env, root, small_fine_factory)
    try:
        return {c.id: zygote.run(c, root / c.id) for c in selected}
    finally:
        zygote.close()


def check_outcome(case: Case, result: Outcome) -> None:
    stderr = result.stderr
    assert "Traceback" not in stderr, stderr
    assert result.returncode == 2, f"exit code {result.returncode}, stderr:\n{stderr}"
    lines = stderr.splitlines()
    assert len(lines) == 1, f"expected one stderr line, got {len(lines)}:\n{stderr}"
    line = lines[0]
    assert line.startswith("upscale: error:"), line
    for text in case.expect:
        assert text in line, f"{text!r} not in {line!r}"
    assert result.stdout == "", result.stdout

    # nothing written: no output, no temporary, inputs untouched
    folder = result.out.parent
    if folder.is_dir():
        if case.out not in ("{fine}", "."):
            assert not result.out.exists(), f"{result.out} was left behind"
        leftovers = sorted(p.name for p in folder.glob(f".{result.out.name}.*.part"))
        assert not leftovers, f"temporary files left: {leftovers}"
    else:
        assert not folder.exists(), f"{folder} was created"
    assert _snapshot(result.folder) == result.before, "files in the case folder changed (input modified?)"


def test_catalogue_is_large_enough():
    assert len({c.id for c in CASES}) == len(CASES) >= 22


def test_control_valid_run(outcomes):
    """The same harness on a valid field: exit 0, OUT written, no temporary left."""
    result = outcomes[CONTROL.id]
    assert result.returncode == 0, result.stderr
    assert result.stderr == "" and result.stdout.startswith("wrote ")
    assert result.out.is_file() and not list(result.folder.glob(".out.nc.*.part"))
    assert upscale.open_field(result.out).sizes["x"] == 3


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_bad_input(case: Case, outcomes):
    check_outcome(case, outcomes[case.id])


FRESH_SAMPLE = ["missing-file", "nan-permeability", "ratio-not-a-number", "output-folder-missing"]
BY_ID = {c.id: c for c in CASES}


@pytest.fixture(scope="module")
def fresh_outcomes(request, tmp_path_factory, small_fine_factory, cli_command, cli_env) -> dict[str, Outcome]:
    """The sample, each in a fresh `python -m upscale.cli` (the last one also via the console script)."""
    selected = [BY_ID[i] for i in FRESH_SAMPLE if i in _selected(request, "test_fresh_interpreter")]
    root = tmp_path_factory.mktemp("bad_input_fresh")
    script = Path(sys.executable).with_name("upscale")
    jobs = {(c.id, "module"): (c, cli_command) for c in selected}
    if selected and script.exists():
        jobs[(selected[-1].id, "script")] = (selected[-1], [str(script)])
    workers = max(2, min(4, os.cpu_count() or 2))
    with ThreadPoolExecutor(max_workers=workers) as pool:
        futures = {key: pool.submit(run_fresh, case, root / "-".join(key), small_fine_factory, command, cli_env)
                   for key, (case, command) in jobs.items()}
        return {key: future.result() for key, future in futures.items()}


@pytest.mark.parametrize("case", [BY_ID[i] for i in FRESH_SAMPLE], ids=FRESH_SAMPLE)
def test_fresh_interpreter(case: Case, fresh_outcomes, outcomes):
    """A fresh interpreter (and the console script) behaves as the forked children do."""
    runs = {how: result for (name, how), result in fresh_outcomes.items() if name == case.id}
    assert runs
    for how, result in runs.items():
        check_outcome(case, result)
        if case.id in outcomes:
            forked = outcomes[case.id]
            same = (lambda text, r: text.replace(str(r.folder), "FOLDER"))
            assert (result.returncode, same(result.stderr, result)) == \
                (forked.returncode, same(forked.stderr, forked)), how


# ----------------------------------------------------------------------------- Python API

def test_api_nan_permeability_raises_input_error(tmp_path, small_fine_factory):
    path = cell("kx", np.nan)(tmp_path, small_fine_factory)
    with pytest.raises(upscale.InputError, match=r"'kx' is NaN or infinite in active cells in 1 cell\(s\), "
                                                  r"first at \(x=1, y=2, z=3\)"):
        upscale.open_field(path)


def test_api_wrong_dimension_order_raises_input_error(tmp_path, small_fine_factory):
    path = mutated(kx_transposed)(tmp_path, small_fine_factory)
    with pytest.raises(upscale.InputError, match=r"'kx' has dimension order \(z, y, x\)"):
        upscale.open_field(path)


def test_api_truncated_file_raises_input_error(tmp_path, small_fine_factory):
    path = raw_file(lambda make: valid_bytes(make)[:1000])(tmp_path, small_fine_factory)
    with pytest.raises(upscale.InputError, match="not a readable NetCDF file"):
        upscale.open_field(path)


@pytest.mark.parametrize("kwargs, message", [
    ({"ratio": (0, 2, 2)}, "ratio along x is 0"),
    ({"ratio": (2, 2, 2), "method": "bilinear"}, "unknown method 'bilinear'"),
    ({"ratio": (2, 2, 2), "method": "power"}, "'power' needs a finite exponent omega"),
    ({"edges": {"z": [0, 5, 3]}, "method": "arithmetic"}, "strictly increasing"),
    ({"ratio": (2, 2, 2), "method": "flow", "bc": "weird"}, "unknown boundary condition 'weird'"),
    ({"ratio": (2, 2, 2), "pinch_thickness": -1.0}, "pinch thickness must be a finite number >= 0"),
    ({"ratio": (2, 2, 2), "pinch_thickness": "thin"}, "pinch thickness must be a number >= 0"),
], ids=["ratio-zero", "unknown-method", "power-without-omega", "edges-unsorted", "unknown-bc", "negative-pinch",
        "pinch-not-a-number"])
def test_api_bad_options_raise_input_error(kwargs, message, small_fine):
    fine = validate(small_fine)
    with pytest.raises(upscale.InputError, match=message.replace("(", r"\(")):
        upscale.coarsen(fine, **kwargs)


API_SAMPLE = ["truncated-netcdf", "corrupt-header-library-crash", "missing-variable-porosity",
              "wrong-dimension-order", "text-variable", "nan-permeability", "time-units-on-dx", "active-value-2"]


@pytest.mark.parametrize("case", [BY_ID[i] for i in API_SAMPLE], ids=API_SAMPLE)
def test_api_same_message_as_cli(case: Case, outcomes):
    """upscale.open_field on the very file raises InputError with the message the CLI printed."""
    result = outcomes[case.id]
    with pytest.raises(upscale.InputError) as info:
        upscale.open_field(result.fine)
    assert f"upscale: error: {info.value}" == result.stderr.strip()


def test_api_validate_in_memory(small_fine):
    """validate() on an in-memory Dataset: the same message, located by ``where``."""
    ds = small_fine
    ds["porosity"].values[0, 1, 2] = -0.1
    with pytest.raises(upscale.InputError) as info:
        validate(ds, where="memory")
    assert str(info.value).startswith("memory: variable 'porosity' is negative in active cells in 1 cell(s), "
                                      "first at (x=0, y=1, z=2)")
