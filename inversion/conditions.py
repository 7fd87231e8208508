"""Core formation at a pressure, temperature and oxygen fugacity in the convex path.

``[core] partitioning = "single-stage"`` replaces the effective D of every element that
has a metal/silicate regression in :mod:`inversion.partitioning` (its
``DEFAULT_CHOICE``: Ni, Co, V, Cr, Si, Nb, Ta, W, and S's constant D) by the mass-basis
D of that regression at (P, T, dIW); the other elements keep the effective,
Earth-calibrated D of :func:`inversion.model.default_partition`. The fit then runs
unchanged on those D.

Conventions (those of :mod:`inversion.partitioning`)
-----------------------------------------------------
- Molar D on the single-cation oxide basis; mass D = molar D x ``Mbar_sil / Mbar_met``.
  ``[core] metal_activity`` chooses the evaluation of the regressions: ``ideal`` (mole
  fractions, the default) or ``epsilon`` (the interaction-parameter model of the metal on
  the rows fitted with activities, at the Si and S mole fractions of the fitted core,
  iterated with it like ``Mbar_met``).
- ``Mbar_sil``: mean molar mass per single-cation oxide unit of the *target* silicate
  (the observed mantle the fit explains), over the elements of the mass balance.
- ``Mbar_met``: mean molar mass per atom of the metal of the *fitted* core (O, which the
  model does not count, left out); iterated with the fit to a fixed point.
- ``dIW``: the case's ``[core] dIW`` where given (it also sets the model's iron split);
  with the iron split set by the mantle FeO, ``dIW = 2 log10(x_FeO / x_Fe)`` of the
  target mantle's FeO and the fitted core's Fe, iterated with the fit to a fixed point.
- The iteration starts from the Earth's core of McDonough (2003) (the reference core of
  ``earth_core_mantle.csv``) for ``x_Fe`` and ``Mbar_met``; other commands than
  ``planetmix fit`` (rank, sample) take the D at that starting point, not iterated.
- ``temperature_K = "liquidus"``: T = :func:`inversion.partitioning.peridotite_liquidus`
  (Fiquet et al. 2010) at the pressure.

With ``pressure_GPa = [low, high]`` :func:`infer_pressure` profiles the fit's chi2 over
the pressure: a coarse grid, then a bounded scalar minimisation around the best grid
point, then the crossings of ``chi2_min + 1`` and ``chi2_min + 3.84`` (the 68% and 95%
profile intervals of one parameter) by root finding between evaluated points.
"""

from __future__ import annotations

import math
from dataclasses import replace
from typing import Any

import numpy as np
from scipy.optimize import brentq, minimize_scalar

from . import partitioning as pt
from .exceptions import InputError

__all__ = ["at_conditions", "at_case_conditions", "fit_at_conditions", "infer_pressure",
           "infer_conditions", "free_conditions", "start_case", "start_problem",
           "fit_continuous",
           "CONDITIONS",
           "conditions_block", "conditions_lines", "reference_metal", "silicate_molar_mass",
           "PROFILE_GRID_POINTS", "DELTA_CHI2_68", "DELTA_CHI2_95"]

#: Points of the coarse pressure grid of the profile.
PROFILE_GRID_POINTS = 9
#: Profile thresholds of one parameter: 68.3% and 95% (chi-square, one degree of freedom).
DELTA_CHI2_68 = 1.0
DELTA_CHI2_95 = 3.841
#: Fixed point of (dIW, Mbar_met) with the fit: stop when dIW moves < 0.002 and Mbar_met
#: by < 1e-3 relative (D by < 0.0005 dex), after at most this many fits.
STATE_ITERATIONS = 8
#: With ``metal_activity = "epsilon"`` the metal's Si and S join the fixed point: their
#: plain iteration oscillates (more Si in the metal raises gamma_Si and lowers D_Si), so
#: they move by this fraction of each step, for at most this many fits.
X_LIGHT_DAMPING = 0.5
STATE_ITERATIONS_EPSILON = 20
#: Resolution [GPa] of the minimum and of the interval ends.
PRESSURE_TOL_GPA = 0.25
LIQUIDUS = "peridotite liquidus, Fiquet et al. (2010)"
#: The conditions that ``[core]`` may give as ``[low, high]`` (inferred), in this order.
CONDITIONS = ("pressure_GPa", "temperature_K", "dIW")


def silicate_molar_mass(p: Any) -> float:
    """Mean molar mass [g/mol] per single-cation oxide unit of the target silicate,
    over the elements of the mass balance the target holds."""
    c = np.asarray(p.observed, float)
    ok = np.isfinite(c) & (c > 0)
    return float(np.sum(c[ok] * p.oxide_factor[ok]) / np.sum(c[ok] / p.atomic_weight[ok]))


def _metal(p: Any, core: np.ndarray) -> tuple[float, float, float, float]:
    """(x_Fe, Mbar_met, x_Si, x_S) of a core given as element masses on the problem's
    axis (mole fractions over the elements of the mass balance; O not counted)."""
    core = np.maximum(np.asarray(core, float), 0.0)
    mol = core / p.atomic_weight
    n = mol.sum()
    x = {e: float(mol[p.elements.index(e)] / n) if e in p.elements else 0.0
         for e in ("Si", "S")}
    return float(mol[p.fe_index] / n), float(core.sum() / n), x["Si"], x["S"]


def reference_metal(p: Any) -> tuple[float, float, float, float]:
    """(x_Fe, Mbar_met, x_Si, x_S) of the Earth's core of McDonough (2003) on the
    problem's elements (``earth_core_mantle.csv``; Fe from its 85.5 wt%, recalled): the
    start of the fixed point."""
    from .model import default_partition

    part = default_partition()
    core = np.array([part["core_ppm"].get(e, 0.0) if e != "Fe" else 855000.0
                     for e in p.elements], float)
    return _metal(p, np.nan_to_num(core))


def _x_FeO_target(p: Any) -> float:
    c = np.asarray(p.observed, float)
    ok = np.isfinite(c) & (c > 0)
    mol = np.where(ok, c, 0.0) / p.atomic_weight
    return float(mol[p.fe_index] / mol.sum())


def temperature_at(T: float | str, P: float) -> float:
    """T [K] at pressure P [GPa]: a fixed value, or the peridotite liquidus."""
    return float(pt.peridotite_liquidus(np.asarray(P, float))) if T == "liquidus" else float(T)


def at_conditions(p: Any, base_D: np.ndarray, chem: pt.CoreChemistry, P: float, T: float,
                  dIW: float, Mbar_sil: float, Mbar_met: float,
                  extra: dict[str, Any] | None = None,
                  x_light: tuple[float, float] = (0.0, 0.0)) -> Any:
    """The problem with the D of the regression elements at (P, T, dIW).

    Parameters
    ----------
    p : Problem
    base_D : (n,) the effective D (kept for the elements without a regression).
    chem : the compiled regressions on the problem's element axis.
    P, T, dIW : pressure [GPa], temperature [K], oxygen fugacity relative to IW.
    Mbar_sil, Mbar_met : mean molar masses [g/mol] of the mass/molar conversion.
    extra : further entries of ``core_conditions``.
    x_light : (x_Si, x_S) of the metal: the activities of the ``epsilon`` model (the
        ``ideal`` evaluation does not use them).
    """
    state = np.array([0.5, Mbar_sil, Mbar_met, float(x_light[0]), float(x_light[1])])
    Dm = pt.mass_D(chem, np.asarray(P, float), np.asarray(T, float), np.asarray(dIW, float),
                   state)
    reg = np.isin(chem.kind, (1, 2))
    D = np.where(reg, Dm, base_D)
    D[p.fe_index] = 0.0
    src = dict(chem.sources)
    sources = tuple((e, src[e] if reg[j] else "effective") for j, e in enumerate(p.elements)
                    if D[j] > 0)
    cond = {"partitioning": "single-stage", "pressure_GPa": float(P),
            "temperature_K": float(T), "dIW": float(dIW), "Mbar_sil_g_mol": Mbar_sil,
            "Mbar_met_g_mol": Mbar_met, "metal_activity": {"model": chem.activity},
            "x_Si_metal": float(x_light[0]), "x_S_metal": float(x_light[1]),
            "sources": dict(sources), **(extra or {})}
    return replace(p, D=D, D_sources=sources, core_conditions=cond)


def free_conditions(case: Any) -> dict[str, tuple[float, float]]:
    """The conditions given as ``[low, high]`` in ``[core]`` (inferred), in the order
    :data:`CONDITIONS`."""
    cc = case.core
    vals = {"pressure_GPa": cc.pressure_GPa, "temperature_K": cc.temperature_K,
            "dIW": cc.dIW}
    return {k: (float(vals[k][0]), float(vals[k][1])) for k in CONDITIONS
            if isinstance(vals[k], tuple)}


def start_case(case: Any) -> Any:
    """The case with every ``[low, high]`` condition at its mid-range (the start of the
    inference; the ranges stay in ``free_conditions(case)``)."""
    mid = {k: 0.5 * (lo + hi) for k, (lo, hi) in free_conditions(case).items()}
    return replace(case, core=replace(case.core, **mid)) if mid else case


def start_problem(case: Any) -> Any:
    """The compiled problem of a single-stage case at the mid-range of its inferred
    conditions, with the ranges in ``core_conditions["ranges"]`` (what ``planetmix fit``
    and ``planetmix sample`` start from)."""
    from .model import compile_problem

    if case.core.partitioning == "continuous":
        # the effective D until fit_continuous replaces those of the regression elements
        p = compile_problem(replace(case, core=replace(case.core, partitioning="effective")))
        return replace(p, core_conditions={"partitioning": "continuous",
                                           **case.core.continuous, **_choices(case)})
    p = compile_problem(start_case(case))
    ranges = free_conditions(case)
    if ranges and p.core_conditions is not None:
        p = replace(p, core_conditions={**p.core_conditions,
                                        "ranges": {k: list(v) for k, v in ranges.items()}})
    return p


#: ``core_conditions`` entries of the convex fit's problem that the sampler holds fixed
#: (it samples the conditions but does not iterate the metal with the draws).
HELD_METAL = ("Mbar_sil_g_mol", "Mbar_met_g_mol", "x_Si_metal", "x_S_metal")


def sampling_start(p: Any, case: Any, settings: Any = None) -> tuple[Any, Any]:
    """The problem ``planetmix sample`` runs for a single-stage case, and its convex fit.

    ``p`` is :func:`start_problem`'s problem (the conditions at mid-range, the metal of
    the reference core). The convex fit at the case's conditions (:func:`infer_conditions`
    when some are ``[low, high]``, else :func:`fit_at_conditions`) iterates the metal's
    mean molar mass, iron split and, with ``metal_activity = "epsilon"``, its Si and S
    with the fitted core; the sampler holds those at the fit's converged values (not at
    the reference core's), so that at the fitted conditions its D are the convex fit's.
    The conditions inferred by the fit are the sampler's start points; the ranges stay.

    Returns ``(problem, fit)``; an infeasible fit returns ``(p, None)`` (the sampler then
    fits ``p`` itself for its start points).
    """
    from .fit import FitSettings

    settings = settings or FitSettings(cmf_range=case.cmf_range)
    if free_conditions(case):
        res, pc = infer_conditions(p, case, settings)
    else:
        res, pc, _ = fit_at_conditions(p, case, float(case.core.pressure_GPa), settings)
    if res is None or not res.feasible:
        return p, None
    cc = {k: v for k, v in pc.core_conditions.items() if k != "conditions_inferred"}
    ranges = (p.core_conditions or {}).get("ranges")
    if ranges:
        cc["ranges"] = ranges
    cc["metal_held_from"] = ("the convex fit at its conditions (" + ", ".join(HELD_METAL)
                             + "; held while sampling)")
    return replace(pc, core_conditions=cc), res


def _choices(case: Any) -> dict[str, Any]:
    """The ``[core]`` partitioning choices and their sources (``core_conditions``)."""
    return pt.choice_provenance(case.core.hse_partitioning, case.core.metal_activity)


def _setup(p: Any, case: Any) -> dict[str, Any]:
    cc = case.core
    chem = pt.compile_chemistry(p.elements, oxygen=False, activity=cc.metal_activity)
    metal0 = reference_metal(p)
    free = free_conditions(case)
    return {"chem": chem, "base_D": np.asarray(p.D, float).copy(), "T": cc.temperature_K,
            "Mbar_sil": silicate_molar_mass(p), "x_FeO": _x_FeO_target(p),
            "dIW_fixed": cc.dIW, "metal0": metal0, "free": free, "choices": _choices(case),
            "dIW_from": ("inferred over [core] dIW = [low, high] (the model's iron split "
                         "follows it)" if "dIW" in free else
                         "[core] dIW of the case" if cc.dIW is not None else
                         "mantle FeO of the target and the Fe of the fitted core"),
            "temperature_from": ("inferred over [core] temperature_K = [low, high]"
                                 if "temperature_K" in free else
                                 LIQUIDUS if cc.temperature_K == "liquidus"
                                 else "[core] temperature_K of the case")}


def _next_metal(s: dict[str, Any], st: tuple[float, ...], new: tuple[float, ...]
                ) -> tuple[float, ...]:
    """The next metal state of the fixed point: ``new`` (ideal), or with the Si and S
    mole fractions damped by :data:`X_LIGHT_DAMPING` (epsilon)."""
    if s["chem"].activity != "epsilon":
        return tuple(new)
    return (new[0], new[1], *(a + X_LIGHT_DAMPING * (b - a)
                              for a, b in zip(st[2:], new[2:], strict=True)))


def _dIW(s: dict[str, Any], x_fe: float) -> float:
    if s["dIW_fixed"] is not None:
        return float(s["dIW_fixed"])
    return 2.0 * math.log10(s["x_FeO"] / x_fe)


def _at(p: Any, s: dict[str, Any], P: float, st: tuple[float, ...],
        extra: dict[str, Any] | None = None, *, T: float | None = None,
        dIW: float | None = None) -> Any:
    """The problem at pressure P with the metal ``st = (x_Fe, Mbar_met, x_Si, x_S)``;
    ``T`` and ``dIW`` override the case's (inferred conditions); a given ``dIW`` also sets
    the model's iron split."""
    T = temperature_at(s["T"], P) if T is None else float(T)
    d = _dIW(s, st[0]) if dIW is None else float(dIW)
    pc = at_conditions(p, s["base_D"], s["chem"], P, T, d, s["Mbar_sil"], st[1],
                       {"temperature_from": s["temperature_from"],
                        "dIW_from": s["dIW_from"], **s["choices"], **(extra or {})},
                       x_light=(st[2], st[3]))
    return replace(pc, dIW=d, mantle_Fe=None) if dIW is not None else pc


def at_case_conditions(p: Any, case: Any, pressure_GPa: float | None = None) -> Any:
    """The problem at the case's fixed conditions (or at ``pressure_GPa``), with ``x_Fe``
    and ``Mbar_met`` of the reference core (no iteration with a fit)."""
    if case.core.partitioning == "continuous":
        raise InputError("partitioning = \"continuous\" is run by 'planetmix fit' only "
                         "(the D follow the fitted bulk)", file=case.path,
                         field="core.partitioning", value="continuous")
    P = case.core.pressure_GPa if pressure_GPa is None else pressure_GPa
    if isinstance(P, tuple):
        raise InputError("pressure_GPa = [low, high] is inferred by 'planetmix fit' and "
                         "'planetmix sample' only; give one value for this command",
                         file=case.path,
                         field="core.pressure_GPa", value=list(P))
    for key in ("temperature_K", "dIW"):
        v = getattr(case.core, key)
        if isinstance(v, tuple):
            raise InputError(f"{key} = [low, high] is inferred by 'planetmix fit' and "
                             "'planetmix sample' only; give one value for this command",
                             file=case.path, field=f"core.{key}", value=list(v))
    s = _setup(p, case)
    return _at(p, s, float(P), s["metal0"], {"iterated_with_fit": False})


def fit_at_conditions(p: Any, case: Any, P: float, settings: Any, *,
                      previous: Any = None, state: tuple[float, ...] | None = None,
                      setup: dict[str, Any] | None = None) -> tuple[Any, Any, tuple]:
    """Fit at pressure P with (dIW, Mbar_met) iterated with the fitted core.

    ``p`` is the effective-D problem of the case. The first fit is a full
    :func:`inversion.fit.fit_problem` unless ``previous`` (a fit at a nearby pressure)
    is given, which then starts a :func:`inversion.fit.refit`; the later iterations refit
    from the last fit. Returns ``(result, problem, (x_Fe, Mbar_met, x_Si, x_S))``; with
    ``metal_activity = "epsilon"`` the metal's Si and S are part of the fixed point too
    (stop when they move by < 5e-4 in mole fraction; damped, :data:`X_LIGHT_DAMPING`).
    """
    from .fit import fit_problem, forward_of, refit

    s = setup or _setup(p, case)
    st = tuple(state or s["metal0"])
    eps = s["chem"].activity == "epsilon"
    res, pc = previous, None
    for it in range(1, (STATE_ITERATIONS_EPSILON if eps else STATE_ITERATIONS) + 1):
        pc = _at(p, s, P, st, {"iterated_with_fit": True, "fixed_point_fits": it})
        res = fit_problem(pc, settings) if res is None else refit(pc, res, settings)
        if not res.feasible:
            break
        new = _metal(pc, forward_of(pc, res)["core"][0])
        moved = (abs(_dIW(s, new[0]) - _dIW(s, st[0])), abs(new[1] - st[1]) / st[1],
                 max(abs(new[2] - st[2]), abs(new[3] - st[3])) if eps else 0.0)
        st = _next_metal(s, st, new)
        if moved[0] < 2e-3 and moved[1] < 1e-3 and moved[2] < 5e-4:
            break
    pc = _at(p, s, P, st, {"iterated_with_fit": True, "fixed_point_fits": it})
    return res, pc, st


def _crossing(f: Any, a: float, b: float) -> float:
    return float(brentq(f, a, b, xtol=PRESSURE_TOL_GPA))


def infer_pressure(p: Any, case: Any, settings: Any) -> tuple[Any, Any]:
    """Profile the fit over ``[core] pressure_GPa = [low, high]``; the best fit and its
    problem, whose ``core_conditions`` hold the profile (grid, evaluations, intervals).

    Each evaluation is a fit at that pressure (D recomputed, T on the liquidus or fixed,
    dIW and Mbar_met at their fixed point), warm-started from the fit at the nearest
    pressure evaluated before; the first grid point and the final best are full fits
    (the curvature intervals of ``settings`` only at the best).
    """
    lo, hi = case.core.pressure_GPa
    s = _setup(p, case)
    evals: dict[float, tuple[float, Any, tuple]] = {}
    quick = replace(settings, intervals=False)  # the profile needs chi2 only

    def nearest(P: float) -> tuple[Any, tuple | None]:
        if not evals:
            return None, None
        q = min(evals, key=lambda x: abs(x - P))
        return evals[q][1], evals[q][2]

    def chi2(P: float) -> float:
        P = float(P)
        if P not in evals:
            prev, st = nearest(P)
            r, _, st = fit_at_conditions(p, case, P, quick, previous=prev, state=st,
                                         setup=s)
            evals[P] = (r.chi2 if r.feasible else math.inf, r, st)
        return evals[P][0]

    grid = np.linspace(lo, hi, PROFILE_GRID_POINTS)
    prof = [chi2(P) for P in grid]
    i = int(np.argmin(prof))
    a, b = grid[max(i - 1, 0)], grid[min(i + 1, grid.size - 1)]
    opt = minimize_scalar(chi2, bounds=(a, b), method="bounded",
                          options={"xatol": PRESSURE_TOL_GPA})
    P_best = min(evals, key=lambda x: evals[x][0])
    c_min = evals[P_best][0]
    intervals = {}
    for name, dc in (("interval_68", DELTA_CHI2_68), ("interval_95", DELTA_CHI2_95)):
        ends = []
        for side in (-1, 1):
            pts = sorted((x for x in evals if (x - P_best) * side > 0),
                         key=lambda x: abs(x - P_best))
            out = next((x for x in pts if evals[x][0] > c_min + dc), None)
            if out is None:
                ends.append(lo if side < 0 else hi)
                continue
            inner = max((x for x in evals if (x - P_best) * side >= 0
                         and abs(x - P_best) < abs(out - P_best)
                         and evals[x][0] <= c_min + dc), key=lambda x: abs(x - P_best))
            ends.append(_crossing(lambda x, t=c_min + dc: chi2(x) - t, min(inner, out),
                                  max(inner, out)))
        intervals[name] = ends
        intervals[name + "_open"] = [ends[0] == lo and chi2(lo) <= c_min + dc,
                                     ends[1] == hi and chi2(hi) <= c_min + dc]
    # the reported fit: a full fit at the best pressure, from the iterated state
    P_best = min(evals, key=lambda x: evals[x][0])
    r_full, pc, _ = fit_at_conditions(p, case, P_best, settings, state=evals[P_best][2],
                                      setup=s)
    if r_full.feasible and r_full.chi2 > evals[P_best][0]:
        r_full, pc, _ = fit_at_conditions(p, case, P_best, settings,
                                          previous=evals[P_best][1],
                                          state=evals[P_best][2], setup=s)
    evaluated = sorted(evals)
    profile = {"range": [lo, hi], "grid": [float(x) for x in grid],
               "evaluated": [{"pressure_GPa": x, "chi2": evals[x][0],
                              "temperature_K": temperature_at(s["T"], x),
                              "dIW": _dIW(s, evals[x][2][0])} for x in evaluated],
               "minimiser": {"method": "scipy.optimize.minimize_scalar (bounded)",
                             "bracket": [float(a), float(b)], "x": float(opt.x)},
               "delta_chi2": {"interval_68": DELTA_CHI2_68, "interval_95": DELTA_CHI2_95},
               "tolerance_GPa": PRESSURE_TOL_GPA, **intervals}
    diw = [e["dIW"] for e in profile["evaluated"]]
    for name in ("interval_68", "interval_95"):
        profile[name.replace("interval", "temperature_K_at")] = [
            temperature_at(s["T"], x) for x in intervals[name]]
        # dIW is not a free parameter: the one the fixed point gives at the interval ends
        # (the case's value, or the mantle FeO's with the core of the fit at that pressure)
        profile[name.replace("interval", "dIW_at")] = [
            float(np.interp(x, evaluated, diw)) for x in intervals[name]]
    cond = {**pc.core_conditions, "pressure_inferred": profile}
    return r_full, replace(pc, core_conditions=cond)


#: Joint inference of the conditions: at most this many fits alternating with the
#: minimisation over the conditions at a fixed mixture; stop when the conditions move by
#: less than this fraction of their ranges.
JOINT_ITERATIONS = 8
JOINT_TOL = 2e-3
#: Elements reported as pulling each condition up or down.
PULL_ELEMENTS = 3


def _cond_values(s: dict[str, Any], names: list[str], theta: np.ndarray,
                 fixed_P: float | None) -> tuple[float, float | None, float | None]:
    v = dict(zip(names, map(float, theta), strict=True))
    P = v.get("pressure_GPa", fixed_P)
    return float(P), v.get("temperature_K"), v.get("dIW")


def _evaluate(pc: Any, res: Any, settings: Any) -> dict[str, np.ndarray]:
    from .solver import evaluate

    u = np.asarray(res.u, float)[None]
    th = np.array(list(res.volatility.values()), float)[None]
    return evaluate(pc, u, th, cmf_range=settings.cmf_range)


def _chi2_of(ev: dict[str, np.ndarray]) -> float:
    c = float(ev["chi2"][0])
    if ev["cons"].size and np.any(ev["cons"][0] < -1e-9):
        return math.inf
    return c if np.isfinite(c) else math.inf


def infer_conditions(p: Any, case: Any, settings: Any) -> tuple[Any, Any]:
    """The fit with the conditions given as ``[low, high]`` inferred jointly with it.

    Only the pressure free: :func:`infer_pressure` (the exact profile). With the
    temperature and/or dIW free as well, the fit alternates with a minimisation of chi2
    over the conditions at the fitted mixture (bounded L-BFGS-B in range-scaled
    coordinates, after a 3-point-per-axis grid on the first pass) until the conditions
    settle; each step lowers chi2, so it ends at a joint minimum. The intervals are those
    of the Laplace approximation of the joint Gauss-Newton curvature (mixture, volatility,
    late weight and conditions together, the mixture on the free directions of its
    active constraints), so they account for the mixture; 68% and 95% = value +- 1 and
    1.96 sd, clipped to the range. ``core_conditions["conditions_inferred"]`` records
    them, the correlations of the conditions, the conditional sd (the others held), the
    elements that pull each condition up and down, and what Ni and Co alone constrain.

    A given dIW sets the model's iron split too, so the mantle's FeO (when the target
    has Fe) is a datum that bears on dIW.
    """
    from scipy.optimize import minimize

    from .fit import fit_problem, forward_of, refit

    free = free_conditions(case)
    if list(free) == ["pressure_GPa"]:
        return infer_pressure(p, case, settings)
    s = _setup(p, case)
    names = list(free)
    lo = np.array([free[k][0] for k in names])
    hi = np.array([free[k][1] for k in names])
    span = hi - lo
    fixed_P = None if "pressure_GPa" in free else float(case.core.pressure_GPa)
    quick = replace(settings, intervals=False)
    state = s["metal0"]

    def problem(theta: np.ndarray, st: tuple[float, ...], extra: dict | None = None) -> Any:
        P, T, d = _cond_values(s, names, theta, fixed_P)
        return _at(p, s, P, st, extra, T=T, dIW=d)

    def conditional(theta0: np.ndarray, res: Any, st: tuple[float, ...], grid: bool
                    ) -> np.ndarray:
        def f(z: np.ndarray) -> float:
            c = _chi2_of(_evaluate(problem(lo + z * span, st), res, quick))
            return c if np.isfinite(c) else 1e30

        z0 = (theta0 - lo) / span
        if grid:
            axes = np.meshgrid(*[np.array([1 / 6, 0.5, 5 / 6])] * len(names),
                               indexing="ij")
            pts = np.stack([a.ravel() for a in axes], axis=1)
            vals = [f(z) for z in pts]
            if min(vals) < f(z0):
                z0 = pts[int(np.argmin(vals))]
        opt = minimize(f, z0, method="L-BFGS-B", bounds=[(0.0, 1.0)] * len(names),
                       options={"eps": 1e-6, "ftol": 1e-12, "gtol": 1e-8, "maxiter": 200})
        z = opt.x if opt.fun <= f(z0) else z0
        return lo + np.clip(z, 0.0, 1.0) * span

    theta = 0.5 * (lo + hi)
    res = fit_problem(problem(theta, state), quick)
    history = [{"conditions": dict(zip(names, map(float, theta), strict=True)),
                "chi2": float(res.chi2)}]
    fits = 1
    for it in range(JOINT_ITERATIONS):
        if not res.feasible:
            break
        core = forward_of(problem(theta, state), res)["core"][0]
        state = _next_metal(s, state, _metal(p, core))
        new = conditional(theta, res, state, grid=it == 0)
        moved = float(np.max(np.abs(new - theta) / span))
        theta = new
        res_new = refit(problem(theta, state), res, quick)
        fits += 1
        history.append({"conditions": dict(zip(names, map(float, theta), strict=True)),
                        "chi2": float(res_new.chi2)})
        settled = res_new.feasible and abs(res.chi2 - res_new.chi2) < 1e-4 * (1 + res.chi2)
        res = res_new if res_new.feasible else res
        if moved < JOINT_TOL and settled:
            break
    # the reported fit, with the fit's own intervals, at the joint optimum
    pc = problem(theta, state, {"iterated_with_fit": True})
    r_full = refit(pc, res, settings)
    if not r_full.feasible or r_full.chi2 > res.chi2 * (1 + 1e-9) + 1e-9:
        r_full = res if not settings.intervals else fit_problem(pc, settings)
    fits += 1
    info = _joint_curvature(pc, r_full, settings, names, theta, lo, hi, problem, state)
    info.update({"method": "alternating fit and bounded minimisation over the conditions "
                           "(scipy L-BFGS-B), Laplace intervals of the joint Gauss-Newton "
                           "curvature", "ranges": {k: list(v) for k, v in free.items()},
                 "fits": fits, "history": history})
    cond = {**pc.core_conditions, "conditions_inferred": info}
    return r_full, replace(pc, core_conditions=cond)


def _joint_curvature(pc: Any, res: Any, settings: Any, names: list[str],
                     theta: np.ndarray, lo: np.ndarray, hi: np.ndarray, problem: Any,
                     state: tuple[float, ...]) -> dict[str, Any]:
    """Laplace intervals, correlations, pulls and the Ni-Co-only rank at the optimum."""
    from .solver import curvature

    u = np.asarray(res.u, float)
    th = np.array(list(res.volatility.values()), float)
    _, J, N, active = curvature(pc, u, th, settings=settings.joint,
                                cmf_range=settings.cmf_range)
    ev0 = _evaluate(pc, res, settings)
    r0 = ev0["r"][0]
    span = hi - lo
    Jc = np.empty((r0.size, len(names)))
    for j in range(len(names)):
        h = 1e-4 * span[j]
        tp, tm = theta.copy(), theta.copy()
        tp[j] = min(theta[j] + h, hi[j])
        tm[j] = max(theta[j] - h, lo[j])
        rp = _evaluate(problem(tp, state), res, settings)["r"][0]
        rm = _evaluate(problem(tm, state), res, settings)["r"][0]
        Jc[:, j] = (rp - rm) / (tp[j] - tm[j])
    at_bound = [bool(theta[j] <= lo[j] + 1e-6 * span[j] or theta[j] >= hi[j] - 1e-6 * span[j])
                for j in range(len(names))]
    A = np.concatenate([J @ N, Jc], axis=1)
    C = np.linalg.pinv(A.T @ A)
    cov = C[-len(names):, -len(names):]
    sd = np.sqrt(np.maximum(np.diag(cov), 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        corr = cov / np.outer(sd, sd)
        sd_cond = 1.0 / np.sqrt(np.diag(Jc.T @ Jc))
    fit_els = [pc.elements[j] for j in pc.fit_index]
    out: dict[str, Any] = {"names": names, "correlation": np.round(corr, 4).tolist(),
                           "active_constraints": active, "at_range_edge": at_bound}
    for j, k in enumerate(names):
        v = float(theta[j])
        iv = {}
        for name, z in (("interval_68", 1.0), ("interval_95", 1.959964)):
            a, b = v - z * sd[j], v + z * sd[j]
            iv[name] = [float(max(a, lo[j])), float(min(b, hi[j]))]
            iv[name + "_open"] = [bool(a <= lo[j]), bool(b >= hi[j])]
        # pull of element i: -(1/2) d chi2_i / d theta x the range = -r_i dr_i/dtheta x
        # range (chi2 units per range, comparable between conditions); positive pulls up
        pull = -r0 * Jc[:, j] * span[j]
        order = np.argsort(pull)
        up = {fit_els[i]: float(pull[i]) for i in order[::-1][:PULL_ELEMENTS] if pull[i] > 0}
        down = {fit_els[i]: float(pull[i]) for i in order[:PULL_ELEMENTS] if pull[i] < 0}
        width = iv["interval_95"][1] - iv["interval_95"][0]
        out[k] = {"value": v, "sd": float(sd[j]), "sd_others_held": float(sd_cond[j]),
                  **iv, "interval_95_fraction_of_range": float(width / span[j]),
                  "pulls_up": up, "pulls_down": down}
    # what Ni and Co alone constrain: rank and least-constrained direction of their rows
    rows = [i for i, e in enumerate(fit_els) if e in ("Ni", "Co")]
    if rows:
        _, sv, vt = np.linalg.svd(Jc[rows] * span[None, :])
        rank = int(np.sum(sv > 1e-8 * max(sv.max(), 1e-300)))
        null = vt[-1] if rank < len(names) else vt[np.argmin(sv)]
        out["ni_co_only"] = {
            "rank": rank, "parameters": len(names),
            "singular_values_range_scaled": [float(x) for x in sv],
            "least_constrained_direction_per_range": dict(
                zip(names, map(float, null / np.max(np.abs(null))), strict=True))}
    return out


#: Continuous accretion in the fit: at most this many fits, until the regression D move
#: by less than this (dex).
CONTINUOUS_ITERATIONS = 8
CONTINUOUS_TOL_DEX = 1e-3


def fit_continuous(p: Any, case: Any, settings: Any) -> tuple[Any, Any]:
    """The fit with ``[core] partitioning = "continuous"``.

    The body grows in ``accretion_steps`` equal increments of the fitted bulk; each step
    equilibrates at ``depth_fraction`` x the growing body's core-mantle-boundary pressure
    (``cmb_pressure_GPa`` at the end, scaled as f^(2/3)), on the peridotite liquidus, at
    a dIW linear from ``dIW`` to ``dIW_final`` (:func:`inversion.partitioning.
    continuous_accretion`). The regression elements then take the mass D that make the
    fit's one-stage split leave exactly the mantle of that accretion at the fitted bulk,
    ``D_i = core_i / (mantle_i k)`` (k the fit's core/mantle mass ratio); the fit and
    the accretion are iterated until those D move by less than 0.001 dex. The model's
    iron split is the case's (the final dIW, or the mantle FeO); elements without a
    regression keep the effective D (and enter the accretion with it).
    """
    from .fit import fit_problem, forward_of, refit

    c = dict(case.core.continuous)
    activity = case.core.metal_activity
    chem0 = pt.compile_chemistry(p.elements, oxygen=False, activity=activity)
    reg = np.isin(chem0.kind, (1, 2))
    reg[p.fe_index] = False
    base = np.asarray(p.D, float).copy()
    fixed = {e: float(base[j]) for j, e in enumerate(p.elements)
             if not reg[j] and base[j] > 0 and j != p.fe_index}
    chem = pt.compile_chemistry(p.elements, D_fixed=fixed, oxygen=False, activity=activity)
    quick = replace(settings, intervals=False)
    pc = replace(p, dIW=c["dIW_final"]) if p.dIW is not None else p
    res, D = None, base
    history = []
    for it in range(1, CONTINUOUS_ITERATIONS + 1):
        res = fit_problem(pc, quick) if res is None else refit(pc, res, quick)
        if not res.feasible:
            break
        fwd = forward_of(pc, res)
        acc = pt.continuous_accretion(fwd["bulk"][0], chem, n_steps=c["accretion_steps"],
                                      P_cmb_final=c["cmb_pressure_GPa"],
                                      depth_fraction=c["depth_fraction"],
                                      dIW_start=c["dIW_start"], dIW_end=c["dIW_final"])
        k = float(fwd["k"][0])
        with np.errstate(divide="ignore", invalid="ignore"):
            D_acc = acc["core"] / (acc["mantle"] * k)
        # an element the bulk lacks has no accretion D: it keeps the effective one
        use = reg & np.isfinite(D_acc) & (D_acc > 0)
        D_new = np.where(use, D_acc, base)
        both = use & (D > 0)
        moved = float(np.max(np.abs(np.log10(D_new[both]) - np.log10(D[both])))) \
            if both.any() else 0.0
        D = D_new
        history.append({"fit": it, "chi2": float(res.chi2), "max_D_change_dex": moved})
        src = dict(chem.sources)
        sources = tuple((e, src[e] if reg[j] else "effective")
                        for j, e in enumerate(p.elements) if D[j] > 0)
        cond = {"partitioning": "continuous", **c, **_choices(case), "sources": dict(sources),
                "steps": [{"pressure_GPa": float(P), "temperature_K": float(T),
                           "dIW": float(d)} for P, T, d in zip(acc["P"], acc["T"],
                                                               acc["dIW"], strict=True)],
                "accretion_cmf": float(acc["cmf"]),
                "accretion_mantle_FeO_wt": float(100 * acc["mantle_FeO_wt"]),
                "effective_D_of_regression_elements": {
                    p.elements[j]: float(D[j]) for j in np.flatnonzero(reg)},
                "temperature_from": LIQUIDUS + " at each step", "history": history}
        pc = replace(pc, D=D, D_sources=sources, core_conditions=cond)
        if moved < CONTINUOUS_TOL_DEX:
            break
    res = refit(pc, res, settings) if res is not None and res.feasible else res
    return res, pc


def conditions_block(p: Any) -> dict[str, Any] | None:
    """The ``core_conditions`` block of fit.json (None with the effective D)."""
    if p.core_conditions is None:
        return {"partitioning": "effective", "sources": dict(p.D_sources)}
    return p.core_conditions


def conditions_lines(p: Any) -> list[str]:
    """Printed summary of the core-formation conditions."""
    c = p.core_conditions
    if c is None:
        return []
    if c.get("partitioning") == "continuous":
        st = c.get("steps") or [{}]
        return [f"core formation by continuous accretion in {c['accretion_steps']} steps at "
                f"{c['depth_fraction']:g} x the growing CMB pressure (final "
                f"{c['cmb_pressure_GPa']:g} GPa; last step {st[-1].get('pressure_GPa', 0):.1f}"
                f" GPa, {st[-1].get('temperature_K', 0):.0f} K), dIW {c['dIW_start']:.2f} -> "
                f"{c['dIW_final']:.2f}; accretion CMF {c.get('accretion_cmf', math.nan):.3f}"]
    regs = sorted(e for e, v in c["sources"].items() if v != "effective")
    out = [f"core formation single-stage at P = {c['pressure_GPa']:.1f} GPa, "
           f"T = {c['temperature_K']:.0f} K ({c['temperature_from']}), dIW = "
           f"{c['dIW']:.2f} ({c['dIW_from']}); regression D for {', '.join(regs)}, "
           "effective D for the other siderophiles"]
    j = c.get("conditions_inferred")
    if j:
        unit = {"pressure_GPa": ("P", " GPa", ".1f"), "temperature_K": ("T", " K", ".0f"),
                "dIW": ("dIW", "", ".2f")}
        parts = []
        for k in j["names"]:
            lab, u, f = unit[k]
            q = j[k]
            lo_, hi_ = q["interval_95"]
            op = q["interval_95_open"]
            parts.append(f"{lab} {q['value']:{f}} [{'<=' if op[0] else ''}{lo_:{f}}, "
                         f"{'>=' if op[1] else ''}{hi_:{f}}]{u}")
        out.append(f"  conditions inferred jointly ({j['fits']} fits; 95% Laplace "
                   "intervals): " + "; ".join(parts))
        n = j["names"]
        pairs = [f"{unit[n[a]][0]}-{unit[n[b]][0]} {j['correlation'][a][b]:+.2f}"
                 for a in range(len(n)) for b in range(a + 1, len(n))]
        if pairs:
            out.append("  correlations: " + ", ".join(pairs))
        nc = j.get("ni_co_only")
        if nc and nc["rank"] < nc["parameters"]:
            out.append(f"  Ni and Co alone constrain {nc['rank']} of the "
                       f"{nc['parameters']} conditions (degenerate)")
    q = c.get("pressure_inferred")
    if q:
        def fmt(v: list[float], op: list[bool]) -> str:
            return (f"[{'<=' if op[0] else ''}{v[0]:.1f}, {'>=' if op[1] else ''}"
                    f"{v[1]:.1f}] GPa")

        out.append(f"  pressure inferred over [{q['range'][0]:g}, {q['range'][1]:g}] GPa "
                   f"({len(q['evaluated'])} fits): profile interval delta chi2 = 1 "
                   f"{fmt(q['interval_68'], q['interval_68_open'])}, 95% (3.84) "
                   f"{fmt(q['interval_95'], q['interval_95_open'])}; T "
                   f"[{q['temperature_K_at_95'][0]:.0f}, {q['temperature_K_at_95'][1]:.0f}] K "
                   f"and dIW [{q['dIW_at_95'][0]:.2f}, {q['dIW_at_95'][1]:.2f}] at the 95% "
                   "ends")
    return out

