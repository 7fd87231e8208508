"""planetmix errors and warnings (defined once in :mod:`components.exceptions`)."""

from components.exceptions import (
    DiagnosticWarning,
    InputError,
    PlanetmixError,
    PlanetmixWarning,
    SolverError,
)

__all__ = ["DiagnosticWarning", "InputError", "PlanetmixError", "PlanetmixWarning",
           "SolverError"]
