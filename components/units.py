"""Unit handling at the boundary: everything inside planetmix is a mass fraction (kg/kg).

Accepted units for concentrations are declared once in :data:`MASS_UNITS`. Oxide
wt% is recognised from the element column (``SiO2``) and converted with formula
weights from :mod:`periodictable`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
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
    "Limit",
    "PLAUSIBLE",
    "check_in_range",
    "EXTRA_OXIDATION_STATES",
    "MAX_INPUT_BYTES",
]


@dataclass(frozen=True)
class Limit:
    """A plausibility range of one input quantity, with the reason for its bounds.

    ``low_open``/``high_open`` make a bound exclusive.
    """

    low: float
    high: float
    unit: str
    reason: str
    low_open: bool = False
    high_open: bool = False

    def contains(self, value: float) -> bool:
        """Whether a finite ``value`` lies in the range."""
        if not math.isfinite(value):
            return False
        lo_ok = value > self.low if self.low_open else value >= self.low
        hi_ok = value < self.high if self.high_open else value <= self.high
        return lo_ok and hi_ok

    def describe(self) -> str:
        """The range as text, e.g. ``[-10, 5] log units``."""
        lo = "(" if self.low_open else "["
        hi = ")" if self.high_open else "]"
        return f"{lo}{self.low:g}, {self.high:g}{hi}{' ' + self.unit if self.unit else ''}"


#: The plausibility ranges of every input quantity, declared in this one place. Each
#: failure message quotes the range and its reason, so the user knows how to fix it.
PLAUSIBLE: dict[str, Limit] = {
    "mass_fraction": Limit(
        0.0, 1.0, "kg/kg", "a concentration is a part of the whole: 0 to 100 wt%"),
    # Analytical totals of major-element analyses scatter by a few wt% around 100
    # (98-102 wt% is accepted practice for microprobe and XRF totals, common practice);
    # 5 wt% above 100 leaves room for rounding and for volatiles listed beside oxides.
    "composition_total": Limit(
        0.0, 1.05, "kg/kg", "the concentrations of one table may not add up to much more "
        "than 100 wt%; analytical totals scatter by a few wt% (105 wt% accepted)"),
    # Stellar [X/H] of FGK stars in the solar neighbourhood lie within about -2.5 to
    # +0.6 dex for the abundant rock-forming elements (from memory, e.g. the spread of
    # the Hypatia-type compilations); +-3 dex keeps metal-poor halo stars and still
    # rejects mistyped values.
    "star_xh_dex": Limit(-3.0, 3.0, "dex", "stellar [X/H] lie within +-3 dex of solar"),
    # Reported 1-sigma of spectroscopic abundances are 0.01-0.3 dex (from memory); an
    # uncertainty above 3 dex means the element is not measured at all.
    "star_sigma_dex": Limit(0.0, 3.0, "dex", "a 1-sigma above 3 dex carries no "
                            "information; leave the element out instead"),
    # Metal-silicate experiments span about IW-7 to IW+3 (from memory, e.g. the
    # compilations of Wood et al. 2006 and Righter 2011); [-10, 5] covers all of them
    # with margin. Beyond it the partition models are extrapolated without support.
    "dIW": Limit(-10.0, 5.0, "log units", "oxygen fugacity relative to iron-wustite beyond "
                 "any metal-silicate experiment"),
    # Earth's late veneer is ~0.5 wt% of its mass (from memory, Walker 2009); a 'late'
    # addition of half the planet or more is a main building block, so model it as a
    # candidate instead.
    "late_max_fraction": Limit(0.0, 0.5, "", "late accretion is a small addition; above "
                               "one half, make the component a building block",
                               low_open=True, high_open=True),
    "mantle_FeO_wt": Limit(0.0, 60.0, "wt%", "mantle FeO above 60 wt% is no silicate "
                           "mantle", low_open=True, high_open=True),
    "minimum_uncertainty_dex": Limit(0.0, 2.0, "dex", "a floor on the log10 uncertainty of "
                                     "the target; above 2 dex no element constrains the fit"),
    "default_uncertainty_pct": Limit(0.0, 1000.0, "%", "a 1-sigma above ten times the value "
                                     "carries no information", low_open=True),
    "isotope_window_sigma": Limit(0.0, 10.0, "sigma", "a window wider than 10 sigma screens "
                                  "nothing out", low_open=True),
    "isotope_sigma": Limit(0.0, 1e3, "epsilon or per mil", "a 1-sigma must be positive; "
                           "nucleosynthetic anomalies are below 1e3 epsilon units",
                           low_open=True),
    "isotope_value": Limit(-1e3, 1e3, "epsilon or per mil", "nucleosynthetic anomalies "
                           "of meteorites lie within a few hundred epsilon units"),
    # A partition coefficient of 1e8 is beyond any metal-silicate measurement (highly
    # siderophile elements reach ~1e4-1e7 at low pressure, from memory, Walker 2009).
    "core_D": Limit(0.0, 1e8, "", "metal/silicate partition coefficient beyond any "
                    "measurement"),
    "planet_mass_kg": Limit(1e15, 1e28, "kg", "from a small asteroid to beyond ten Jupiter "
                            "masses"),
}

#: Largest input file read (bytes): tables, case files, pattern files. The library's
#: largest table is a few tens of kB; a catalogue of 10^6 stars with 20 elements is
#: ~200 MB, so 256 MiB refuses only a wrong file (a disk image, /dev/zero).
MAX_INPUT_BYTES: int = 256 * 2**20


def check_in_range(value: float, key: str, *, file: str | None = None,
                   row: int | str | None = None, field: str | None = None) -> float:
    """Raise :class:`InputError` unless ``value`` lies in ``PLAUSIBLE[key]``."""
    lim = PLAUSIBLE[key]
    if not lim.contains(value):
        raise InputError(f"outside {lim.describe()}: {lim.reason}", file=file, row=row,
                         field=field, value=value)
    return value

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


#: Oxidation states accepted for oxides besides the valence listed in the element
#: table (components/data/elements.csv), because analyses report them: Fe2O3, CrO,
#: Mn2O3, Ti2O3, VO2, V2O5, EuO, CeO2, SO3, UO3, SnO, Cu2O, MoO2 (common practice).
EXTRA_OXIDATION_STATES: dict[str, tuple[int, ...]] = {
    "Fe": (3,), "Cr": (2,), "Mn": (3,), "Ti": (3,), "V": (4, 5), "Eu": (2,), "Ce": (4,),
    "S": (6,), "U": (6,), "Sn": (2,), "Cu": (1,), "Mo": (4,),
}


@cache
def _table_valences() -> dict[str, int]:
    """Valence column of the element table, read directly (the element table itself is
    checked with :func:`parse_species`, so it cannot be read through the library)."""
    import csv
    from pathlib import Path

    path = Path(__file__).parent / "data" / "elements.csv"
    out: dict[str, int] = {}
    with open(path, encoding="utf-8") as fh:
        rows = csv.DictReader(line for line in fh if not line.startswith("#"))
        for r in rows:
            try:
                out[r["symbol"].strip()] = int(float(r["valence"]))
            except (KeyError, TypeError, ValueError):
                continue
    return out


def _oxidation_states(element: str) -> set[int]:
    states = set(EXTRA_OXIDATION_STATES.get(element, ()))
    v = _table_valences().get(element, 0)
    if v > 0:
        states.add(v)
    return states


def _canonical_oxide(el: str, n_cat: int, n_ox: int) -> str:
    return f"{el}{n_cat if n_cat > 1 else ''}O{n_ox if n_ox > 1 else ''}"


@cache
def parse_species(name: str) -> tuple[str, int, int] | None:
    """Split an element or oxide name into (element, cations, oxygens).

    ``"Si"`` -> ``("Si", 1, 0)``, ``"SiO2"`` -> ``("Si", 1, 2)``, ``"Al2O3"`` ->
    ``("Al", 2, 3)``, ``"FeO"`` -> ``("Fe", 1, 1)``. Returns None when the name is
    neither a known element nor a simple oxide of one. Oxides are parsed by the
    formula parser of :mod:`periodictable` and must be written in the usual reduced
    form (``FeO``, not ``Fe1O1``, ``FeO0`` or ``Fe2O2``) with a cation charge
    (2 x oxygens / cations) that is an oxidation state of the element: its valence in
    the element table or one of :data:`EXTRA_OXIDATION_STATES` (``MgO2`` and ``SiO5``
    are refused).

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
    if not name or not name.isascii() or not name.isalnum() or len(name) > 12:
        return None
    try:
        atoms = periodictable.formula(name).atoms
    except Exception:  # noqa: BLE001 - the parser raises several kinds on bad text
        return None
    counts = {str(k): v for k, v in atoms.items()}
    if set(counts) - {"O"} == set() or "O" not in counts or len(counts) != 2:
        return None
    el = next(k for k in counts if k != "O")
    n_cat, n_ox = counts[el], counts["O"]
    if not (isinstance(n_cat, int) and isinstance(n_ox, int)) or n_cat < 1 or n_ox < 1:
        return None
    if not _is_element(el) or _canonical_oxide(el, n_cat, n_ox) != name:
        return None
    if math.gcd(n_cat, n_ox) != 1:
        return None
    charge, rest = divmod(2 * n_ox, n_cat)
    if rest or charge not in _oxidation_states(el):
        return None
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
