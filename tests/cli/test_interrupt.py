"""Killed or interrupted runs never leave a file at the output path.

Outputs are written to a temporary ``.OUT.*.part`` next to OUT and renamed into place
when complete (``upscale.field.atomic_write``). After SIGKILL nothing can clean up, so a
``.part`` may stay behind, but OUT itself must not exist. After Ctrl-C (SIGINT) the tool
removes the temporary, says it was interrupted and exits with 130.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from upscale import write
from upscale._runtime import interrupt_after
from upscale.gallery.synthetic import lognormal_field
from upscale.io.schema import arrays
from upscale.io.validation import validate

pytestmark = pytest.mark.skipif(sys.platform == "win32", reason="POSIX signals")

START_TIMEOUT = 60.0   # seconds to reach the phase we want to interrupt (start-up is slow on a busy machine)
EXIT_TIMEOUT = 30.0    # seconds for the process to end after the signal
HELD_FOR_KERNELS = "upscale: interrupt received; stopping once the compiled kernels are ready"


def _parts(folder: Path, out: Path) -> list[Path]:
    return sorted(folder.glob(f".{out.name}.*.part"))


def _wait_for(condition, proc: subprocess.Popen, timeout: float = START_TIMEOUT, step: float = 0.002):
    """Poll ``condition()`` until it returns something truthy, the process ends, or the timeout."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        found = condition()
        if found:
            return found
        if proc.poll() is not None:
            return None
        time.sleep(step)
    return None


def _finish(proc: subprocess.Popen) -> tuple[int, str]:
    try:
        _, stderr = proc.communicate(timeout=EXIT_TIMEOUT)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.communicate()
        pytest.fail(f"the process did not end within {EXIT_TIMEOUT} s of the signal")
    return proc.returncode, stderr


def _start(args, cwd: Path, cli_command, cli_env) -> subprocess.Popen:
    return subprocess.Popen([*cli_command, *args], cwd=cwd, env=cli_env, stdin=subprocess.DEVNULL,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _has_netcdf_loaded(pid: int) -> bool:
    """True once the process has loaded the NetCDF library, i.e. it has started reading the field."""
    try:
        return "netcdf" in Path(f"/proc/{pid}/maps").read_text().lower()
    except OSError:
        return False


def _writing(folder: Path, out: Path):
    """The temporary file, once it exists and has data in it (the write is under way)."""
    parts = _parts(folder, out)
    return parts[0] if parts and parts[0].stat().st_size > 0 else None


MAKE_FIELD = ("make-field", "lognormal", "--shape", "100", "100", "100", "--seed", "3")


def _signal_while_writing(tmp_path, cli_command, cli_env, sig) -> tuple[Path, int, str]:
    """Start a large make-field, send ``sig`` once its temporary file has data; returns
    (output path, exit code, stderr), having checked that the write was under way."""
    out = tmp_path / "big.nc"
    proc = _start([*MAKE_FIELD, "-o", str(out)], tmp_path, cli_command, cli_env)
    try:
        part = _wait_for(lambda: _writing(tmp_path, out), proc)
        still_running = proc.poll() is None
        proc.send_signal(sig)
    finally:
        returncode, stderr = _finish(proc)
    assert part is not None and still_running, (
        f"never saw the process writing its temporary file (exit {returncode}): {stderr}")
    return out, returncode, stderr


def test_sigkill_while_writing_leaves_no_output(tmp_path, cli_command, cli_env):
    out, returncode, _ = _signal_while_writing(tmp_path, cli_command, cli_env, signal.SIGKILL)
    assert returncode == -signal.SIGKILL
    assert not out.exists(), "a killed write left a file at the output path"
    # Nothing can clean up after SIGKILL: the temporary may stay, but only under its own name.
    leftovers = _parts(tmp_path, out)
    assert all(p.name.startswith(".big.nc.") and p.name.endswith(".part") for p in leftovers)
    assert sorted(p.name for p in tmp_path.iterdir() if not p.name.startswith(".")) == []


def test_ctrl_c_while_writing_cleans_up(tmp_path, cli_command, cli_env):
    out, returncode, stderr = _signal_while_writing(tmp_path, cli_command, cli_env, signal.SIGINT)
    assert "Traceback" not in stderr, stderr
    assert returncode == 130, stderr
    assert "interrupted" in stderr, stderr
    assert not out.exists()
    assert _parts(tmp_path, out) == [], "Ctrl-C left the temporary file behind"


@pytest.fixture
def flow_field(tmp_path) -> Path:
    """A field whose flow-based coarsening with multipliers (8 x 8 x 8 blocks) takes a few
    seconds (about 2 s of solves here). The local-solve kernels are compiled (and cached for
    the command) first, so that the interrupt lands in the solves and the command does not
    spend the test's time compiling."""
    from upscale.core.block_problems import flow_tensors
    from upscale.core.partition import make_partition

    small = arrays(validate(lognormal_field(shape=(8, 8, 8), seed=1)))
    flow_tensors(small, make_partition((8, 8, 8), ratio=(4, 4, 4)), "sealed")
    path = tmp_path / "fine.nc"
    write(lognormal_field(shape=(64, 64, 64), seed=5), path)
    return path


def test_ctrl_c_during_coarsen_flow(tmp_path, flow_field, cli_command, cli_env):
    out = tmp_path / "coarse.nc"
    args = ["coarsen", str(flow_field), "-o", str(out), "--ratio", "8", "8", "8", "--method", "flow", "--multipliers"]
    proc = _start(args, tmp_path, cli_command, cli_env)
    try:
        if Path("/proc").is_dir():
            reading = _wait_for(lambda: _has_netcdf_loaded(proc.pid), proc, step=0.01)
        else:  # no /proc: allow for start-up
            time.sleep(4.0)
            reading = True
        time.sleep(0.5)  # into the local flow solves
        still_running = proc.poll() is None
        proc.send_signal(signal.SIGINT)
    finally:
        returncode, stderr = _finish(proc)
    assert reading and still_running, f"the run ended before it could be interrupted (exit {returncode}): {stderr}"
    assert "Traceback" not in stderr, stderr
    assert returncode == 130, stderr
    lines = stderr.splitlines()
    assert lines[-1] == "upscale: interrupted; no output was left behind", stderr
    assert lines[:-1] in ([], [HELD_FOR_KERNELS]), stderr  # landed in a kernel's first call
    assert not out.exists()
    assert _parts(tmp_path, out) == []
    assert sorted(p.name for p in tmp_path.iterdir()) == ["fine.nc"]


def test_interrupt_is_held_until_the_write_block_ends():
    # A Ctrl-C inside the block must not cut it short (a lock taken by the NetCDF layer
    # could stay held); it is raised once the block is done, and the old handler is back.
    before = signal.getsignal(signal.SIGINT)
    finished = []
    with pytest.raises(KeyboardInterrupt):
        with interrupt_after():
            os.kill(os.getpid(), signal.SIGINT)
            time.sleep(0.05)
            finished.append(True)
    assert finished == [True]
    assert signal.getsignal(signal.SIGINT) is before
    with interrupt_after():  # no signal: nothing raised
        pass

