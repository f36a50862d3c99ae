"""Unit constants, derived from their SI definitions rather than typed in.

Transmissibility constants follow from Darcy's law q = k A dp / (mu L):
metric  T [m3 cP/(day bar)] = C_metric * k[mD] * A[m2] / L[m]
field   T [rb cP/(day psi)] = C_field  * k[mD] * A[ft2] / L[ft]

:func:`unit_system` names the two transmissibility unit systems, metric and field.
"""

from __future__ import annotations

from ..errors import InputError

DARCY_M2 = 9.869233e-13        # 1 darcy in m2 (API RP 27 definition)


MILLIDARCY_M2 = DARCY_M2 * 1e-3


CENTIPOISE_PA_S = 1e-3


BAR_PA = 1e5


PSI_PA = 6894.757


FOOT_M = 0.3048


RESERVOIR_BARREL_M3 = 0.158987


DAY_S = 86400.0


#: m3 cP / (day bar mD m): about 0.008527
METRIC_TRANSMISSIBILITY = MILLIDARCY_M2 * BAR_PA / CENTIPOISE_PA_S * DAY_S


#: rb cP / (day psi mD ft): about 0.001127
FIELD_TRANSMISSIBILITY = (MILLIDARCY_M2 * FOOT_M * PSI_PA / CENTIPOISE_PA_S
                          * DAY_S / RESERVOIR_BARREL_M3)


LENGTH_TO_M = {"m": 1.0, "metre": 1.0, "meter": 1.0, "metres": 1.0, "meters": 1.0,
               "ft": FOOT_M, "feet": FOOT_M, "foot": FOOT_M}


PERMEABILITY_TO_MD = {"md": 1.0, "millidarcy": 1.0, "d": 1000.0, "darcy": 1000.0}


#: name -> (units string, constant for mD and the length unit, metres -> length unit).
TRANSMISSIBILITY_UNITS = {
    "metric": ("m3*cP/(day*bar)", METRIC_TRANSMISSIBILITY, 1.0),
    "field": ("rb*cP/(day*psi)", FIELD_TRANSMISSIBILITY, 1.0 / FOOT_M),
}


def unit_system(units: str) -> tuple[str, float, float]:
    """The transmissibility unit system of a name.

    Parameters
    ----------
    units : str
        'metric' or 'field'.

    Returns
    -------
    (str, float, float)
        The units string, the constant (for mD and the length unit) and the
        metres-to-length factor; InputError for an unknown name.
    """
    if units not in TRANSMISSIBILITY_UNITS:
        raise InputError(f"unknown transmissibility units '{units}'; choose metric or field")
    return TRANSMISSIBILITY_UNITS[units]
