"""Forked worker processes may run the compiled parallel kernels after their parent did.

With numba's GNU OpenMP threading layer a forked child that starts a parallel region is
terminated (numba's documentation on threading layers: that runtime is not fork-safe), and
a process pool then waits for the lost job for ever. The package picks a fork-safe layer
on import; this runs the case in a fresh interpreter, the way a command does."""

import subprocess
import sys
import textwrap

from conftest import PROJECT_ROOT

SCRIPT = textwrap.dedent("""
    import numpy as np
    import upscale
    from upscale._runtime import forked_map
    from upscale.io.schema import fine_dataset

    shape = (24, 24, 12)
    k = np.exp(np.random.default_rng(3).normal(3.0, 1.0, shape))
    fine = fine_dataset(k, k, k / 10, np.full(shape, 0.2), np.full(24, 10.0), np.full(24, 10.0), np.full(12, 1.0))

    def job(field, seed):
        return float(upscale.coarsen(field, ratio=(4, 4, 3), method="flow", bc="sealed")["kx"].sum())

    here = job(fine, 0)  # the parent runs the parallel kernels first
    there = forked_map(job, fine, [1, 2], processes=2)
    import numba
    print(numba.threading_layer(), here, *there)  # the layer, for the failure message
""")


def test_workers_forked_after_parallel_kernels_run_them_too():
    done = subprocess.run([sys.executable, "-c", SCRIPT], capture_output=True, text=True, timeout=300,
                          cwd=PROJECT_ROOT)
    assert done.returncode == 0, done.stderr  # without a fork-safe layer: no return, the timeout fails it
    _layer, here, *there = done.stdout.split()
    assert [float(v) for v in there] == [float(here)] * 2
