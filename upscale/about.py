"""What every output says about the tool: its version and the caution carried by reports and coarse files."""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version


def tool_version() -> str:
    try:
        return version("upscale")
    except PackageNotFoundError:  # running from a source tree that is not installed
        return "0+unknown"


CAUTION = ("upscale is a screening and engineering tool. These results are to be reviewed by "
           "qualified engineers before they inform reserves, development or well decisions. "
           "Local regulations and licensed professional practice prevail.")
