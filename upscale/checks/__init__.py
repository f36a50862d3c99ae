"""Judgements of a coarse grid against its fine field (whole-model steady and transient
flow, block by block, layering) and of a field on its own (the inspect summary), each a
JSON-ready metrics dict. Imports ``upscale.core`` and ``upscale.io``."""
