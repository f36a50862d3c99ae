"""Synthetic fields (invented data) and the demo scenario. Imports ``upscale.core`` and
``upscale.io``."""
