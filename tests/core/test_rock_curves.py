"""Rock curves: Corey relative permeability, Brooks-Corey J, Leverett scaling, fractional flow.

Every value here is computed by hand (or by a closed form derived on paper) from the
published definitions, not from the module under test:
- Corey (1954), "The interrelation between gas and oil relative permeabilities":
  kr = kr_max Sn^n with the normalised saturation Sn = (Sw - swc) / (1 - swc - sor);
- Brooks & Corey (1964), "Hydraulic properties of porous media": Pc = Pe Sn^(-1/lambda);
- Leverett (1941), "Capillary behavior in porous solids": J = Pc sqrt(k / phi) / sigma;
- the darcy: 1 D = 9.869233e-13 m2 (API RP 27; from memory).
"""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from upscale.core.rock_curves import Fluids, RockCurves, leverett_scale, log_saturation_at_pressure


def rock(swc=0.2, sor=0.2, krw_max=0.4, kro_max=0.8, nw=2.0, no=2.0, j_entry=0.5, pore_size_index=2.0):
    return RockCurves(("r",), *(np.array([v], dtype=float) for v in
                               (swc, sor, krw_max, kro_max, nw, no, j_entry, pore_size_index)))


ZERO = np.zeros(1, dtype=int)


def fractional_flow(r, sw, fluids):
    """fw = (krw / mu_w) / (krw / mu_w + kro / mu_o), 0 where neither phase flows."""
    rocks = np.zeros(np.shape(sw), dtype=int)
    water = r.water(sw, rocks) / fluids.water_viscosity
    total = water + r.oil(sw, rocks) / fluids.oil_viscosity
    return np.divide(water, total, out=np.zeros(np.shape(sw)), where=total > 0)


def test_corey_and_brooks_corey_at_hand_values():
    r = rock(nw=3.0, no=1.5, pore_size_index=4.0)
    sw = np.array([0.2, 0.35, 0.5, 0.8])      # Sn = 0, 0.25, 0.5, 1
    rocks = np.zeros(4, dtype=int)
    # krw = 0.4 Sn^3: 0, 0.4/64, 0.4/8, 0.4; kro = 0.8 (1 - Sn)^1.5: 0.8, 0.8 * 0.75^1.5, 0.8 * 0.5^1.5, 0
    np.testing.assert_allclose(r.water(sw, rocks), [0.0, 0.00625, 0.05, 0.4], rtol=1e-14, atol=1e-300)
    np.testing.assert_allclose(r.oil(sw, rocks), [0.8, 0.5196152422706632, 0.28284271247461906, 0.0],
                               rtol=1e-14, atol=1e-300)
    # J = 0.5 Sn^(-1/4): inf, 0.5 * 0.25^-0.25 = 0.7071..., 0.5 * 0.5^-0.25 = 0.5946..., 0.5
    j = r.leverett_j(sw, rocks)
    assert j[0] == np.inf
    np.testing.assert_allclose(j[1:], [0.7071067811865476, 0.5946035575013605, 0.5], rtol=1e-14)
    # outside swc .. 1 - sor the curves hold their end values
    np.testing.assert_allclose(r.water(np.array([0.0, 1.0]), rocks[:2]), [0.0, 0.4], rtol=1e-14)


def test_leverett_scaling_against_hand_values():
    # sigma = 0.025 N/m, phi = 0.25, k = 100 mD = 9.869233e-14 m2: phi / k = 2.533125e12 1/m2,
    # sqrt(phi / k) = 1.591579e6 1/m; sigma sqrt(phi / k) = 39789.48 Pa = 0.3978948 bar.
    scale = leverett_scale(np.array([0.25, 0.25]), np.array([100.0, 1.0]), 0.025)
    assert scale[0] == pytest.approx(0.3978948, rel=1e-6)  # seven digits typed above
    # a tighter cell of the same rock has the higher capillary pressure: sqrt(100 / 1) = 10 times
    assert scale[1] / scale[0] == pytest.approx(10.0, rel=1e-14)
    # a cell of zero permeability is never entered; one without pore space has no capillary pressure
    assert leverett_scale(np.array([0.2, 0.0]), np.array([0.0, 5.0]), 0.025).tolist() == [np.inf, 0.0]


@settings(max_examples=60, deadline=None)
@given(swc=st.floats(0.0, 0.4), sor=st.floats(0.0, 0.4), lam=st.floats(0.3, 6.0),
       entry=st.floats(1e-3, 10.0), sn=st.floats(1e-6, 1.0))
def test_brooks_corey_inversion_returns_the_saturation(swc, sor, lam, entry, sn):
    # Pc(Sn) = Pe Sn^(-1/lambda) (Brooks & Corey 1964), inverted: Sn = (Pc / Pe)^(-lambda) above
    # Pe, 1 at or below it. Round trip to a few ulps of the powers taken.
    pc = entry * sn ** (-1.0 / lam)
    assert np.exp(log_saturation_at_pressure(np.log(pc), np.log(entry), lam)) == pytest.approx(sn, rel=1e-12,
                                                                                              abs=1e-15)
    assert log_saturation_at_pressure(np.log(0.5 * entry), np.log(entry), lam) == 0.0   # Sn = 1
    assert log_saturation_at_pressure(np.inf, np.log(entry), lam) == -np.inf          # Sn = 0
    assert log_saturation_at_pressure(np.log(7.0), np.inf, lam) == 0.0                # never entered


@pytest.mark.parametrize("n", [1.0, 2.0, 3.5])
def test_normalised_saturation_at_fractional_flow_against_the_closed_form(n):
    # With equal Corey exponents n, fw = F gives (kro_max / krw_max) ((1 - Sn) / Sn)^n
    # = (mu_o / mu_w) (1 - F) / F, so Sn = 1 / (1 + ((mu_o / mu_w) (1 - F) / F krw_max / kro_max)^(1/n))
    # (algebra on Corey 1954). The bisection stops at 2^-64 of the unit interval: 1e-12.
    r = rock(swc=0.25, sor=0.3124492610940099, nw=n, no=n, krw_max=0.3, kro_max=0.9)
    fluids = Fluids(water_viscosity=0.5, oil_viscosity=2.0, interfacial_tension=0.03)
    flow = np.array([0.0, 0.01, 0.2, 0.5, 0.9, 0.999, 1.0])
    inside = flow[1:-1]
    sn = 1.0 / (1.0 + ((2.0 / 0.5) * (1 - inside) / inside * 0.3 / 0.9) ** (1.0 / n))
    got = r.normalised_at_fractional_flow(flow, fluids)[0]
    np.testing.assert_allclose(got[1:-1], sn, rtol=0, atol=1e-12)
    # the ends exactly, so that kro (krw) is exactly 0 there: with these swc, sor the Sw of
    # Sn = 1 normalised again is 1 - 1.1e-16, where kro would be 1e-32 instead of 0
    assert got[0] == 0.0 and got[-1] == 1.0
    assert r.oil_at_normalised(got[-1:], ZERO)[0] == 0.0 and r.water_at_normalised(got[:1], ZERO)[0] == 0.0
    np.testing.assert_allclose(fractional_flow(r, r.saturation(got, ZERO), fluids), flow, atol=1e-12)


@settings(max_examples=50, deadline=None)
@given(swc=st.floats(0.0, 0.45), sor=st.floats(0.0, 0.45), kw=st.floats(0.01, 1.0), ko=st.floats(0.01, 1.0),
       nw=st.floats(0.5, 6.0), no=st.floats(0.5, 6.0), lam=st.floats(0.3, 6.0))
def test_rock_curves_are_monotone(swc, sor, kw, ko, nw, no, lam):
    # krw rises, kro and J fall with Sw (powers of Sn with positive exponents): exactly
    # monotone, no tolerance needed beyond ties at the clipped ends.
    r = rock(swc=swc, sor=sor, krw_max=kw, kro_max=ko, nw=nw, no=no, pore_size_index=lam)
    sw = np.linspace(0.0, 1.0, 201)
    rocks = np.zeros(sw.size, dtype=int)
    assert np.all(np.diff(r.water(sw, rocks)) >= 0)
    assert np.all(np.diff(r.oil(sw, rocks)) <= 0)
    j = r.leverett_j(sw, rocks)
    entered = sw > swc  # J is infinite at Sn = 0
    assert np.all(np.isinf(j[~entered])) and np.all(np.diff(j[entered]) <= 0)
    fluids = Fluids(0.5, 2.0, 0.02)
    assert np.all(np.diff(fractional_flow(r, sw, fluids)) >= -1e-15)
