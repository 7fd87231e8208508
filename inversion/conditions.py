"""Core formation at a pressure, temperature and oxygen fugacity in the convex path.

``[core] partitioning = "single-stage"`` replaces the effective D of every element that
has a metal/silicate regression in :mod:`inversion.partitioning` (its
``DEFAULT_CHOICE``: Ni, Co, V, Cr, Si, Nb, Ta, W, and S's constant D) by the mass-basis
D of that regression at (P, T, dIW); the other elements keep the effective,
Earth-calibrated D of :func:`inversion.model.default_partition`. The fit then runs
unchanged on those D.

Conventions (those of :mod:`inversion.partitioning`)
-----------------------------------------------------
- Molar D on the single-cation oxide basis, ideal mixing (the regressions' ``ideal``
  evaluation); mass D = molar D x ``Mbar_sil / Mbar_met``.
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
#: Resolution [GPa] of the minimum and of the interval ends.
PRESSURE_TOL_GPA = 0.25
LIQUIDUS = "peridotite liquidus, Fiquet et al. (2010)"


def silicate_molar_mass(p: Any) -> float:
    """Mean molar mass [g/mol] per single-cation oxide unit of the target silicate,
    over the elements of the mass balance the target holds."""
    c = np.asarray(p.observed, float)
    ok = np.isfinite(c) & (c > 0)
    return float(np.sum(c[ok] * p.oxide_factor[ok]) / np.sum(c[ok] / p.atomic_weight[ok]))


def _metal(p: Any, core: np.ndarray) -> tuple[float, float]:
    """(x_Fe, Mbar_met) of a core given as element masses on the problem's axis."""
    core = np.maximum(np.asarray(core, float), 0.0)
    mol = core / p.atomic_weight
    return float(mol[p.fe_index] / mol.sum()), float(core.sum() / mol.sum())


def reference_metal(p: Any) -> tuple[float, float]:
    """(x_Fe, Mbar_met) of the Earth's core of McDonough (2003) on the problem's
    elements (``earth_core_mantle.csv``; Fe from its 85.5 wt%, recalled): the start of the
    fixed point."""
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
                  extra: dict[str, Any] | None = None) -> Any:
    """The problem with the D of the regression elements at (P, T, dIW).

    Parameters
    ----------
    p : Problem
    base_D : (n,) the effective D (kept for the elements without a regression).
    chem : the compiled regressions on the problem's element axis.
    P, T, dIW : pressure [GPa], temperature [K], oxygen fugacity relative to IW.
    Mbar_sil, Mbar_met : mean molar masses [g/mol] of the mass/molar conversion.
    extra : further entries of ``core_conditions``.
    """
    state = np.array([0.5, Mbar_sil, Mbar_met, 0.0, 0.0])
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
            "Mbar_met_g_mol": Mbar_met, "sources": dict(sources), **(extra or {})}
    return replace(p, D=D, D_sources=sources, core_conditions=cond)


def _setup(p: Any, case: Any) -> dict[str, Any]:
    chem = pt.compile_chemistry(p.elements, oxygen=False)
    x_fe, mbar_met = reference_metal(p)
    cc = case.core
    return {"chem": chem, "base_D": np.asarray(p.D, float).copy(), "T": cc.temperature_K,
            "Mbar_sil": silicate_molar_mass(p), "x_FeO": _x_FeO_target(p),
            "dIW_fixed": cc.dIW, "x_Fe": x_fe, "Mbar_met": mbar_met,
            "dIW_from": ("[core] dIW of the case" if cc.dIW is not None else
                         "mantle FeO of the target and the Fe of the fitted core")}


def _dIW(s: dict[str, Any], x_fe: float) -> float:
    if s["dIW_fixed"] is not None:
        return float(s["dIW_fixed"])
    return 2.0 * math.log10(s["x_FeO"] / x_fe)


def _at(p: Any, s: dict[str, Any], P: float, x_fe: float, mbar_met: float,
        extra: dict[str, Any] | None = None) -> Any:
    T = temperature_at(s["T"], P)
    return at_conditions(p, s["base_D"], s["chem"], P, T, _dIW(s, x_fe), s["Mbar_sil"],
                         mbar_met, {"temperature_from": LIQUIDUS if s["T"] == "liquidus"
                                    else "[core] temperature_K of the case",
                                    "dIW_from": s["dIW_from"], **(extra or {})})


def at_case_conditions(p: Any, case: Any, pressure_GPa: float | None = None) -> Any:
    """The problem at the case's fixed conditions (or at ``pressure_GPa``), with ``x_Fe``
    and ``Mbar_met`` of the reference core (no iteration with a fit)."""
    P = case.core.pressure_GPa if pressure_GPa is None else pressure_GPa
    if isinstance(P, tuple):
        raise InputError("pressure_GPa = [low, high] is inferred by 'planetmix fit' and "
                         "'planetmix sample' only; give one value for this command",
                         file=case.path,
                         field="core.pressure_GPa", value=list(P))
    s = _setup(p, case)
    return _at(p, s, float(P), s["x_Fe"], s["Mbar_met"],
               {"iterated_with_fit": False})


def fit_at_conditions(p: Any, case: Any, P: float, settings: Any, *,
                      previous: Any = None, state: tuple[float, float] | None = None,
                      setup: dict[str, Any] | None = None) -> tuple[Any, Any, tuple]:
    """Fit at pressure P with (dIW, Mbar_met) iterated with the fitted core.

    ``p`` is the effective-D problem of the case. The first fit is a full
    :func:`inversion.fit.fit_problem` unless ``previous`` (a fit at a nearby pressure)
    is given, which then starts a :func:`inversion.fit.refit`; the later iterations refit
    from the last fit. Returns ``(result, problem, (x_Fe, Mbar_met))``.
    """
    from .fit import fit_problem, forward_of, refit

    s = setup or _setup(p, case)
    x_fe, mbar = state or (s["x_Fe"], s["Mbar_met"])
    res, pc = previous, None
    for it in range(1, STATE_ITERATIONS + 1):
        pc = _at(p, s, P, x_fe, mbar, {"iterated_with_fit": True, "fixed_point_fits": it})
        res = fit_problem(pc, settings) if res is None else refit(pc, res, settings)
        if not res.feasible:
            break
        core = forward_of(pc, res)["core"][0]
        x_new, m_new = _metal(pc, core)
        moved = (abs(_dIW(s, x_new) - _dIW(s, x_fe)), abs(m_new - mbar) / mbar)
        x_fe, mbar = x_new, m_new
        if moved[0] < 2e-3 and moved[1] < 1e-3:
            break
    pc = _at(p, s, P, x_fe, mbar, {"iterated_with_fit": True,
                                   "fixed_point_fits": it})
    return res, pc, (x_fe, mbar)


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
    regs = sorted(e for e, v in c["sources"].items() if v != "effective")
    out = [f"core formation single-stage at P = {c['pressure_GPa']:.1f} GPa, "
           f"T = {c['temperature_K']:.0f} K ({c['temperature_from']}), dIW = "
           f"{c['dIW']:.2f} ({c['dIW_from']}); regression D for {', '.join(regs)}, "
           "effective D for the other siderophiles"]
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

