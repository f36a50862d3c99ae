"""Unit constants against handbook values.

Ertekin, Abou-Kassem & King (2001), Basic Applied Reservoir Simulation, SPE Textbook
Series 7: transmissibility conversion 0.001127 rb cP/(day psi mD ft) in field units and
0.008527 m3 cP/(day bar mD m) in metric units. Both are re-derived here from the SI
definitions (1 darcy = 9.869233e-13 m2, API RP 27, from memory; 1 cP = 1e-3 Pa s;
1 bar = 1e5 Pa; 1 psi = 6894.757 Pa; 1 ft = 0.3048 m; 1 rb = 0.158987 m3).
"""

import pytest

from upscale.core.units import DARCY_M2, FIELD_TRANSMISSIBILITY, METRIC_TRANSMISSIBILITY


def test_metric_constant_matches_handbook():
    derived = 9.869233e-13 * 1e-3 * 1e5 / 1e-3 * 86400.0   # mD->m2, bar->Pa, /cP, s->day
    assert METRIC_TRANSMISSIBILITY == pytest.approx(derived, rel=1e-12)
    assert METRIC_TRANSMISSIBILITY == pytest.approx(0.008527, abs=5e-7)  # Ertekin et al. 2001


def test_field_constant_matches_handbook():
    derived = 9.869233e-16 * 0.3048 * 6894.757 / 1e-3 * 86400.0 / 0.158987
    assert FIELD_TRANSMISSIBILITY == pytest.approx(derived, rel=1e-12)
    assert FIELD_TRANSMISSIBILITY == pytest.approx(0.001127, abs=5e-7)  # Ertekin et al. 2001


def test_darcy_definition():
    # 1 darcy passes 1 cm3/s of 1 cP fluid through 1 cm2 under 1 atm/cm (API RP 27):
    # k = q mu L / (A dp) with atm = 101325 Pa.
    k = 1e-6 * 1e-3 * 1e-2 / (1e-4 * 101325.0)
    assert DARCY_M2 == pytest.approx(k, rel=1e-6)
