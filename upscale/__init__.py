"""upscale: turn a fine geomodel into a coarse simulation grid, and measure with flow
solves how much of the fine model's flow the coarse grid keeps.

    import upscale
    fine = upscale.open_field("fields/demo.nc")
    coarse = upscale.coarsen(fine, ratio=(5, 5, 5), method="flow", bc="sealed")
    upscale.write(coarse, "out.nc")
    metrics = upscale.check(fine, coarse)
    curves = upscale.two_phase(fine, "rocks.toml", ratio=(5, 5, 5), limit="capillary")

The package is built in rooms, each importing only those before it::

    _runtime, errors, about   standard library only
    core                      numerics on numpy arrays (numpy, scipy, numba, pyamg)
    io                        NetCDF fields and coarse files (xarray, netCDF4)
    scale                     coarsening at any size: in memory or in boxes, clusters (dask)
    checks                    coarse grid against fine field -> metrics dicts
    report                    HTML page, figures, text tables (matplotlib)
    gallery                   synthetic fields and the demo scenario
    cli                       the command line

The public names are loaded on first use, so that ``upscale --help`` starts quickly and
an interrupt while the heavy libraries load ends cleanly.
"""

from importlib import import_module

from . import _runtime  # noqa: F401  (first: numba's threading layer must be fork-safe, see fork_safe_threads)

from .about import tool_version
from .errors import InputError

__version__ = tool_version()
__all__ = ["open_field", "coarsen", "write", "check", "two_phase", "InputError", "__version__"]

_PUBLIC = {"open_field": "io.reading", "write": "scale.stream", "coarsen": "scale.coarsen", "check": "checks.run",
           "two_phase": "scale.two_phase"}


def __getattr__(name):
    if name in _PUBLIC:
        module = import_module(f".{_PUBLIC[name]}", __name__)
        return getattr(module, name)
    raise AttributeError(f"module 'upscale' has no attribute {name!r}")
