"""upscale: coarsen fine geomodels for flow simulation and prove the coarse grid still
flows like the fine one.

    import upscale
    fine = upscale.open_field("fields/demo.nc")
    coarse = upscale.coarsen(fine, ratio=(5, 5, 5), method="flow", bc="sealed")
    upscale.write(coarse, "out.nc")

The public names are loaded on first use, so that ``upscale --help`` starts quickly and
an interrupt while the heavy libraries load ends cleanly.
"""

from importlib import import_module

from .errors import InputError
from .version import tool_version

__version__ = tool_version()
__all__ = ["open_field", "coarsen", "write", "check", "InputError", "__version__"]

_PUBLIC = {"open_field": "field", "write": "field", "coarsen": "coarse_grid", "check": "quality"}


def __getattr__(name):
    if name in _PUBLIC:
        module = import_module(f".{_PUBLIC[name]}", __name__)
        return getattr(module, name)
    raise AttributeError(f"module 'upscale' has no attribute {name!r}")
