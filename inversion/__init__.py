"""planetmix engine: forward model, convex and Bayesian inversion, star-to-planet.

Public API
----------
load_case, compile_problem, forward, fit, fit_problem, screen, assemble, findings,
FitResult, Ranking, Problem, Case, InputError, PlanetmixError, SolverError.
The Bayesian sampler lives in :mod:`inversion.bayes`, the star-to-planet computation in
:mod:`inversion.star` (imported on use: they pull in PyMC and Dask).
"""

from .case import Case, load_case
from .exceptions import InputError, PlanetmixError, SolverError
from .findings import findings
from .fit import FitResult, Ranking, fit, fit_problem, screen
from .model import Problem, compile_problem, forward
from .planet import assemble

__all__ = [
    "Case",
    "FitResult",
    "InputError",
    "PlanetmixError",
    "Problem",
    "Ranking",
    "SolverError",
    "assemble",
    "compile_problem",
    "findings",
    "fit",
    "fit_problem",
    "forward",
    "load_case",
    "screen",
]
