"""``python -m upscale.cli``: the command line."""

from .main import run

run()
