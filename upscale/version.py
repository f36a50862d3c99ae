"""The installed version of the tool."""

from importlib.metadata import PackageNotFoundError, version


def tool_version() -> str:
    try:
        return version("upscale")
    except PackageNotFoundError:  # running from a source tree that is not installed
        return "0+unknown"
