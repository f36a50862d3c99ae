"""The command line ``upscale VERB ...`` (see :mod:`upscale.cli.main`); kept light so that
``upscale --help`` answers at once."""

from .main import main, run

__all__ = ["main", "run"]
