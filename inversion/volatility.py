"""Volatile depletion against 50% condensation temperature: the declared forms.

Each form maps parameters to log10 of the retained fraction r(Tc) in (0, 1]. All are
vectorised: parameters have shape (B, p), temperatures (n,), the result (B, n).

References
----------
Wang H. S., Lineweaver C. H., Ireland T. R. (2019) Icarus 328, 287 (power law in Tc).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from .options import check_option

__all__ = ["VolatilityForm", "FORMS", "CASE_FORMS", "get_form", "log10_retained",
           "SPLIT_FORM"]


@dataclass(frozen=True)
class VolatilityForm:
    """A volatility form: parameter names, units, bounds and a coarse profiling grid."""

    name: str
    params: tuple[str, ...]
    units: tuple[str, ...]
    lower: tuple[float, ...]
    upper: tuple[float, ...]
    grid: tuple[tuple[float, ...], ...]
    description: str


FORMS: dict[str, VolatilityForm] = {
    "kinked": VolatilityForm(
        "kinked", ("T0", "slope"), ("K", "dex/K"), (700.0, 0.0), (1800.0, 0.02),
        (tuple(np.linspace(900, 1700, 9)), (0.0, 0.0005, 0.001, 0.002, 0.003, 0.005, 0.008)),
        "log10 r = min(0, slope * (Tc - T0))",
    ),
    "power": VolatilityForm(
        "power", ("a", "b"), ("1", "1"), (0.0, -40.0), (12.0, 0.0),
        ((1.0, 2.0, 3.0, 3.7, 4.5, 6.0, 8.0),
         (-28.0, -22.0, -17.0, -14.0, -11.5, -9.0, -6.0, -3.0)),
        "log10 r = min(0, a * log10(Tc) + b); pivot at Tc = 10**(-b/a)",
    ),
    "logistic": VolatilityForm(
        "logistic", ("T50", "width"), ("K", "K"), (200.0, 5.0), (1800.0, 800.0),
        (tuple(np.linspace(300, 1500, 9)), (20.0, 50.0, 100.0, 200.0, 400.0)),
        "r = 1 / (1 + exp(-(Tc - T50) / width))",
    ),
    "kinked-floor": VolatilityForm(
        "kinked-floor", ("T0", "slope", "log10_floor"), ("K", "dex/K", "dex"),
        (700.0, 0.0, -6.0), (1800.0, 0.02, 0.0),
        (tuple(np.linspace(900, 1700, 7)), (0.0, 0.001, 0.002, 0.004, 0.008),
         (-4.0, -2.5, -1.5, -0.7)),
        "log10 r = max(log10_floor, min(0, slope * (Tc - T0)))",
    ),
    "kinked-split": VolatilityForm(
        "kinked-split", ("T0", "slope", "slope_offset"), ("K", "dex/K", "dex/K"),
        (700.0, 0.0, -0.01), (1800.0, 0.02, 0.01),
        (tuple(np.linspace(900, 1700, 9)), (0.0, 0.0005, 0.001, 0.002, 0.003, 0.005, 0.008),
         (-0.001, -0.0003, 0.0, 0.0003, 0.001)),
        "log10 r = min(0, s_i * (Tc - T0)), s_i = max(0, slope + slope_offset * m_i), "
        "m_i = 1 for chalcophile and siderophile elements, 0 for the others",
    ),
}

#: The class-split kinked form: one pivot, a separate slope for the chalcophile and
#: siderophile elements. It needs each element's class (``metal`` in
#: :func:`log10_retained`); the class-independence test of :mod:`inversion.findings`
#: fits it against ``kinked``.
SPLIT_FORM = "kinked-split"
#: Forms a case file may name (the split form is the nested alternative of the class
#: test, fitted by ``findings.class_test`` and sampled by ``planetmix sample --class-test``).
CASE_FORMS: dict[str, VolatilityForm] = {k: v for k, v in FORMS.items() if k != SPLIT_FORM}


def get_form(name: str) -> VolatilityForm:
    """Return a declared form; an unknown name lists the valid ones."""
    check_option("volatility form", name, FORMS)
    return FORMS[name]


def log10_retained(form: str, params: Any, tc: np.ndarray, *,
                   metal: np.ndarray | None = None, xp: Any = np) -> Any:
    """log10 of the retained fraction for each parameter set and element.

    Parameters
    ----------
    form : str
        One of :data:`FORMS`.
    params : ndarray, shape (B, p)
        Parameters in the order of ``FORMS[form].params``.
    tc : ndarray, shape (n,)
        50% condensation temperatures [K].
    metal : ndarray of bool, shape (n,), optional
        True for chalcophile and siderophile elements; required by ``kinked-split``
        (whose ``slope_offset`` applies to them), ignored by the other forms.
    xp : module
        Array namespace: ``numpy`` (parameters made at least 2-D) or ``jax.numpy``
        (any leading shape, e.g. one parameter set of shape (p,) gives (n,)).

    Returns
    -------
    ndarray, shape (B, n)
        log10 r, always <= 0.

    Examples
    --------
    >>> import numpy as np
    >>> log10_retained("kinked", np.array([[1200.0, 0.002]]), np.array([1500.0, 700.0]))
    array([[ 0., -1.]])
    >>> log10_retained("kinked-split", np.array([[1200.0, 0.002, 0.001]]),
    ...                np.array([700.0, 700.0]), metal=np.array([False, True]))
    array([[-1. , -1.5]])
    """
    p = np.atleast_2d(np.asarray(params, dtype=float)) if xp is np else params
    tc = np.asarray(tc, dtype=float)
    if form == "kinked":
        return xp.minimum(0.0, p[..., 1:2] * (tc - p[..., 0:1]))
    if form == "power":
        return xp.minimum(0.0, p[..., 0:1] * np.log10(tc) + p[..., 1:2])
    if form == "logistic":
        z = (tc - p[..., 0:1]) / p[..., 1:2]
        # log10(1/(1+exp(-z))) computed stably
        return -xp.logaddexp(0.0, -z) / np.log(10.0)
    if form == "kinked-floor":
        return xp.maximum(p[..., 2:3], xp.minimum(0.0, p[..., 1:2] * (tc - p[..., 0:1])))
    if form == SPLIT_FORM:
        if metal is None:
            raise ValueError("the kinked-split form needs the class mask 'metal'")
        m = np.asarray(metal, dtype=float)
        s = xp.maximum(0.0, p[..., 1:2] + p[..., 2:3] * m)
        return xp.minimum(0.0, s * (tc - p[..., 0:1]))
    check_option("volatility form", form, FORMS)
    raise AssertionError("unreachable")
