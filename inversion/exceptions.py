"""planetmix errors and warnings (defined in :mod:`components.exceptions`, shared by both packages)."""

from components.exceptions import (
    DiagnosticWarning,
    InputError,
    PlanetmixError,
    PlanetmixWarning,
    SolverError,
)

__all__ = ["DiagnosticWarning", "InputError", "PlanetmixError", "PlanetmixWarning",
           "SolverError"]
