"""upscale: coarsen fine geomodels for flow simulation and prove the coarse grid still
flows like the fine one.

    import upscale
    fine = upscale.open_field("fields/demo.nc")
    coarse = upscale.coarsen(fine, ratio=(5, 5, 5), method="flow", bc="sealed")
    upscale.write(coarse, "out.nc")
"""

from .coarse_grid import coarsen
from .errors import InputError
from .field import open_field, write
from .version import tool_version

__version__ = tool_version()
__all__ = ["open_field", "coarsen", "write", "InputError", "__version__"]
