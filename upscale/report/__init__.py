"""What people read: the HTML report, its figures (matplotlib) and text tables.
Imports ``upscale.checks``, ``upscale.io``, ``upscale.core`` and matplotlib."""
