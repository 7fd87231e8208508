"""Unit handling at the boundary: everything inside planetmix is a mass fraction (kg/kg).

Accepted units for concentrations are declared once in :data:`MASS_UNITS`. Oxide
wt% is recognised from the element column (``SiO2``) and converted with formula
weights from :mod:`periodictable`.
"""

from __future__ import annotations

import re
from functools import cache

import periodictable

from .exceptions import InputError

__all__ = [
    "MASS_UNITS",
    "to_mass_fraction_factor",
    "parse_species",
    "oxide_to_element_factor",
    "atomic_weight",
    "normalise_unit",
]

#: Factor that turns a value in the unit into a mass fraction.
MASS_UNITS: dict[str, float] = {
    "wt%": 1e-2,
    "ppm": 1e-6,
    "ppb": 1e-9,
    "mass_fraction": 1.0,
}

_ALIASES = {
    "wt%": "wt%",
    "wt.%": "wt%",
    "wt %": "wt%",
    "%": "wt%",
    "ppm": "ppm",
    "µg/g": "ppm",
    "ug/g": "ppm",
    "μg/g": "ppm",
    "ppb": "ppb",
    "ng/g": "ppb",
    "mass_fraction": "mass_fraction",
    "kg/kg": "mass_fraction",
}


def normalise_unit(unit: object) -> str | None:
    """Return the canonical name of a concentration unit, or None if it is unknown."""
    if not isinstance(unit, str):
        return None
    return _ALIASES.get(unit.strip().lower().replace("µ", "µ"))


def to_mass_fraction_factor(unit: str) -> float:
    """Factor turning a value in ``unit`` into a mass fraction.

    Examples
    --------
    >>> to_mass_fraction_factor("ppm")
    1e-06
    """
    canon = normalise_unit(unit)
    if canon is None:
        raise InputError(
            f"unknown unit; use one of {sorted(set(_ALIASES))}", field="unit", value=unit
        )
    return MASS_UNITS[canon]


_SPECIES = re.compile(r"^([A-Z][a-z]?)(\d*)(?:O(\d*))?$")


@cache
def parse_species(name: str) -> tuple[str, int, int] | None:
    """Split an element or oxide name into (element, cations, oxygens).

    ``"Si"`` -> ``("Si", 1, 0)``, ``"SiO2"`` -> ``("Si", 1, 2)``, ``"Al2O3"`` ->
    ``("Al", 2, 3)``, ``"FeO"`` -> ``("Fe", 1, 1)``. Returns None when the name is
    neither a known element nor a simple oxide of one.

    Examples
    --------
    >>> parse_species("Al2O3")
    ('Al', 2, 3)
    >>> parse_species("O")
    ('O', 1, 0)
    """
    if not isinstance(name, str):
        return None
    name = name.strip()
    if _is_element(name):
        return (name, 1, 0)
    m = _SPECIES.match(name)
    if not m or m.group(3) is None and "O" not in name[len(m.group(1)) :]:
        return None
    el = m.group(1)
    if not _is_element(el) or el == "O":
        return None
    n_cat = int(m.group(2) or 1)
    n_ox = int(m.group(3) or 1)
    return (el, n_cat, n_ox)


def _is_element(symbol: str) -> bool:
    if not symbol or symbol in ("n", "D", "T"):
        return False
    try:
        el = periodictable.elements.symbol(symbol)
    except ValueError:
        return False
    return 0 < el.number <= 94


@cache
def atomic_weight(symbol: str) -> float:
    """Standard atomic weight in g/mol from :mod:`periodictable`.

    Examples
    --------
    >>> round(atomic_weight("Mg"), 3)
    24.305
    """
    return float(periodictable.elements.symbol(symbol).mass)


@cache
def oxide_to_element_factor(element: str, n_cat: int, n_ox: int) -> float:
    """Mass of element per unit mass of the oxide ``element_{n_cat} O_{n_ox}``.

    Examples
    --------
    >>> round(oxide_to_element_factor("Si", 1, 2), 4)
    0.4674
    """
    m_el = n_cat * atomic_weight(element)
    return m_el / (m_el + n_ox * atomic_weight("O"))
