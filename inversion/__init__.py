"""planetmix engine: forward model, convex and Bayesian inversion, star-to-planet.

Public API
----------
load_case, compile_problem, forward, fit, fit_problem, screen, assemble, findings,
FitResult, Ranking, Problem, Case, InputError, PlanetmixError, SolverError.
The Bayesian sampler lives in :mod:`inversion.bayes`, the star-to-planet computation in
:mod:`inversion.star` (imported on use: they pull in PyMC and Dask).

The names are imported on first use (``inversion.fit``, ``from inversion import
fit``), so that ``import inversion`` itself is quick: the ``planetmix`` command
installs its Ctrl-C handling before the solver libraries load.
"""

from __future__ import annotations

import importlib
import sys
import types

#: public name -> the submodule that defines it
_PUBLIC = {
    "Case": "case", "load_case": "case",
    "InputError": "exceptions", "PlanetmixError": "exceptions", "SolverError": "exceptions",
    "findings": "findings",
    "FitResult": "fit", "Ranking": "fit", "fit": "fit", "fit_problem": "fit",
    "screen": "fit",
    "Problem": "model", "compile_problem": "model", "forward": "model",
    "assemble": "planet",
}

__all__ = sorted(_PUBLIC)


class _Package(types.ModuleType):
    """The package module: public names load on first use.

    ``fit`` and ``findings`` are both a submodule and a public function of the same
    name; as before, the package attribute is the function (importing the submodule
    binds the function, not the module).
    """

    def __getattr__(self, name: str) -> object:
        mod = _PUBLIC.get(name)
        if mod is not None:
            value = getattr(importlib.import_module(f".{mod}", __name__), name)
            types.ModuleType.__setattr__(self, name, value)
            return value
        if not name.startswith("__"):
            try:
                return importlib.import_module(f".{name}", __name__)
            except ModuleNotFoundError as err:
                if err.name != f"{__name__}.{name}":
                    raise
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")

    def __setattr__(self, name: str, value: object) -> None:
        if (name in _PUBLIC and isinstance(value, types.ModuleType)
                and value.__name__ == f"{__name__}.{name}"):
            value = getattr(value, name)
        types.ModuleType.__setattr__(self, name, value)

    def __dir__(self) -> list[str]:
        return sorted(set(super().__dir__()) | set(_PUBLIC))


sys.modules[__name__].__class__ = _Package
