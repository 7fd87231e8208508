"""Priors of the Bayesian model: declared distributions, defaults from the problem, validation
of the case file's ``[priors]``.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..exceptions import InputError
from ..jaxmodel import condition_ranges, pressure_D
from ..model import Problem
from ..volatility import get_form

__all__ = ["PRIOR_DISTRIBUTIONS", "default_priors", "check_priors"]

#: Declared prior distributions and their parameters (one check, one message template).
PRIOR_DISTRIBUTIONS: dict[str, tuple[str, ...]] = {
    "Uniform": ("lower", "upper"),
    "Normal": ("mu", "sigma"),
    "HalfNormal": ("sigma",),
    "TruncatedNormal": ("mu", "sigma", "lower", "upper"),
    "LogNormal": ("mu", "sigma"),
    "Dirichlet": ("a",),
}


def _support_of(dist: str, pars: dict[str, Any]) -> tuple[float, float]:
    if dist == "Uniform" or dist == "TruncatedNormal":
        return float(pars["lower"]), float(pars["upper"])
    if dist in ("HalfNormal", "LogNormal"):
        return 0.0, math.inf
    return -math.inf, math.inf


def default_priors(p: Problem) -> dict[str, dict[str, Any]]:
    """The default prior of every parameter of the model for problem ``p``.

    Returns
    -------
    dict
        parameter name -> ``{"dist": ..., <parameters>}``; also ``_support`` entries
        (the interval each parameter's prior must lie in) are kept separately, see
        :func:`check_priors`.
    """
    pri: dict[str, dict[str, Any]] = {}
    K = len(p.components)
    if K > 1:
        pri["w"] = {"dist": "Dirichlet", "a": 1.0}
    form = get_form(p.volatility_form)
    if form.name in ("kinked", "kinked-floor", "kinked-split"):
        pri["T0"] = {"dist": "Uniform", "lower": 900.0, "upper": 1700.0}
        # 0.004 dex/K: 2-4 dex per 1000 K lies well inside the half-normal's bulk
        pri["slope"] = {"dist": "HalfNormal", "sigma": 0.004}
        if form.name == "kinked-floor":
            pri["log10_floor"] = {"dist": "Uniform", "lower": -6.0, "upper": 0.0}
        if form.name == "kinked-split":
            # the class difference of slopes, centred on none, as wide as the slope
            pri["slope_offset"] = {"dist": "TruncatedNormal", "mu": 0.0, "sigma": 0.004,
                                   "lower": float(form.lower[2]),
                                   "upper": float(form.upper[2])}
    else:
        for name, lo, hi in zip(form.params, form.lower, form.upper, strict=True):
            pri[name] = {"dist": "Uniform", "lower": float(lo), "upper": float(hi)}
    if p.late_name is not None:
        pri["lam"] = {"dist": "Uniform", "lower": 0.0, "upper": float(p.late_max_fraction)}
    for j in _partitioned(p):
        pri[f"log10D_{p.elements[j]}"] = {"dist": "Normal", "mu": float(np.log10(p.D[j])),
                                          "sigma": float(p.D_spread[j])}
    for name, (lo, hi) in condition_ranges(p).items():  # P, T, dIW over their ranges
        pri[name] = {"dist": "Uniform", "lower": lo, "upper": hi}
    pri["tau"] = {"dist": "HalfNormal", "sigma": 0.05}
    return pri


def _supports(p: Problem) -> dict[str, tuple[float, float]]:
    sup: dict[str, tuple[float, float]] = {"tau": (0.0, math.inf)}
    form = get_form(p.volatility_form)
    for name, lo, hi in zip(form.params, form.lower, form.upper, strict=True):
        sup[name] = (float(lo), float(hi))
    if form.name in ("kinked", "kinked-floor"):
        sup["slope"] = (0.0, math.inf)
    if form.name == "logistic":
        sup["width"] = (1e-9, math.inf)
    if form.name == "power":
        sup["a"] = (0.0, math.inf)
        sup["b"] = (-math.inf, 0.0)
    if p.late_name is not None:
        sup["lam"] = (0.0, 0.999)
    for j in _partitioned(p):
        sup[f"log10D_{p.elements[j]}"] = (-math.inf, math.inf)
    sup.update(condition_ranges(p))
    return sup


def _partitioned(p: Problem) -> list[int]:
    """Indices of elements whose effective log10 D is a parameter (spread > 0, D > 0;
    not those whose D follows the pressure when the pressure is sampled)."""
    reg = np.zeros(len(p.elements), bool)
    if condition_ranges(p):
        reg = pressure_D(p)[0]
    return [j for j in range(len(p.elements))
            if p.D_spread[j] > 0 and p.D[j] > 0 and j != p.fe_index and not reg[j]]


def check_priors(p: Problem, priors: dict[str, Any] | None, *, file: str | None = None
                 ) -> dict[str, dict[str, Any]]:
    """Validate the case's ``[priors]`` table and merge it over the defaults.

    Parameters
    ----------
    p : Problem
    priors : dict
        parameter name -> ``{dist = "Uniform", lower = ..., upper = ...}`` (TOML table).
    file : str, optional
        The case file, named in errors.

    Returns
    -------
    dict
        The full prior set (defaults with the overrides applied).

    Raises
    ------
    InputError
        Unknown parameter (lists the valid ones), unknown distribution, missing or
        extra distribution parameters, non-numbers, or a prior whose support leaves the
        parameter's physical range.
    """
    out = default_priors(p)
    sup = _supports(p)
    for name, spec in (priors or {}).items():
        fld = f"priors.{name}"
        if name not in out:
            raise InputError(f"unknown prior parameter; this case's parameters are "
                             f"{sorted(out)}", file=file, field=fld, value=name)
        if not isinstance(spec, dict) or "dist" not in spec:
            raise InputError('give a table such as {dist = "Uniform", lower = 0, upper = 1}',
                             file=file, field=fld, value=spec)
        dist = spec["dist"]
        if dist not in PRIOR_DISTRIBUTIONS:
            raise InputError(f"unknown distribution; choose one of "
                             f"{sorted(PRIOR_DISTRIBUTIONS)}", file=file, field=fld + ".dist",
                             value=dist)
        if (dist == "Dirichlet") != (name == "w"):
            raise InputError("the weights take a Dirichlet prior and only they do", file=file,
                             field=fld + ".dist", value=dist)
        need = PRIOR_DISTRIBUTIONS[dist]
        got = {k: v for k, v in spec.items() if k != "dist"}
        if set(got) != set(need):
            raise InputError(f"{dist} takes exactly the parameters {list(need)}", file=file,
                             field=fld, value=sorted(got))
        pars: dict[str, Any] = {}
        for k, v in got.items():
            if name == "w" and isinstance(v, list):
                if len(v) != len(p.components) or not all(
                        isinstance(x, int | float) and not isinstance(x, bool) and x > 0
                        for x in v):
                    raise InputError(f"give one positive number per building block "
                                     f"({len(p.components)})", file=file, field=f"{fld}.{k}",
                                     value=v)
                pars[k] = [float(x) for x in v]
                continue
            if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
                raise InputError("must be a finite number", file=file, field=f"{fld}.{k}",
                                 value=v)
            pars[k] = float(v)
        for k in ("sigma", "a"):
            if k in pars and not isinstance(pars[k], list) and pars[k] <= 0:
                raise InputError("must be positive", file=file, field=f"{fld}.{k}",
                                 value=pars[k])
        if "lower" in pars and not pars["lower"] < pars["upper"]:
            raise InputError("lower must be below upper", file=file, field=fld,
                             value=[pars["lower"], pars["upper"]])
        if name in sup:
            lo, hi = _support_of(dist, pars)
            slo, shi = sup[name]
            if lo < slo or hi > shi:
                raise InputError(f"{dist} reaches outside the parameter's range "
                                 f"[{slo:g}, {shi:g}]; choose a distribution inside it",
                                 file=file, field=fld, value=[lo, hi])
        out[name] = {"dist": dist, **pars}
    return out
