"""Barriers on coarse faces: multipliers below a threshold."""

from __future__ import annotations

import numpy as np


def barrier_summary(face_multipliers: dict[str, np.ndarray], threshold: float = 0.1) -> dict:
    """Count of faces per direction whose multiplier is below ``threshold``."""
    return {"threshold": threshold,
            **{name: {"faces": int(m.size), "below": int((m < threshold).sum()),
                      "closed": int((m == 0).sum())} for name, m in face_multipliers.items()}}
