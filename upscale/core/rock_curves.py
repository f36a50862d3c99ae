"""Two-phase (water-oil) curves of rock types: Corey relative permeability, the
Brooks-Corey J-function, Leverett's scaling to capillary pressure, fractional flow.

Both curve families use the normalised water saturation
``Sn = (Sw - swc) / (1 - swc - sor)``, clipped to 0..1:

- relative permeability (Corey 1954): ``krw = krw_max Sn^nw``, ``kro = kro_max (1 - Sn)^no``;
- Leverett J (Brooks & Corey 1964): ``J = j_entry Sn^(-1/lambda)`` for ``0 < Sn <= 1``,
  without bound as ``Sn -> 0``; ``lambda`` is the pore-size index;
- capillary pressure (Leverett 1941): ``Pc = sigma J sqrt(phi / k)``, sigma the interfacial
  tension (N/m, times the cosine of the contact angle), k in m2: Pc in Pa, reported in bar.
  A cell's entry pressure is ``Pe = sigma j_entry sqrt(phi / k)``; at or below it the cell
  holds ``Sw = 1 - sor``, above it ``Sn = (Pc / Pe)^(-lambda)``;
- fractional flow of water: ``fw = (krw / mu_w) / (krw / mu_w + kro / mu_o)``.

Examples
--------
A rock with swc = 0.2, sor = 0.2 at Sw = 0.5 (Sn = 0.5):

>>> import numpy as np
>>> rock = RockCurves(("sand",), *(np.array([v]) for v in (0.2, 0.2, 0.4, 0.8, 2.0, 2.0, 0.5, 2.0)))
>>> zero = np.zeros(1, int)
>>> round(float(rock.water(np.array([0.5]), zero)[0]), 12), round(float(rock.oil(np.array([0.5]), zero)[0]), 12)
(0.1, 0.2)
>>> round(float(rock.leverett_j(np.array([0.5]), zero)[0]), 6)   # 0.5 * 0.5^(-1/2)
0.707107
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numba import njit

from .units import BAR_PA, MILLIDARCY_M2

#: the rock table's keys per rock type, in the order of :class:`RockCurves`' arrays
ROCK_KEYS = ("swc", "sor", "krw_max", "kro_max", "nw", "no", "j_entry", "pore_size_index")


@dataclass(frozen=True)
class Fluids:
    """The two fluids.

    Attributes
    ----------
    water_viscosity, oil_viscosity : float
        cP.
    interfacial_tension : float
        N/m, times the cosine of the contact angle.
    """

    water_viscosity: float
    oil_viscosity: float
    interfacial_tension: float


@dataclass(frozen=True)
class RockCurves:
    """The curve parameters of R rock types, each an array (R,).

    Attributes
    ----------
    names : tuple of str
        The rock types' names.
    swc, sor : ndarray
        Connate water and residual oil saturation, fractions of pore volume.
    krw_max, kro_max : ndarray
        Water relative permeability at 1 - sor, oil relative permeability at swc.
    nw, no : ndarray
        Corey exponents of water and oil.
    j_entry : ndarray
        Leverett J at the entry pressure.
    pore_size_index : ndarray
        The Brooks-Corey lambda.

    Methods take ``rock``, an integer array of rock indices broadcastable against the
    saturations.
    """

    names: tuple[str, ...]
    swc: np.ndarray
    sor: np.ndarray
    krw_max: np.ndarray
    kro_max: np.ndarray
    nw: np.ndarray
    no: np.ndarray
    j_entry: np.ndarray
    pore_size_index: np.ndarray

    @property
    def span(self) -> np.ndarray:
        """Movable saturation 1 - swc - sor of each rock (R,)."""
        return 1.0 - self.swc - self.sor

    def normalised(self, sw: np.ndarray, rock: np.ndarray) -> np.ndarray:
        """Normalised saturation Sn, clipped to 0..1."""
        return np.clip((sw - self.swc[rock]) / self.span[rock], 0.0, 1.0)

    def saturation(self, normalised: np.ndarray, rock: np.ndarray) -> np.ndarray:
        """Water saturation Sw of a normalised saturation Sn."""
        return self.swc[rock] + self.span[rock] * normalised

    def water(self, sw: np.ndarray, rock: np.ndarray) -> np.ndarray:
        """Water relative permeability krw at Sw."""
        return self.water_at_normalised(self.normalised(sw, rock), rock)

    def oil(self, sw: np.ndarray, rock: np.ndarray) -> np.ndarray:
        """Oil relative permeability kro at Sw."""
        return self.oil_at_normalised(self.normalised(sw, rock), rock)

    def water_at_normalised(self, normalised: np.ndarray, rock: np.ndarray) -> np.ndarray:
        """Water relative permeability krw at the normalised saturation Sn (0..1)."""
        return self.krw_max[rock] * normalised ** self.nw[rock]

    def oil_at_normalised(self, normalised: np.ndarray, rock: np.ndarray) -> np.ndarray:
        """Oil relative permeability kro at the normalised saturation Sn (0..1)."""
        return self.kro_max[rock] * (1.0 - normalised) ** self.no[rock]

    def leverett_j(self, sw: np.ndarray, rock: np.ndarray) -> np.ndarray:
        """Leverett J at Sw (infinite at Sn = 0)."""
        sn = self.normalised(sw, rock)
        with np.errstate(divide="ignore"):
            return self.j_entry[rock] * sn ** (-1.0 / self.pore_size_index[rock])

    def normalised_at_fractional_flow(self, flow: np.ndarray, fluids: Fluids) -> np.ndarray:
        """Normalised saturation Sn of every rock type at which fw equals each given value.

        Solves ln kro - ln krw = ln(mu_o / mu_w) + ln((1 - F) / F), strictly decreasing in
        Sn, by bisection on all rock types and values at once (64 halvings: to round-off).

        Parameters
        ----------
        flow : ndarray, (P,)
            Fractional flows F in 0..1.

        Returns
        -------
        ndarray, (R, P)
            Sn: exactly 0 at F = 0 and 1 at F = 1 (where krw, kro vanish exactly; Sw turned
            back into Sn would miss them by round-off).
        """
        flow = np.asarray(flow, dtype=float)[None, :]
        rock = np.arange(len(self.names))[:, None]
        inside = (flow > 0) & (flow < 1)
        odds = np.log(fluids.oil_viscosity / fluids.water_viscosity) + np.log(
            np.where(inside, (1.0 - flow) / np.where(inside, flow, 1.0), 1.0))
        low, high = np.zeros(np.broadcast(flow, rock).shape), np.ones(np.broadcast(flow, rock).shape)
        for _ in range(64):
            middle = 0.5 * (low + high)
            ratio = (np.log(self.kro_max[rock]) + self.no[rock] * np.log1p(-middle)
                     - np.log(self.krw_max[rock]) - self.nw[rock] * np.log(middle))
            above = ratio > odds  # still too much oil: more water
            low, high = np.where(above, middle, low), np.where(above, high, middle)
        return np.where(flow <= 0, 0.0, np.where(flow >= 1, 1.0, 0.5 * (low + high)))


def leverett_scale(porosity: np.ndarray, permeability: np.ndarray, interfacial_tension: float) -> np.ndarray:
    """sigma sqrt(phi / k) of every cell, bar: its capillary pressure is this times J.

    Parameters
    ----------
    porosity : ndarray
        Fraction.
    permeability : ndarray
        mD (converted to m2).
    interfacial_tension : float
        N/m.

    Returns
    -------
    ndarray
        bar; 0 where the porosity is 0, infinite where k is 0 and the porosity is not
        (a cell no oil enters).
    """
    porosity = np.asarray(porosity, dtype=float)
    k = np.asarray(permeability, dtype=float) * MILLIDARCY_M2
    out = np.where(porosity > 0, np.inf, 0.0)
    np.divide(porosity, k, out=out, where=(k > 0) & (porosity > 0))
    return interfacial_tension * np.sqrt(out) / BAR_PA


@njit(cache=True)
def log_saturation_at_pressure(log_pc: float, log_entry: float, exponent: float) -> float:
    """ln Sn of a cell at a capillary pressure: the Brooks-Corey curve inverted, in logs
    (compiled; scalars).

    Parameters
    ----------
    log_pc : float
        ln of the capillary pressure in bar (may be +inf).
    log_entry : float
        ln of the cell's entry pressure in bar (+inf: never entered; -inf: no capillary
        pressure at all).
    exponent : float
        The cell's pore-size index lambda.

    Returns
    -------
    float
        0 (Sn = 1) at or below the entry pressure, lambda (ln Pe - ln Pc) above it:
        Sn = (Pe / Pc)^lambda; -inf (Sn = 0) at an infinite Pc.
    """
    if log_pc <= log_entry:
        return 0.0
    return exponent * (log_entry - log_pc)
