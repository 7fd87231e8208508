"""planetmix reference library: building blocks and element data, each value with its source.

Public API
----------
available, load, read_component, default_relative_uncertainty, PROVENANCE_LEVELS,
elements, solar, solar_tables, isotopes, sources,
Component, atomic_weight, InputError.
"""

from ._library import (
    DATA_DIR,
    PROVENANCE_LEVELS,
    Component,
    atomic_weight_series,
    available,
    default_relative_uncertainty,
    elements,
    isotopes,
    load,
    read_component,
    solar,
    solar_tables,
    sources,
)
from .exceptions import InputError, PlanetmixError
from .units import atomic_weight, oxide_to_element_factor, parse_species

__all__ = [
    "DATA_DIR",
    "PROVENANCE_LEVELS",
    "Component",
    "InputError",
    "PlanetmixError",
    "atomic_weight",
    "atomic_weight_series",
    "available",
    "default_relative_uncertainty",
    "elements",
    "isotopes",
    "load",
    "oxide_to_element_factor",
    "parse_species",
    "read_component",
    "solar",
    "solar_tables",
    "sources",
]
