"""Coarse face transmissibilities from coarse permeability (two-point flux).

T = C / (1/T1 + 1/T2) with T_i = k_i A_i / (L_i / 2) from each block's own face area and
length along the direction; 0 where either block is inactive. C converts mD*m to
m3*cP/(day*bar) (metric) or mD*ft to rb*cP/(day*psi) (field); see :mod:`upscale.units`.
"""

from __future__ import annotations

import numpy as np

from .errors import InputError
from .tpfa import transmissibilities
from .units import TRANSMISSIBILITY_UNITS


def unit_system(units: str) -> tuple[str, float, float]:
    """(units string, constant, metres-to-length factor) of ``metric`` or ``field``."""
    if units not in TRANSMISSIBILITY_UNITS:
        raise InputError(f"unknown transmissibility units '{units}'; choose metric or field")
    return TRANSMISSIBILITY_UNITS[units]


def coarse_transmissibility(k_effective: tuple[np.ndarray, np.ndarray, np.ndarray], dx, dy, dz,
                            active: np.ndarray, units: str = "metric") -> list[np.ndarray]:
    """Interior-face transmissibilities along x, y, z of a coarse grid.

    ``k_effective`` are the permeabilities that carry flow (mD; horizontal values already
    multiplied by net-to-gross); ``dx`` (NX,), ``dy`` (NY,), ``dz`` (NX, NY, NZ) in m.
    Returns three arrays with NX-1, NY-1, NZ-1 faces on their axis, in ``units``.
    """
    _, constant, to_length = unit_system(units)
    k = tuple(np.where(active, kk, 0.0) for kk in k_effective)
    # T scales with length (A / L): mD*m -> mD*ft multiplies by the metres-to-feet factor.
    _, faces = transmissibilities(k, dx, dy, dz)
    return [constant * to_length * f for f in faces]
