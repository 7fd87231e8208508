"""Radiogenic heat production of a silicate mantle (docs/model.md section 11).

Heat from the decay of 238U, 235U, 232Th and 40K, per kg of mantle, today and back in
time, vectorised over draws.

Notes
-----
With mantle mass fractions C_U, C_Th, C_K (kg/kg) and, for each isotope j of element
e(j), its mass fraction X_j in today's element and its specific heat production H_j
(W per kg of isotope), the heat production per kg of mantle a time t ago is

    H(t) = sum_j C_e(j) X_j H_j exp(ln 2 t / t_half,j)

Today (t = 0) this reproduces the per-element values of Turcotte & Schubert (2014,
Table 4.2) for U, Th and K to within their rounding (checked in the tests). The isotope
mass fractions come from the atom fractions below and the isotope masses of
:mod:`periodictable`.

References
----------
Turcotte D. L., Schubert G. (2014) Geodynamics, 3rd ed., Table 4.2 (specific heat
production and half-lives; source key ``turcotteschubert2014``).
Isotopic abundances (atom %): U 238U 99.2742, 235U 0.7204, 234U 0.0054; K 40K 0.0117;
Th 232Th 100 (IUPAC/CIAAW standard atomic weights and isotopic compositions; values
from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cache

import numpy as np
import periodictable

__all__ = ["ELEMENT_HEAT_W_PER_KG", "ISOTOPES", "Isotope", "isotope_mass_fraction",
           "heat_production", "heat_history", "HISTORY_GYR", "HEAT_SOURCE_KEY"]

HEAT_SOURCE_KEY = "turcotteschubert2014"

#: Heat production per kg of element with today's isotopic make-up [W/kg]
#: (Turcotte & Schubert 2014, Table 4.2).
ELEMENT_HEAT_W_PER_KG: dict[str, float] = {"U": 9.81e-5, "Th": 2.64e-5, "K": 3.48e-9}


@dataclass(frozen=True)
class Isotope:
    """A heat-producing isotope: its element, specific heat [W/kg of isotope], half-life
    [Gyr] and its atom fraction in today's element."""

    name: str
    element: str
    mass_number: int
    w_per_kg: float
    half_life_gyr: float
    atom_fraction: float


#: Turcotte & Schubert (2014) Table 4.2 (W/kg, half-lives); atom fractions IUPAC/CIAAW
#: (from memory).
ISOTOPES: tuple[Isotope, ...] = (
    Isotope("238U", "U", 238, 9.46e-5, 4.47, 0.992742),
    Isotope("235U", "U", 235, 5.69e-4, 0.704, 0.007204),
    Isotope("232Th", "Th", 232, 2.64e-5, 14.0, 1.0),
    Isotope("40K", "K", 40, 2.92e-5, 1.25, 0.000117),
)
#: Minor isotopes needed to turn atom fractions into mass fractions (atom fractions).
_OTHER_ISOTOPES = {"U": ((234, 0.000054),), "K": ((39, 0.932581), (41, 0.067302))}

#: Default times (Gyr before present) of the reported history.
HISTORY_GYR: tuple[float, ...] = (0.0, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0, 3.5, 4.0, 4.5)


@cache
def isotope_mass_fraction(name: str) -> float:
    """Mass fraction of an isotope in today's element (kg of isotope per kg of element).

    Examples
    --------
    >>> round(isotope_mass_fraction("235U"), 5)
    0.00711
    """
    iso = next(i for i in ISOTOPES if i.name == name)
    el = periodictable.elements.symbol(iso.element)
    parts = [(i.mass_number, i.atom_fraction) for i in ISOTOPES if i.element == iso.element]
    parts += list(_OTHER_ISOTOPES.get(iso.element, ()))
    total = sum(x * float(el[a].mass) for a, x in parts)
    return iso.atom_fraction * float(el[iso.mass_number].mass) / total


def heat_history(c_U: np.ndarray | float, c_Th: np.ndarray | float, c_K: np.ndarray | float,
                 times_gyr: tuple[float, ...] | np.ndarray = HISTORY_GYR) -> np.ndarray:
    """Heat production per kg of mantle at times before present [W/kg].

    Parameters
    ----------
    c_U, c_Th, c_K : float or ndarray, shape (B,)
        Mantle mass fractions of U, Th and K [kg/kg].
    times_gyr : sequence of float, shape (T,)
        Times before present [Gyr].

    Returns
    -------
    ndarray, shape (B, T)

    Examples
    --------
    >>> h = heat_history(20e-9, 80e-9, 240e-6, (0.0, 4.5))
    >>> bool(h[0, 1] > 3 * h[0, 0])
    True
    """
    conc = np.stack(np.broadcast_arrays(np.atleast_1d(np.asarray(c_U, float)),
                                        np.atleast_1d(np.asarray(c_Th, float)),
                                        np.atleast_1d(np.asarray(c_K, float))), axis=1)
    t = np.asarray(times_gyr, float)
    # per element: W per kg of today's element at each time, summed over its isotopes
    per_element = np.zeros((3, t.size))
    row = {"U": 0, "Th": 1, "K": 2}
    for iso in ISOTOPES:
        per_element[row[iso.element]] += (isotope_mass_fraction(iso.name) * iso.w_per_kg
                                          * np.exp(math.log(2.0) * t / iso.half_life_gyr))
    out = (conc[:, 0:1] * per_element[0] + conc[:, 1:2] * per_element[1]
           + conc[:, 2:3] * per_element[2])
    return out


def heat_production(c_U: np.ndarray | float, c_Th: np.ndarray | float,
                    c_K: np.ndarray | float) -> np.ndarray:
    """Today's heat production per kg of mantle [W/kg] (sum over the four isotopes).

    Examples
    --------
    >>> # McDonough & Sun (1995) bulk silicate Earth: U 20.3 ppb, Th 79.5 ppb, K 240 ppm
    >>> float(heat_production(20.3e-9, 79.5e-9, 240e-6)[0] * 4.0e24 / 1e12) // 1
    19.0
    """
    return heat_history(c_U, c_Th, c_K, (0.0,))[:, 0]
