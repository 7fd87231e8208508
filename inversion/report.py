"""One self-contained HTML report of a result folder.

:func:`build_report` reads a folder written by ``planetmix fit``, ``rank``, ``sample``,
``compare``, ``star`` or ``batch``, recognises its kind by the files it holds
(:func:`detect_kind`),
draws the figures (:mod:`inversion.plots`) and writes ``report.html`` into the folder: the
figures embedded as base64 PNG, the key numbers with their uncertainties, the diagnostics,
the provenance (reference tables, sources, versions, settings) and the limits of the model.
The file needs no network access: it loads nothing from outside itself.
"""

from __future__ import annotations

import base64
import html
import json
import math
import re
import tomllib
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .exceptions import InputError

__all__ = ["REPORT_KINDS", "detect_kind", "build_report", "Report", "render_html",
           "MODEL_LIMITS", "mantle_trace_table"]

#: Result kinds and the files that identify them (all must be present).
#: Checked in this order: fit and sample folders may also hold the hand-off pair
#: (planet.json, planet_draws.csv) that identifies a star folder.
REPORT_KINDS: dict[str, tuple[str, ...]] = {
    "sample": ("sample.json",),
    "fit": ("fit.json", "residuals.csv"),
    "rank": ("ranking.csv",),
    "compare": ("comparison.csv",),
    "batch": ("summary.json", "run.json"),
    "star": ("planet.json",),
    "sensitivity": ("sensitivity.csv", "spread.csv"),
}

#: What the model leaves out; printed in every report.
MODEL_LIMITS: tuple[str, ...] = (
    "Building blocks are the mean compositions of meteorite groups; the real accreted "
    "material may have differed from any sampled group, and the group means carry their "
    "own analytical and sampling spread.",
    "Volatile depletion is a single smooth function of the 50% condensation temperature "
    "(one declared form); condensation temperatures depend on the nebular pressure and "
    "composition (1e-4 bar, solar gas here), and processes other than condensation "
    "(evaporation, degassing, late volatile delivery) are not separated.",
    "Core formation is a single-stage mass balance with effective metal/silicate partition "
    "coefficients; pressure, temperature and redox paths of a growing planet are not "
    "modelled, and the light-element content of the core follows from those coefficients.",
    "Late accretion adds one component after core formation; its mass is read from the "
    "highly siderophile elements and inherits their partitioning assumptions.",
    "Isotope anomalies are mixed linearly by the carrier element's mass; lithophile carriers "
    "record the whole accretion, and the building blocks' isotope values are group means.",
    "Uncertainties of a convex fit are not computed (point estimates); credible intervals "
    "come from a Bayesian run (planetmix sample).",
)


@dataclass
class Report:
    """What a report shows (built per result kind, rendered by :func:`render_html`)."""

    title: str
    kind: str
    folder: str
    key_numbers: list[tuple[str, str, str]] = field(default_factory=list)
    figures: list[tuple[str, str, Any]] = field(default_factory=list)
    tables: list[tuple[str, str]] = field(default_factory=list)
    diagnostics: list[tuple[str, str, str]] = field(default_factory=list)
    findings: list[str] = field(default_factory=list)
    provenance: dict[str, Any] = field(default_factory=dict)
    limits: list[str] = field(default_factory=lambda: list(MODEL_LIMITS))
    notes: list[str] = field(default_factory=list)


# --------------------------------------------------------------------------- reading
def detect_kind(folder: str | Path) -> str:
    """Recognise a result folder by the files it holds.

    Raises
    ------
    InputError
        When the folder does not exist or holds no planetmix result.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError("result folder not found", file=str(folder))
    for kind, files in REPORT_KINDS.items():
        if all((folder / f).exists() for f in files):
            return kind
    known = "; ".join(f"{k}: {', '.join(v)}" for k, v in REPORT_KINDS.items())
    raise InputError(f"unknown result folder: it holds none of the files of a planetmix "
                     f"result ({known})", file=str(folder))


def _read_json(path: Path) -> dict[str, Any]:
    # a result file read back goes through the input door (regular file, size, UTF-8)
    from components._tables import read_text_checked

    text = read_text_checked(path, what="result")
    try:
        data = json.loads(text)
    except json.JSONDecodeError as err:
        raise InputError(f"cannot read result file: {' '.join(str(err).split())}",
                         file=str(path)) from None
    except RecursionError:
        raise InputError("cannot read result file: nested too deeply",
                         file=str(path)) from None
    if not isinstance(data, dict):
        raise InputError("not a planetmix result file (no JSON object)", file=str(path))
    return data


def _read_csv(path: Path) -> pd.DataFrame:
    import io

    from components._tables import read_text_checked

    text = read_text_checked(path, what="result table")
    try:
        return pd.read_csv(io.StringIO(text), keep_default_na=False, na_values=[""])
    except (pd.errors.ParserError, pd.errors.EmptyDataError) as err:
        raise InputError(f"cannot read result table: {' '.join(str(err).split())}",
                         file=str(path)) from None


def _fmt(v: Any, digits: int = 4) -> str:
    if v is None:
        return "n/a"
    try:
        f = float(v)
    except (TypeError, ValueError):
        return str(v)
    if not math.isfinite(f):
        return "n/a"
    if f != 0 and (abs(f) < 1e-3 or abs(f) >= 1e5):
        return f"{f:.{digits - 1}e}"
    return f"{f:.{digits}g}"


def _planet_mass(fitjson: dict[str, Any]) -> float | None:
    la = (fitjson.get("findings") or {}).get("late_accretion") or {}
    try:
        m = float(la["mass_kg"]) / float(la["fraction_of_planet"])
        if math.isfinite(m) and m > 0:
            return m
    except (KeyError, TypeError, ValueError, ZeroDivisionError):
        pass
    case_file = (fitjson.get("provenance") or {}).get("case_file")
    if isinstance(case_file, str) and case_file and Path(case_file).is_file():
        from components._tables import read_text_checked

        try:
            raw = tomllib.loads(read_text_checked(case_file, what="case"))
            m = raw.get("target", {}).get("planet_mass_kg")
            return float(m) if m else None
        except (InputError, tomllib.TOMLDecodeError, TypeError, ValueError,
                AttributeError, RecursionError):
            return None
    return None


def _heat_table(mantle_ppm: dict[str, np.ndarray], mantle_mass_kg: np.ndarray | float | None
                ) -> tuple[pd.DataFrame, str] | None:
    """Heat production history (per isotope and total) from mantle U, Th, K (ppm)."""
    from . import heat

    if not all(k in mantle_ppm for k in ("U", "Th", "K")):
        return None
    times = np.linspace(0.0, 4.5, 46)
    c = {k: np.atleast_1d(np.asarray(v, float)) * 1e-6 for k, v in mantle_ppm.items()}
    if mantle_mass_kg is not None:
        scale, unit = np.atleast_1d(np.asarray(mantle_mass_kg, float)) / 1e12, "TW"
    else:
        scale, unit = np.array([1e12]), "pW/kg of mantle"
    out = {"time_Gyr_ago": times}
    for iso in heat.ISOTOPES:
        decay = np.exp(math.log(2.0) * times / iso.half_life_gyr)
        per = (c[iso.element][:, None] * heat.isotope_mass_fraction(iso.name) * iso.w_per_kg
               * decay[None, :]) * scale[:, None]
        out[iso.name] = np.median(per, axis=0)
    tot = heat.heat_history(c["U"], c["Th"], c["K"], times) * scale[:, None]
    out["total"] = np.median(tot, axis=0)
    if tot.shape[0] > 1:
        out["total_lo"], out["total_hi"] = np.percentile(tot, [5, 95], axis=0)
    return pd.DataFrame(out), unit


def _mantle_heat_ppm(planet: pd.DataFrame) -> dict[str, float]:
    m = planet[planet["reservoir"] == "mantle"].set_index("species")
    out = {}
    for el in ("U", "Th"):
        if el in m.index:
            out[el] = float(m.loc[el, "value"]) if m.loc[el, "unit"] == "ppm" else float(
                m.loc[el, "value"]) * 1e4
    if "K2O" in m.index:
        out["K"] = float(m.loc["K2O", "value"]) * 1e4 * 2 * 39.0983 / 94.196
    elif "K" in m.index:
        out["K"] = float(m.loc["K", "value"])
    return out


def _sources_html(prov: dict[str, Any]) -> list[str]:
    return [f"[{k}] {v}" for k, v in sorted((prov.get("sources") or {}).items())]


# --------------------------------------------------------------------------- fit
def _fit_report(folder: Path) -> Report:
    from . import plots

    d = _read_json(folder / "fit.json")
    resid = _read_csv(folder / "residuals.csv")
    prov = d.get("provenance") or {}
    ref = prov.get("reference_element", "Mg")
    norm = str(d.get("normaliser") or prov.get("normaliser") or "CI")
    rep = Report(title=d.get("title", folder.name), kind="fit", folder=str(folder),
                 provenance=prov)
    status = d.get("status", "?")
    rep.key_numbers.append(("status", status, ""))
    if status == "infeasible":
        for r in d.get("reasons", []):
            rep.diagnostics.append(("infeasible", r, "the hypothesis cannot meet its "
                                    "constraints; this is an answer, not a poor fit"))
    feasible = status not in ("infeasible", "?")
    opt = d.get("optimality") or {}
    if opt:
        rep.diagnostics.append((
            "optimality", status,
            f"{opt.get('agreeing')} of {opt.get('starts')} distinct starts reach the best "
            f"chi2 within {opt.get('agreement_tolerance_relative')} (relative); first-order "
            f"residual {_fmt(opt.get('kkt_residual'))} (tolerance "
            f"{opt.get('kkt_tolerance')}); optimal_unverified means the starts disagree "
            "or the residual is large (docs/solver.md)"))
    ivals = (d.get("intervals") or {}).get("quantities") or {}

    def _ci(key: str) -> str:
        q = ivals.get(key)
        return f"95% [{_fmt(q['p2.5'])}, {_fmt(q['p97.5'])}]" if q else ""

    for k, v in ((d.get("weights") or {}) if feasible else {}).items():
        mf = (d.get("mass_fractions") or {}).get(k)
        rep.key_numbers.append((f"weight of {k} ({ref} basis)", _fmt(v),
                                f"mass fraction {_fmt(mf)}; {_ci('weight:' + k)}"))
    vol = dict(d.get("volatility") or {})
    for k, v in vol.items():
        if k != "form" and feasible:
            rep.key_numbers.append((_vol_label(k, vol.get("form")), _fmt(v),
                                    _ci("volatility:" + k)))
    if feasible:
        rep.key_numbers.append(("late accretion, fraction of mantle",
                                _fmt(d.get("late_accretion_fraction")),
                                f"component {d.get('late_accretion_component')}; "
                                f"{_ci('late_accretion_fraction')}"))
    la = (d.get("findings") or {}).get("late_accretion") or {}
    if la.get("fraction_of_planet") is not None:
        rep.key_numbers.append(("late accretion, fraction of planet",
                                _fmt(la["fraction_of_planet"]),
                                f"{_fmt(la.get('mass_kg'))} kg"))
    if feasible:
        rep.key_numbers.append(("core mass fraction", _fmt(d.get("core_mass_fraction")),
                                _ci("core_mass_fraction")))
    if ivals:
        iv = d["intervals"]
        rep.notes.append("Intervals of the convex fit: " + str(iv.get("method", "")) + (
            "; active constraints: " + ", ".join(iv["active_constraints"])
            if iv.get("active_constraints") else ""))
    else:
        rep.key_numbers.append(("estimates", "none", "an infeasible hypothesis has no "
                                "estimates; see the diagnostics for the binding constraints"))
    for k, v in (d.get("isotopes_predicted") or {}).items():
        rep.key_numbers.append((f"predicted {k}", _fmt(v), ""))
    rep.diagnostics += [
        ("chi2", _fmt(d.get("chi2")), f"on {d.get('n_elements')} fitted elements, "
         f"{d.get('n_params')} nonlinear parameters"),
        ("AIC / BIC", f"{_fmt(d.get('aic'))} / {_fmt(d.get('bic'))}", "AIC = chi2 + 2p, "
         "BIC = chi2 + p ln n"),
    ]
    n_fit = int(d.get("n_elements") or 0)
    chi2 = d.get("chi2")
    if n_fit and isinstance(chi2, int | float):
        rep.diagnostics.append(("reduced chi2", _fmt(float(chi2)
                                                      / max(n_fit - int(d.get("n_params") or 0),
                                                            1)),
                                "above 1: scatter beyond the stated uncertainties "
                                "(the idealised model is not exact)"))
    rep.findings = _findings_lines(d.get("findings") or {})
    rep.notes = list(d.get("notes") or []) + rep.notes
    title = rep.title
    if len(resid):
        ctab = prov.get("condensation_table", "lodders2003")
        rep.figures.append(("Volatility diagram", "Observed (symbols, 1-sigma bars) and "
                            f"modelled (black ticks) abundances, {norm}- and "
                            f"{ref}-normalised, against the 50% condensation temperature; "
                            "the blue line is the fitted volatility trend through the "
                            "lithophile model points.",
                            lambda: plots.volatility_diagram(resid, reference=ref,
                                                             volatility=vol, tc_table=ctab,
                                                             title=title, normaliser=norm)))
        rep.figures.append(("Residuals by element", "z = (observed - model)/sigma, elements "
                            "ordered by condensation temperature.",
                            lambda: plots.residuals_plot(resid, title=title)))
    if feasible and d.get("weights"):
        rep.figures.append(("Building-block weights", "Point estimates of the convex fit.",
                            lambda: plots.weights_plot(d["weights"],
                                                       mass_fractions=d.get("mass_fractions"),
                                                       basis=ref)))
    cc = d.get("core_conditions") or {}
    if len(resid) and cc.get("partitioning") == "single-stage":
        rep.figures.append(("Core formation at pressure", "Moderately siderophile elements "
                            "of the mantle, observed and modelled with the D of the "
                            "metal/silicate regressions at the fitted conditions (open "
                            "symbols: effective D); right, when the pressure is inferred, "
                            "the chi2 profile with its 68% and 95% intervals.",
                            lambda: plots.siderophile_plot(resid, cc, normaliser=norm,
                                                           reference=ref, title=title)))
    _isotope_figure(rep, d.get("isotope_figure"), staged=d.get("staged_accretion"))
    _staged_section(rep, d.get("staged_accretion"))
    if (folder / "planet.csv").exists():
        planet = _read_csv(folder / "planet.csv")
        rep.figures.append(("Whole planet", "Mantle oxides, core composition, molar ratios "
                            "and core mass fraction of the best fit.",
                            lambda: plots.planet_plot(planet)))
        rep.tables.append(("Planet (ratios and CMF)", _planet_summary_html(planet)))
        trace = mantle_trace_table(planet)
        if len(trace):
            rep.tables.append(("Mantle trace elements (element mass, ppm = µg/g, "
                               "ppb = ng/g)", _table_html(trace)))
        ht = _heat_table(_mantle_heat_ppm(planet), _mantle_mass(d, planet))
        if ht is not None:
            table, unit = ht
            rep.figures.append(("Radiogenic heat production", "From the mantle U, Th and K "
                                "of the fit (Turcotte & Schubert 2014, Table 4.2).",
                                lambda: plots.heat_plot(table, unit=unit,
                                                        interval_label="interval")))
            rep.key_numbers.append((f"mantle heat production today [{unit}]",
                                    _fmt(table["total"].iloc[0]), "238U+235U+232Th+40K"))
            _add_source(rep, "turcotteschubert2014")
    truth = _truth_of(prov)
    if truth and feasible:
        rep.tables.append(("Recovered vs the stated truth (simulated scenario)", _truth_table(
            truth, {"weights": d.get("weights"), "mass_fractions": d.get("mass_fractions"),
                    "volatility": vol, "late_accretion_fraction":
                    d.get("late_accretion_fraction"),
                    "core_mass_fraction": d.get("core_mass_fraction")}, "convex fit")))
    if len(resid):
        flagged = resid[resid["flag"].fillna("").isin(["above model", "below model"])]
        if len(flagged):
            rep.tables.append(("Elements off the fitted trend (|z| > 3)", _table_html(
                flagged[["element", "tc50", "observed", "model", "sigma", "z", "fitted",
                         "flag"]])))
    return rep


def _staged_section(rep: Report, st: dict[str, Any] | None) -> None:
    """The two-stage accretion of a fit (``staged_accretion`` of fit.json): the early,
    late and single mixtures as a table, the comparison as a diagnostic."""
    if not st:
        return
    if st.get("status") != "fitted":
        rep.diagnostics.append(("two-stage accretion", "not run", str(st.get("reason"))))
        return
    table = pd.DataFrame({"early mixture": st["early"], "late mixture": st["late"],
                          "one mixture throughout": st["single"]}).rename_axis(
        "building block (mass fraction)").reset_index()
    rep.tables.append((f"Two-stage accretion (late stage {_fmt(st['late_stage_fraction'])} "
                       "of the mass): mixtures read from the isotopes", _table_html(table)))
    rep.diagnostics.append((
        "two stages vs one mixture", f"{st['preferred']} preferred",
        f"BIC two stages {_fmt(st['bic_staged'])}, one mixture {_fmt(st['bic_single'])}; "
        f"likelihood-ratio p = {_fmt(st['lr_pvalue'])}; siderophile retention of the early "
        "stage " + ", ".join(f"{k} {_fmt(v)}" for k, v in st["retention_early"].items()
                             if v < 1) + f" (core mass fraction "
        f"{_fmt(st['core_mass_fraction'])} from {st.get('core_mass_fraction_from')})"))
    rep.notes.append(str(st.get("model", "")))


def _isotope_figure(rep: Report, data: dict[str, Any] | None, *,
                    staged: dict[str, Any] | None = None,
                    posterior: dict[str, dict[str, float]] | None = None) -> None:
    """Add the isotope figure: each system's observed window and the intervals the
    hypothesis and its blocks reach (``isotope_figure`` of fit.json,
    :func:`inversion.isotopes.figure_data`); the early, late, two-stage and one-mixture
    anomalies of a staged fit; a posterior's 90% interval and median."""
    from . import plots

    if not (data and data.get("systems")) and not (staged and staged.get("early")):
        return
    data = data or {}
    systems = data.get("systems") or {}
    observed = {k: (float(v["value"]), float(v["half_width"])) for k, v in systems.items()}
    ranges = {lab: {k: (float(a), float(b)) for k, (a, b) in row.items()}
              for lab, row in (data.get("reachable") or {}).items()}
    predicted = {lab: dict(row) for lab, row in (data.get("predicted") or {}).items()}
    if posterior:
        lab = "posterior 90%"
        ranges[lab] = {k: (v["p5"], v["p95"]) for k, v in posterior.items()}
        predicted[lab] = {k: v["median"] for k, v in posterior.items()}
    if staged and staged.get("early"):
        observed.update({k: (float(v["value"]), 2.0 * float(v["sigma"]))
                         for k, v in (staged.get("observed") or {}).items()
                         if k not in observed})
        for key, lab in (("early_alone", "early mixture alone"),
                         ("late_alone", "late mixture alone"),
                         ("predicted_staged", "two stages"),
                         ("predicted_single", "one mixture throughout")):
            row = {k: float(v) for k, v in (staged.get(key) or {}).items()
                   if k in observed}
            if row:
                ranges[lab] = {k: (v, v) for k, v in row.items()}
                predicted[lab] = row
    windows = "; ".join(f"{k} {v['window']}" for k, v in systems.items())
    caption = ("Isotope anomalies: the observed value (blue line) and its window (shaded; "
               f"{windows}), and the interval each hypothesis reaches over all its "
               "mixtures (green where it meets the window, vermillion where it misses), "
               "with the late component up to its cap; dots are fitted values.")
    if staged and staged.get("early"):
        caption += (" Staged accretion: the anomaly of the early and of the late mixture "
                    "alone, of the two stages together and of the best single mixture "
                    "(siderophile systems shaded at +-2 sigma_obs).")
    title = rep.title
    rep.figures.append(("Isotope constraints", caption,
                        lambda: plots.isotope_plot(observed, ranges, predicted=predicted,
                                                   title=title)))


def _truth_of(prov: dict[str, Any]) -> dict[str, Any] | None:
    """The stated truth of a simulated scenario: ``truth.json`` beside the case file."""
    case = prov.get("case_file")
    if not case:
        return None
    path = Path(str(case)).parent / "truth.json"
    if not path.is_file():
        return None
    try:
        return _read_json(path)
    except InputError:
        return None


def _truth_table(truth: dict[str, Any], est: dict[str, Any], label: str) -> str:
    """Truth beside the recovered value for weights, volatility, late accretion, CMF.

    ``est`` maps the same keys as ``truth`` to a number or to ``{"median", "q05", "q95"}``.
    """
    rows = []

    def val(v: Any) -> tuple[str, str]:
        if isinstance(v, dict) and "median" in v:
            return _fmt(v["median"]), f"[{_fmt(v.get('q05'))}, {_fmt(v.get('q95'))}]"
        return _fmt(v), ""

    for group, name in (("weights", "weight of {} (reference basis)"), ("mass_fractions",
                                                         "mass fraction of {}")):
        for k, t in (truth.get(group) or {}).items():
            e = (est.get(group) or {}).get(k)
            if e is not None or t:
                rows.append((name.format(k), _fmt(t), *val(e if e is not None else 0.0)))
    vt, ve = truth.get("volatility") or {}, est.get("volatility") or {}
    for k, t in vt.items():
        if k != "form" and k in ve:
            rows.append((_vol_label(k, vt.get("form")), _fmt(t), *val(ve[k])))
    for k, name in (("late_accretion_fraction", "late accretion, fraction of mantle"),
                    ("core_mass_fraction", "core mass fraction")):
        if k in truth and est.get(k) is not None:
            rows.append((name, _fmt(truth[k]), *val(est[k])))
    df = pd.DataFrame(rows, columns=["quantity", "stated truth", label, "90% interval"])
    if not (df["90% interval"] != "").any():
        df = df.drop(columns=["90% interval"])
    return _table_html(df)


def _add_source(rep: Report, key: str) -> None:
    """Add a citation from the library's sources table to the report's provenance."""
    import components

    srcs = components.sources()
    if key in srcs.index:
        rep.provenance = dict(rep.provenance)
        rep.provenance["sources"] = {**(rep.provenance.get("sources") or {}),
                                     key: srcs.loc[key, "citation"]}


def _mantle_mass(d: dict[str, Any], planet: pd.DataFrame) -> float | None:
    m = _planet_mass(d)
    if m is None:
        return None
    cmf = planet.loc[planet["species"] == "core_mass_fraction", "value"]
    c = float(cmf.iloc[0]) if len(cmf) else float(d.get("core_mass_fraction") or math.nan)
    return m * (1.0 - c) if math.isfinite(c) else None


def _findings_lines(f: dict[str, Any]) -> list[str]:
    out = []
    rl = f.get("refractory_lithophile_level")
    if rl:
        out.append(f"Refractory lithophile elements sit at {_fmt(rl['factor'], 3)} x "
                   f"{rl.get('normaliser', 'CI')} "
                   f"(log10 {_fmt(rl['log10_relative_to_CI'], 3)} ± "
                   f"{_fmt(rl['uncertainty_dex'], 2)} dex; {rl.get('basis', '')}).")
    ci = f.get("class_independence") or {}
    if ci.get("status") == "done":
        out.append(f"Volatility and geochemical class: {ci['statement']} (likelihood ratio "
                   f"{_fmt(ci['lr_statistic'], 3)} against "
                   f"{ci.get('reference_distribution', 'chi2(1)')}, p = "
                   f"{_fmt(ci['p_value'], 3)}; threshold {_fmt(ci['threshold_sigma'], 2)} "
                   "sigma).")
        if ci.get("circularity"):
            out.append(f"Note on the class test: {ci['circularity']}.")
    elif ci.get("status"):
        out.append(f"Class test not run: {ci.get('reason', '')}.")
    onset = f.get("volatility_onset") or {}
    if onset.get("warning"):
        out.append(f"Warning: {onset['warning']}.")
    la = f.get("late_accretion")
    if la:
        out.append(f"Late accretion ({la.get('component')}): "
                   f"{_fmt(100 * float(la['fraction_of_mantle']), 3)}% of the mantle"
                   + (f", {_fmt(100 * float(la['fraction_of_planet']), 3)}% of the planet "
                      f"({_fmt(la.get('mass_kg'))} kg)" if la.get("fraction_of_planet")
                      is not None else "") + ".")
    for o in f.get("off_trend") or []:
        cls = f" ({o['geochemical_class'].replace('_', ' ')})" if o.get("geochemical_class") \
            else ""
        out.append(f"{o['element']}{cls} lies {o['direction']} by {_fmt(o['offset_dex'], 2)} "
                   f"dex (z = {_fmt(o['z'], 2)}{'' if o.get('fitted') else '; not fitted'}; "
                   f"{o.get('basis', 'residual of the fitted model')}).")
    return out


def mantle_trace_table(planet: pd.DataFrame, *, major_min_wt: float | None = None
                       ) -> pd.DataFrame:
    """The mantle's trace elements (oxides below the major/minor threshold) as elements,
    in ppm (µg/g) from 1 ppm up and in ppb (ng/g) below.

    Parameters
    ----------
    planet : DataFrame
        Tidy planet table (``reservoir``, ``species`` as oxides, ``value`` [wt%], ``unit``;
        optional ``lo``/``hi``).
    major_min_wt : float, optional
        Threshold [wt% oxide] (default :data:`inversion.plots.MAJOR_OXIDE_MIN_WT`).

    Returns
    -------
    DataFrame
        ``element``, ``value``, ``unit`` (ppm or ppb) and ``lo``/``hi`` when given.
    """
    import components

    from .plots import MAJOR_OXIDE_MIN_WT

    cut = MAJOR_OXIDE_MIN_WT if major_min_wt is None else major_min_wt
    props = components.elements()
    m = planet[planet["reservoir"] == "mantle"]
    m = m[((m["unit"] == "wt%") & (m["value"].astype(float) < cut))
          | m["unit"].isin(["ppm", "ppb"])]
    rows = []
    for _, r in m.iterrows():
        if r["unit"] in ("ppm", "ppb"):  # already an element mass fraction
            el = str(r["species"])
            to_ppm = 1.0 if r["unit"] == "ppm" else 1e-3
        else:
            sp = components.parse_species(str(r["species"]))
            if sp is None or sp[0] not in props.index:
                continue
            el = sp[0]
            to_ppm = 1e4 / float(props.loc[el, "oxide_factor"])  # wt% oxide -> µg/g
        v = float(r["value"]) * to_ppm
        scale, unit = (1.0, "ppm") if v >= 1.0 else (1e3, "ppb")
        row = {"element": el, "value": float(f"{v * scale:.4g}"), "unit": unit}
        for c in ("lo", "hi"):
            if c in m.columns and pd.notna(r[c]):
                row[c] = float(f"{float(r[c]) * to_ppm * scale:.4g}")
        rows.append(row)
    cols = ["element", "value", "unit"] + [c for c in ("lo", "hi") if c in m.columns]
    return pd.DataFrame(rows, columns=cols)


def _planet_summary_html(planet: pd.DataFrame) -> str:
    sub = planet[planet["reservoir"].isin(["ratio", "planet"])]
    return _table_html(sub)


# --------------------------------------------------------------------------- rank
def _rank_report(folder: Path) -> Report:
    from . import plots

    table = _read_csv(folder / "ranking.csv")
    meta = _read_json(folder / "ranking.json") if (folder / "ranking.json").exists() else {}
    rep = Report(title=meta.get("title", folder.name), kind="rank", folder=str(folder),
                 provenance=meta.get("provenance") or {})
    ok = table[table["status"] != "infeasible"] if "status" in table.columns else table
    rep.key_numbers.append(("hypotheses screened", str(len(table)),
                            f"{len(ok)} feasible, {len(table) - len(ok)} infeasible"))
    if len(ok):
        best = ok.iloc[0]
        rep.key_numbers.append(("best hypothesis", str(best["components"]),
                                f"BIC {_fmt(best.get('bic'))}, chi2 {_fmt(best.get('chi2'))}"))
        if len(ok) > 1:
            second = ok.iloc[1]
            rep.key_numbers.append(("runner-up", str(second["components"]),
                                    f"ΔBIC {_fmt(float(second['bic']) - float(best['bic']))}"))
        if "core_mass_fraction" in ok.columns:
            rep.key_numbers.append(("core mass fraction (best)",
                                    _fmt(best["core_mass_fraction"]), ""))
        if "late_accretion_fraction" in ok.columns:
            rep.key_numbers.append(("late accretion (best) [% of mantle]",
                                    _fmt(100.0 * float(best["late_accretion_fraction"])), ""))
        near = ok[(ok["bic"] - float(best["bic"])) <= 2.0]
        rep.diagnostics.append(("hypotheses within ΔBIC ≤ 2 of the best", str(len(near)),
                                ", ".join(near["components"].astype(str).head(10))))
    bad = table[table["status"] == "infeasible"] if "status" in table.columns else table.iloc[:0]
    for _, r in bad.head(10).iterrows():
        rep.diagnostics.append((f"infeasible: {r['components']}", str(r.get("reasons", "")),
                                ""))
    title = rep.title
    rep.figures.append(("Hypothesis ranking (BIC)", "ΔBIC of each hypothesis from the best; "
                        "hatched bars are infeasible hypotheses.",
                        lambda: plots.ranking_plot(table, criterion="bic", title=title)))
    if "aic" in table.columns:
        rep.figures.append(("Hypothesis ranking (AIC)", "ΔAIC from the best.",
                            lambda: plots.ranking_plot(table, criterion="aic", title=title)))
    wcols = [c for c in table.columns if c.startswith("w_")]
    if len(ok) and wcols:
        best = ok.iloc[0]
        weights = {c[2:]: float(best[c]) for c in wcols if np.isfinite(float(best[c]))}
        if weights:
            rep.figures.append(("Weights of the best hypothesis", str(best["components"]),
                                lambda: plots.weights_plot(weights)))
    from .volatility import FORMS

    vcols = {f"{f}_{n}": f"{n} [{u}]" if u != "1" else n for f, spec in FORMS.items()
             for n, u in zip(spec.params, spec.units, strict=True)}
    show = [c for c in ("rank", "components", "status", "chi2", "aic", "bic",
                        *vcols, "late_accretion_fraction", "core_mass_fraction")
            if c in table.columns]
    show += [c for c in wcols if c not in show]
    top = table[show].head(20).copy()
    if "late_accretion_fraction" in top.columns:
        top["late_accretion_fraction"] = 100.0 * top["late_accretion_fraction"]
    top = top.rename(columns={**{c: f"weight {c[2:]}" for c in wcols}, **vcols,
                              "aic": "AIC", "bic": "BIC",
                              "late_accretion_fraction": "late accretion [% of mantle]",
                              "core_mass_fraction": "core mass fraction"})
    rep.tables.append((f"The {len(top)} best of {len(table)} hypotheses (weights on the "
                       f"reference-element basis; empty: not in the mixture)",
                       _table_html(top)))
    rep.limits.append("Every hypothesis is fitted on the same elements, so chi2, AIC and BIC "
                      "compare across hypotheses; they do not say whether any hypothesis is "
                      "adequate in absolute terms (see the reduced chi2 of a fit).")
    return rep


# --------------------------------------------------------------------------- sample
_VOL_PARAMS = ("T0", "slope", "log10_floor", "a", "b", "T50", "width")


def _sample_report(folder: Path) -> Report:
    from . import plots

    meta = _read_json(folder / "sample.json")
    prov = meta.get("provenance") or {}
    ref = prov.get("reference_element", meta.get("reference_element", "Mg"))
    norm = str(prov.get("normaliser") or meta.get("normaliser") or "CI")
    rep = Report(title=meta.get("title", folder.name), kind="sample", folder=str(folder),
                 provenance=prov)
    title = rep.title
    idata = _load_idata(folder / "posterior.nc")
    draws = _posterior_draws(idata) if idata is not None else None
    comps = [str(c) for c in (meta.get("components") or [])]
    if draws is not None and not comps:
        comps = [c[2:] for c in draws.columns if c.startswith("x_")] or [
            c[2:] for c in draws.columns if c.startswith("w_")]
    # diagnostics first: a run that failed its gate says so at the top
    diag = _read_json(folder / "diagnostics.json") if (folder / "diagnostics.json").exists() \
        else (meta.get("diagnostics") or {})
    if diag:
        rep.diagnostics += _gate_lines(diag)
        if diag.get("passed") is False:
            rep.notes.insert(0, "This run FAILED its diagnostics gate (R-hat <= 1.01, bulk "
                             "ESS >= 400, no divergences; Vehtari et al. 2021): treat its "
                             "numbers as provisional and run longer.")
    for k in ("log_marginal_likelihood", "elpd_loo", "loo"):
        if meta.get(k) is not None:
            rep.diagnostics.append((k.replace("_", " "), _fmt(meta[k]) if not isinstance(
                meta[k], dict) else json.dumps(meta[k])[:300], ""))
    for line in meta.get("gate_messages") or []:
        rep.notes.append(str(line))
    for line in meta.get("notes") or []:
        rep.notes.append(str(line))
    post = meta.get("posterior") or {}
    if post:
        rep.key_numbers += _posterior_numbers(post, ref)
        truth = _truth_of(prov)
        if truth:
            rep.tables.append(("Recovered vs the stated truth (simulated scenario)",
                               _truth_table(truth, post, "posterior median")))
    summary = _read_csv(folder / "summary.csv") if (folder / "summary.csv").exists() else None
    if summary is not None:
        summary = _user_parameters(summary)
        if not post:
            rep.key_numbers += _summary_numbers(summary)
        rep.tables.append(("Posterior summary (every parameter)", _table_html(summary)))
        if "r_hat" in summary.columns and "ess_bulk" in summary.columns:
            worst = summary.sort_values("r_hat", ascending=False).head(3)
            rep.diagnostics.append(("parameters with the largest R-hat", ", ".join(
                f"{r['parameter']} {_fmt(r['r_hat'])}" for _, r in worst.iterrows()), ""))
    elif draws is not None and not post:
        rep.key_numbers += _draw_numbers(draws)
    # volatility diagram: the observed data with the posterior model and its band
    resid = _read_csv(folder / "residuals.csv") if (folder / "residuals.csv").exists() \
        else (_residuals_from_idata(idata, prov) if idata is not None else None)
    vol = dict(meta.get("volatility") or {})
    vol_names = [n for n in _VOL_PARAMS if draws is not None and n in draws.columns]
    form = (vol.get("form") or (post.get("volatility") or {}).get("form")
            or meta.get("volatility_form") or _form_of(vol_names))
    vol_draws = None
    if form and vol_names:
        from .volatility import FORMS

        names = list(FORMS[form].params) if form in FORMS else vol_names
        if all(n in draws.columns for n in names):
            vol_draws = draws[names].to_numpy(float)
            vol = {"form": form, **{n: float(np.median(draws[n])) for n in names}}
    if resid is not None and len(resid):
        ctab = prov.get("condensation_table", "lodders2003")
        rep.figures.append(("Volatility diagram", f"Observed abundances ({norm}- and "
                            f"{ref}-normalised; symbols) with the "
                            "posterior model (black ticks: medians; grey bars: 90% "
                            "credible intervals) and the volatility trend with its 90% band.",
                            lambda: plots.volatility_diagram(
                                resid, reference=ref, volatility=vol if form else None,
                                volatility_draws=vol_draws, tc_table=ctab, title=title,
                                normaliser=norm)))
        if "z" in resid.columns:
            rep.figures.append(("Residuals by element", "Posterior-predictive z-scores: "
                                "(observed - median model) / predictive spread.",
                                lambda: plots.residuals_plot(resid, title=title)))
    cc = meta.get("core_conditions") or {}
    if resid is not None and len(resid) and cc.get("partitioning") == "single-stage":
        pt_draws = None
        if idata is not None and "pressure_GPa" in idata.posterior:
            P = np.asarray(idata.posterior["pressure_GPa"], float).ravel()
            if "temperature_K" in idata.posterior:
                T = np.asarray(idata.posterior["temperature_K"], float).ravel()
            else:
                from .partitioning import peridotite_liquidus

                T = (peridotite_liquidus(P) if "liquidus" in str(cc.get(
                    "temperature_from", "")).lower() else np.full_like(P, float(np.nan)))
            if np.all(np.isfinite(T)):
                pt_draws = np.stack([P, T], axis=1)
        rep.figures.append(("Core formation at pressure", "Moderately siderophile elements "
                            "of the mantle, observed and modelled (black ticks: posterior "
                            "medians; grey bars: 90% credible intervals) with the D of the "
                            "metal/silicate regressions at the sampled conditions (open "
                            "symbols: effective D); right, when the pressure is sampled, "
                            "the posterior (P, T) region.",
                            lambda: plots.siderophile_plot(resid, cc, normaliser=norm,
                                                           reference=ref, title=title,
                                                           pt_draws=pt_draws)))
    ppc = _predictive_table(idata, prov) if idata is not None else None
    if ppc is not None and len(ppc):
        out = ppc[(ppc["observed"] < ppc["pp_lo"]) | (ppc["observed"] > ppc["pp_hi"])]
        named = f" ({', '.join(out['element'])})" if 0 < len(out) <= 12 else ""
        rep.figures.append(("Posterior-predictive check", "Each element's observed value "
                            "(symbol) against the observations the posterior predicts for "
                            "it (bars: 50% and 90% intervals of replicated data, drawn "
                            "relative to their median). "
                            f"{len(out)} of {len(ppc)} elements fall outside their 90% "
                            f"interval{named}; about {0.1 * len(ppc):.0f} is what a model "
                            "that describes the data gives.",
                            lambda: plots.predictive_plot(ppc, title=title)))
    if draws is not None:
        key = "x" if any(f"x_{c}" in draws.columns for c in comps) else "w"
        wcols = {c: f"{key}_{c}" for c in comps if f"{key}_{c}" in draws.columns}
        if wcols:
            wd = draws[list(wcols.values())].rename(columns={v: k for k, v in wcols.items()})
            med = {c: float(np.median(wd[c])) for c in wcols}
            label = "mass fractions" if key == "x" else f"weights ({ref} basis)"
            rep.figures.append(("Building blocks", f"Posterior {label}: violins with "
                                "medians and 5-95% intervals.",
                                lambda: plots.weights_plot(med, draws=wd, basis=ref)))
        main = [c for c in (*vol_names, "lam", "cmf", "tau") if c in draws.columns]
        if len(wcols) > 1:
            main += list(wcols.values())[:2]
        if len(main) >= 2:
            rep.figures.append(("Pairwise posterior", "Main parameters: draws and marginals "
                                "(median and 5-95%).",
                                lambda: plots.pair_plot(draws, columns=main[:6])))
        chains = _chain_arrays(idata, [c for c in (*vol_names, "lam", "cmf", "tau")
                                       if c in draws.columns])
        if chains:
            rep.figures.append(("Traces and rank histograms", "Each chain's draws (left) and "
                                "the ranks of the pooled draws per chain (right; "
                                "λ_late: late accretion, mass fraction of the mantle; τ: "
                                "model scatter): mixed "
                                "chains overlap and give flat histograms (dotted: the flat "
                                "level; Vehtari et al. 2021).",
                                lambda: plots.trace_rank_plot(chains)))
        priors = meta.get("priors") or {}
        shown = {c: draws[c].to_numpy(float) for c in (*vol_names, "lam", "tau")
                 if c in draws.columns and c in priors}
        if shown:
            rep.figures.append(("Prior and posterior", "Posterior histograms against the "
                                "prior densities of the case (a posterior that repeats its "
                                "prior means the data say little about that parameter).",
                                lambda: plots.prior_posterior_plot(shown, priors)))
    _sample_isotope_figure(rep, idata, prov, comps)
    pdraws = _planet_draws(folder)
    if pdraws is not None:
        # the same 90% intervals as the posterior summary
        _planet_from_draws(rep, pdraws, meta, q=(5.0, 95.0),
                           skip=("core_mass_fraction",) if "core_mass_fraction" in post
                           else ())
    if (folder / "outliers.csv").exists():
        out = _read_csv(folder / "outliers.csv")
        if len(out):
            rep.tables.append(("Off-trend elements (posterior-predictive |z| > 3; p-value "
                               "in tail_probability)",
                               _table_html(out)))
    rep.limits.append("Credible intervals are conditional on the model and its priors; "
                      "the model-scatter term tau absorbs what the idealised model cannot "
                      "explain, and a Student-t likelihood keeps single anomalous elements "
                      "from dominating.")
    return rep


def _sample_isotope_figure(rep: Report, idata: Any, prov: dict[str, Any],
                           comps: list[str]) -> None:
    """The isotope figure of a posterior: each system's observed value with its window
    (+-2 posterior-median sigma_eff), the posterior's 90% interval and median of the
    predicted anomaly and, when the case file can still be read, the interval the
    hypothesis and each of its blocks reach (:func:`inversion.isotopes.figure_data`)."""
    post = getattr(idata, "posterior", None)
    obs = getattr(idata, "observed_data", None)
    if post is None or obs is None or "eps_pred" not in post.data_vars \
            or "eps_obs" not in obs.data_vars:
        return
    names = [str(n) for n in post["isotopes"].values]
    pred = np.asarray(post["eps_pred"].values, float).reshape(-1, len(names))
    sig = (np.asarray(post["eps_sigma"].values, float).reshape(-1, len(names))
           if "eps_sigma" in post.data_vars else None)
    values = np.asarray(obs["eps_obs"].values, float)
    systems, posterior = {}, {}
    for j, n in enumerate(names):
        half = 2.0 * float(np.median(sig[:, j])) if sig is not None else float("nan")
        systems[n] = {"value": float(values[j]), "sigma": half / 2.0, "half_width": half,
                      "window": "+-2 sigma_eff, posterior median"}
        lo, med, hi = np.percentile(pred[:, j], [5.0, 50.0, 95.0])
        posterior[n] = {"p5": float(lo), "median": float(med), "p95": float(hi)}
    if sig is None:
        return
    data: dict[str, Any] = {"systems": systems, "reachable": {}}
    case_file = prov.get("case_file")
    if case_file and Path(case_file).is_file() and comps:
        from .case import load_case
        from .isotopes import figure_data
        from .model import compile_problem

        try:
            p = compile_problem(load_case(case_file))
            if set(comps) <= set(p.components):
                data["reachable"] = figure_data(p.subset(comps))["reachable"]
        except InputError:
            rep.notes.append(f"isotope figure: the case file {case_file} no longer "
                             "compiles; the reachable intervals are left out")
    _isotope_figure(rep, data, posterior=posterior)


#: What users call the volatility parameters.
_VOL_NAMES = {"T0": "pivot temperature T0", "slope": "volatility slope",
              "log10_floor": "retention floor log10 r_min", "a": "power-law exponent a",
              "b": "power-law intercept b", "T50": "50% retention temperature T50",
              "width": "logistic width"}


def _vol_label(name: str, form: Any) -> str:
    """``volatility slope [dex/K] (kinked)``: the parameter with its unit and form."""
    from .volatility import FORMS

    unit = ""
    if form in FORMS and name in FORMS[form].params:
        u = FORMS[form].units[FORMS[form].params.index(name)]
        unit = "" if u == "1" else f" [{u}]"
    return f"{_VOL_NAMES.get(name, name)}{unit} ({form})"


def _form_of(names: list[str]) -> str | None:
    """The volatility form whose parameters are ``names`` (None when unclear)."""
    from .volatility import FORMS

    hits = [f for f, spec in FORMS.items() if set(spec.params) == set(names)]
    return hits[0] if len(hits) == 1 else None


def _interval_text(d: Any, scale: float = 1.0) -> tuple[str, str]:
    if isinstance(d, dict) and "median" in d:
        lo = d.get("q05", d.get("p5"))
        hi = d.get("q95", d.get("p95"))
        return (_fmt(d["median"] * scale),
                f"90% credible interval [{_fmt(lo * scale)}, {_fmt(hi * scale)}]"
                if lo is not None and hi is not None else "")
    return _fmt(d), ""


def _posterior_numbers(post: dict[str, Any], ref: str) -> list[tuple[str, str, str]]:
    """Key numbers from ``sample.json`` ``posterior`` (medians and 90% intervals)."""
    out = []
    for c, d in (post.get("mass_fractions") or {}).items():
        out.append((f"mass fraction of {c}", *_interval_text(d)))
    for c, d in (post.get("weights") or {}).items():
        out.append((f"weight of {c} ({ref} basis)", *_interval_text(d)))
    vol = post.get("volatility") or {}
    for k, d in vol.items():
        if k != "form":
            out.append((_vol_label(k, vol.get("form")), *_interval_text(d)))
    labels = {"late_accretion_fraction": "late accretion, fraction of mantle",
              "late_accretion_planet_fraction": "late accretion, fraction of planet",
              "core_mass_fraction": "core mass fraction",
              "tau_dex": "model scatter tau [dex]"}
    for k, label in labels.items():
        if k in post:
            out.append((label, *_interval_text(post[k])))
    return out


def _gate_lines(diag: dict[str, Any]) -> list[tuple[str, str, str]]:
    th = diag.get("thresholds") or {}
    out = []
    if "passed" in diag:
        out.append(("convergence gate", "passed" if diag["passed"] else "FAILED",
                    "R-hat <= 1.01, bulk ESS >= 400, no divergences (Vehtari et al. 2021)"))
    if "rhat_max" in diag:
        out.append(("largest R-hat", _fmt(diag["rhat_max"]),
                    f"threshold {th.get('rhat_max', 1.01)}; worst: "
                    f"{_user_name(diag.get('worst_rhat_parameter', 'n/a'))}"))
    if "ess_bulk_min" in diag:
        out.append(("smallest bulk ESS", _fmt(diag["ess_bulk_min"]),
                    f"threshold {th.get('ess_bulk_min', 400)}; worst: "
                    f"{_user_name(diag.get('worst_ess_parameter', 'n/a'))}"))
    if "divergences" in diag:
        out.append(("divergent transitions", str(diag["divergences"]),
                    f"threshold {th.get('divergences_max', 0)}"))
    known = {"passed", "rhat_max", "ess_bulk_min", "divergences", "thresholds",
             "worst_rhat_parameter", "worst_ess_parameter", "reference"}
    for k, v in diag.items():
        if k not in known:
            text = json.dumps(v) if isinstance(v, dict | list) else (
                _fmt(v) if isinstance(v, float) else str(v))
            out.append((k.replace("_", " "), text[:300], ""))
    return out


_TRANSFORMED = re.compile(r"^(.*?)_(interval|log|simplex|logodds|lowerbound|upperbound|"
                          r"ordered|circular|sumto1)__(.*)$")


def _user_name(name: Any) -> str:
    """A sampler-internal name (``T0_interval__``, ``w_simplex__[0]``) as users know it."""
    m = _TRANSFORMED.match(str(name))
    if not m:
        return str(name)
    return f"{m.group(1)} (on the sampler's unbounded scale)"


def _user_parameters(summary: pd.DataFrame) -> pd.DataFrame:
    """The summary without the sampler's unbounded-scale copies of the parameters (their
    convergence is part of the gate; users read the parameters themselves)."""
    name_col = next((c for c in ("parameter", "name", "variable", "Unnamed: 0")
                     if c in summary.columns), summary.columns[0])
    keep = ~summary[name_col].astype(str).str.match(_TRANSFORMED.pattern)
    return summary[keep].reset_index(drop=True)


def _summary_numbers(summary: pd.DataFrame) -> list[tuple[str, str, str]]:
    out = []
    name_col = next((c for c in ("parameter", "name", "variable", "Unnamed: 0")
                     if c in summary.columns), summary.columns[0])
    for _, r in summary.iterrows():
        centre = next((r[c] for c in ("median", "q50", "mean", "value") if c in r), None)
        lo = next((r[c] for c in ("q05", "p5", "p05", "hdi_5%", "lo", "hdi_3%", "p2.5")
                   if c in r), None)
        hi = next((r[c] for c in ("q95", "p95", "hdi_95%", "hi", "hdi_97%", "p97.5")
                   if c in r), None)
        interval = f"[{_fmt(lo)}, {_fmt(hi)}]" if lo is not None and hi is not None else (
            f"sd {_fmt(r['sd'])}" if "sd" in r else "")
        out.append((str(r[name_col]), _fmt(centre), interval))
    return out[:40]


def _draw_numbers(draws: pd.DataFrame) -> list[tuple[str, str, str]]:
    out = []
    for c in draws.columns:
        if c.startswith(("mu[", "log10D[")):
            continue
        v = draws[c].to_numpy(float)
        lo, med, hi = np.nanpercentile(v, [5, 50, 95])
        out.append((c, _fmt(med), f"90% credible interval [{_fmt(lo)}, {_fmt(hi)}]"))
    return out[:40]


def _load_idata(path: Path) -> Any:
    """The groups of an InferenceData netCDF file that the report reads.

    Read with xarray directly (importing ArviZ costs several seconds); groups that the
    file lacks are None.
    """
    if not path.exists():
        return None
    from types import SimpleNamespace

    import xarray as xr

    groups = {}
    for g in ("posterior", "observed_data", "posterior_predictive"):
        try:
            with xr.open_dataset(path, group=g) as ds:
                groups[g] = ds.load()
        except OSError as err:
            if g == "posterior":
                raise InputError(f"cannot read the posterior: {err}", file=str(path)) from err
            groups[g] = None
        except Exception as err:  # noqa: BLE001 - netCDF/HDF5 raise several kinds
            raise InputError(f"cannot read the posterior: {err}", file=str(path)) from err
    return SimpleNamespace(**groups)


def _chain_arrays(idata: Any, names: list[str]) -> dict[str, np.ndarray]:
    """Scalar parameters of the posterior as (chain, draw) arrays (for trace plots)."""
    post = getattr(idata, "posterior", None)
    if post is None:
        return {}
    return {n: np.asarray(post[n].values, dtype=float) for n in names
            if n in post.data_vars and post[n].ndim == 2}


def _posterior_draws(idata: Any) -> pd.DataFrame | None:
    """Flatten the posterior (chains x draws) into one column per scalar quantity.

    Vectors over components become ``w_<name>`` / ``x_<name>``; over isotopes
    ``eps_pred[<name>]``; the per-element model ``mu`` is left out (see
    :func:`_residuals_from_idata`).
    """
    post = getattr(idata, "posterior", None)
    if post is None:
        return None
    cols: dict[str, np.ndarray] = {}
    for name, da in post.data_vars.items():
        if name == "mu":
            continue
        arr = np.asarray(da.values, dtype=float)
        flat = arr.reshape(arr.shape[0] * arr.shape[1], -1)
        extra = [d for d in da.dims if d not in ("chain", "draw")]
        if not extra:
            cols[name] = flat[:, 0]
        elif len(extra) == 1 and flat.shape[1] <= 40:
            labels = [str(x) for x in da.coords[extra[0]].values]
            for j, lab in enumerate(labels):
                key = f"{name}_{lab}" if extra[0] == "components" else f"{name}[{lab}]"
                cols[key] = flat[:, j]
    return pd.DataFrame(cols) if cols else None


def _residuals_from_idata(idata: Any, prov: dict[str, Any]) -> pd.DataFrame | None:
    """Residual table from the posterior: observed y, the model ``mu`` (median, 5-95%)
    and the posterior-predictive spread as the scale of z."""
    import components

    try:
        mu = idata.posterior["mu"]
        obs = idata.observed_data["y_obs"]
    except (AttributeError, KeyError, TypeError):
        return None
    els = [str(e) for e in mu.coords["elements"].values]
    m = np.asarray(mu.values, float).reshape(-1, len(els))
    lo, med, hi = np.percentile(m, [5, 50, 95], axis=0)
    y = np.asarray(obs.values, float)
    scale = np.full(len(els), np.nan)
    try:
        pp = np.asarray(idata.posterior_predictive["y_obs"].values, float).reshape(-1, len(els))
        scale = pp.std(axis=0)
    except (AttributeError, KeyError, TypeError):
        pass
    col = f"tc50_{prov.get('condensation_table', 'lodders2003')}"
    props = components.elements()
    tc = props.reindex(els)[col if col in props.columns else "tc50_lodders2003"].to_numpy()
    z = (y - med) / scale
    flag = np.where(np.abs(z) > 3, np.where(z > 0, "above model", "below model"), "")
    return pd.DataFrame({"element": els, "tc50": tc, "observed": y, "model": med,
                         "sigma": scale, "z": z, "fitted": True, "flag": flag,
                         "model_lo": lo, "model_hi": hi})


def _predictive_table(idata: Any, prov: dict[str, Any]) -> pd.DataFrame | None:
    """Observed values and the posterior-predictive 5, 25, 50, 75, 95% points per element
    (dex), from the replicated observations ``y_obs`` of the posterior."""
    import components

    try:
        pp = idata.posterior_predictive["y_obs"]
        obs = idata.observed_data["y_obs"]
    except (AttributeError, KeyError, TypeError):
        return None
    dim = next((d for d in pp.dims if d not in ("chain", "draw")), None)
    if dim is None:
        return None
    els = [str(e) for e in pp.coords[dim].values]
    rep = np.asarray(pp.transpose("chain", "draw", dim).values, float).reshape(-1, len(els))
    q = np.percentile(rep, [5, 25, 50, 75, 95], axis=0)
    col = f"tc50_{prov.get('condensation_table', 'lodders2003')}"
    props = components.elements()
    tc = props.reindex(els)[col if col in props.columns else "tc50_lodders2003"].to_numpy()
    return pd.DataFrame({"element": els, "tc50": tc,
                         "observed": np.asarray(obs.values, float),
                         "pp_lo": q[0], "pp_q25": q[1], "pp_q50": q[2], "pp_q75": q[3],
                         "pp_hi": q[4]})


def _planet_draws(folder: Path) -> pd.DataFrame | None:
    for name in ("planet_draws.parquet", "planet_draws.csv"):
        path = folder / name
        if path.exists():
            if path.suffix == ".csv":
                return _read_csv(path)
            try:
                return pd.read_parquet(path)
            except Exception as err:  # noqa: BLE001
                raise InputError(f"cannot read planet draws: {' '.join(str(err).split())}",
                                 file=str(path)) from None
    return None


_RATIO_COLS = ("Mg/Si_bulk", "Fe/Si_bulk", "Fe/Mg_bulk", "Ca/Al_bulk", "Mg/Si_mantle",
               "Mg#_mantle", "Ca/Al_mantle")


def _draw_column(name: str) -> tuple[str, str, str] | None:
    """(reservoir, species, unit) of a planet-draws column, or None for other columns.

    Columns as the hand-off writes them: ``core_mass_fraction``, ``mantle_SiO2_wt``,
    ``mantle_U_ppm``, ``core_Fe_wt``, ``bulk_Mg_wt`` and the molar ratio names.
    """
    if name in ("cmf", "core_mass_fraction"):
        return ("planet", "core_mass_fraction", "kg/kg")
    if name in _RATIO_COLS:
        return ("ratio", name, "molar")
    for res in ("mantle", "core"):
        for suffix, unit in (("_wt", "wt%"), ("_ppm", "ppm")):
            if name.startswith(res + "_") and name.endswith(suffix):
                return (res, name[len(res) + 1:-len(suffix)], unit)
    return None


def _quantity_name(key: str) -> str:
    """``Mg/Si (bulk, molar)``, ``Mg# (mantle, molar)``, ``core mass fraction``: a planet
    quantity's key as readers know it."""
    if key in ("core_mass_fraction", "cmf"):
        return "core mass fraction"
    if key in _RATIO_COLS and "_" in key:
        ratio, where = key.rsplit("_", 1)
        return f"{ratio} ({where}, molar)"
    return key


def _planet_from_draws(rep: Report, draws: pd.DataFrame, meta: dict[str, Any], *,
                       q: tuple[float, float] = (2.5, 97.5), skip: tuple[str, ...] = ()
                       ) -> None:
    """Whole-planet figure, numbers and heat history from a wide table of planet draws.

    ``q`` are the percentiles of the interval shown; key numbers named in ``skip`` are
    left out (already reported from another file).
    """
    from . import plots

    width = f"{q[1] - q[0]:g}%"

    rows = []
    for c in draws.columns:
        where = _draw_column(str(c))
        if where is None:
            continue
        v = pd.to_numeric(draws[c], errors="coerce").dropna().to_numpy()
        if not v.size:
            continue
        lo, med, hi = np.percentile(v, [q[0], 50, q[1]])
        rows.append((*where[:2], med, where[2], lo, hi))
    if not rows:
        return
    planet = pd.DataFrame(rows, columns=["reservoir", "species", "value", "unit", "lo", "hi"])
    rep.figures.append(("Whole planet", f"Medians with {width} central intervals "
                        f"({q[0]:g}-{q[1]:g}%) over the draws.",
                        lambda: plots.planet_plot(planet)))
    for _, r in planet[planet["reservoir"].isin(["planet", "ratio"])].iterrows():
        if r["species"] in skip:
            continue
        rep.key_numbers.append((_quantity_name(str(r["species"])), _fmt(r["value"]),
                                f"{width} interval [{_fmt(r['lo'])}, {_fmt(r['hi'])}]"))
    from .plots import MAJOR_OXIDE_MIN_WT

    mantle = planet["reservoir"] == "mantle"
    majors = planet[~(mantle & (((planet["unit"] == "wt%")
                                 & (planet["value"].astype(float) < MAJOR_OXIDE_MIN_WT))
                                | planet["unit"].isin(["ppm", "ppb"])))]
    rep.tables.append((f"Planet (medians and {width} intervals over the draws; mantle "
                       "majors as oxide wt%)", _table_html(majors)))
    trace = mantle_trace_table(planet)
    if len(trace):
        rep.tables.append((f"Mantle trace elements (medians and {width} intervals; ppm = "
                           "µg/g, ppb = ng/g)", _table_html(trace)))
    heat_cols = [c for c in draws.columns if str(c).startswith("heat_W_per_kg_")
                 and str(c).endswith("Gyr")]
    if heat_cols:
        t = np.array([float(str(c)[len("heat_W_per_kg_"):-3]) for c in heat_cols])
        order = np.argsort(t)
        vals = draws[[heat_cols[i] for i in order]].to_numpy(float) * 1e12
        lo, med, hi = np.nanpercentile(vals, [q[0], 50, q[1]], axis=0)
        heat = pd.DataFrame({"time_Gyr_ago": t[order], "total": med, "total_lo": lo,
                             "total_hi": hi})
        rep.figures.append(("Radiogenic heat production", f"Per kg of mantle, median and "
                            f"{width} interval over the draws (Turcotte & Schubert 2014, "
                            "Table 4.2).",
                            lambda: plots.heat_plot(heat, unit="pW/kg of mantle",
                                                    interval_label=f"{width} interval")))
        rep.key_numbers.append(("mantle heat production today [pW/kg]", _fmt(med[0]),
                                f"{width} interval [{_fmt(lo[0])}, {_fmt(hi[0])}]"))
        _add_source(rep, "turcotteschubert2014")


# --------------------------------------------------------------------------- star / batch
def _stat_text(st: Any) -> tuple[str, str]:
    if isinstance(st, dict) and "median" in st:
        lo = st.get("p2.5", st.get("p16"))
        hi = st.get("p97.5", st.get("p84"))
        width = "95%" if "p2.5" in st else "68%"
        return _fmt(st["median"]), f"{width} interval [{_fmt(lo)}, {_fmt(hi)}]"
    return _fmt(st), ""


def _iron_text(iron: dict[str, Any]) -> str:
    """``mantle FeO 8 wt% (Earth-like)`` or ``ΔIW -2 (...)``: the iron split in words."""
    parts = []
    if iron.get("mantle_FeO_wt") is not None:
        parts.append(f"mantle FeO {_fmt(iron['mantle_FeO_wt'])} wt%")
    if iron.get("dIW") is not None:
        parts.append(f"ΔIW {_fmt(iron['dIW'])}")
    rest = {k: v for k, v in iron.items() if k not in ("mantle_FeO_wt", "dIW", "label")}
    if rest:
        parts.append(_plain_value(rest))
    text = "; ".join(parts) or "n/a"
    return f"{text} ({iron['label']})" if iron.get("label") else text


def _star_report(folder: Path) -> Report:
    meta = _read_json(folder / "planet.json")
    rep = Report(title=meta.get("title", meta.get("star_id", folder.name)), kind="star",
                 folder=str(folder), provenance=meta.get("provenance") or {})
    rep.key_numbers.append(("star", str(meta.get("star_id", "?")),
                            f"{meta.get('n_draws', '?')} Monte Carlo draws"))
    dv = meta.get("devolatilisation") or {}
    if dv:
        from .cli import _unit

        pars = ", ".join(f"{k} = {_fmt(v)}{_unit(str(dv.get('form', '')), k)}"
                         for k, v in (dv.get("parameters") or {}).items())
        rep.key_numbers.append(("devolatilisation pattern", str(dv.get("label", "")),
                                f"{dv.get('form', '')}: {pars}"))
    iron = meta.get("iron_split") or {}
    if iron:
        rep.key_numbers.append(("iron split", _iron_text(iron),
                                ""))
    draws = _planet_draws(folder)
    if draws is not None:
        _planet_from_draws(rep, draws, meta)
    else:
        if "core_mass_fraction" in meta:
            rep.key_numbers.append((_quantity_name("core_mass_fraction"), *_stat_text(meta[
                "core_mass_fraction"])))
        for k, st in (meta.get("molar_ratios") or {}).items():
            rep.key_numbers.append((_quantity_name(k), *_stat_text(st)))
    xh = meta.get("star_abundances_dex") or {}
    if xh:
        tab = pd.DataFrame([{"element": k, "[X/H] dex": v.get("value"),
                             "1-sigma dex": v.get("uncertainty")} for k, v in xh.items()])
        rep.tables.append(("Stellar abundances used", _table_html(tab)))
    flags = meta.get("flags") or {}
    for k, v in flags.items():
        if isinstance(v, list) and v:
            rep.diagnostics.append((k.replace("_", " "), ", ".join(map(str, v)),
                                    str(flags.get(f"{k}_rule", ""))))
        elif not isinstance(v, list) and not k.endswith("_rule"):
            rep.diagnostics.append((k.replace("_", " "), _fmt(v), ""))
    if meta.get("caution"):
        rep.notes.append(str(meta["caution"]))
    rep.limits.append("Only the stellar abundance uncertainties are propagated; the solar "
                      "reference and the devolatilisation pattern are held fixed. "
                      "Condensation temperatures depend on the disk's composition (C/O, "
                      "Mg/Si), so an Earth-calibrated pattern is an assumption for another "
                      "system.")
    return rep


def _batch_report(folder: Path) -> Report:
    from . import plots

    meta = _read_json(folder / "summary.json") if (folder / "summary.json").exists() else {}
    run = _read_json(folder / "run.json") if (folder / "run.json").exists() else {}
    rep = Report(title=run.get("title", f"catalogue {folder.name}"), kind="batch",
                 folder=str(folder), provenance=run.get("provenance") or run)
    pdir = folder / "parts"
    if not pdir.is_dir() or not any(pdir.glob("part-*.parquet")):
        raise InputError("batch folder holds no Parquet parts (parts/part-*.parquet)",
                         file=str(folder))
    try:
        table = pd.read_parquet(pdir)
    except Exception as err:  # noqa: BLE001 - pyarrow raises several kinds
        raise InputError(f"cannot read the batch parts: {err}", file=str(folder)) from err
    ok = table[table["status"] == "ok"] if "status" in table.columns else table
    rep.key_numbers.append(("stars", str(len(table)),
                            f"{len(ok)} done, {int(meta.get('stars_failed', 0))} failed"
                            + ("" if meta.get("complete", True) else "; run incomplete")))
    wanted = {"core_mass_fraction": "CMF", "Mg/Si_bulk": "Mg/Si (bulk, molar)",
              "Fe/Mg_bulk": "Fe/Mg (bulk, molar)", "Fe/Si_bulk": "Fe/Si (bulk, molar)",
              "Mg#_mantle": "Mg# (mantle)"}
    dist = pd.DataFrame(index=ok.index)
    for col, label in wanted.items():
        c = f"{col}_median" if f"{col}_median" in ok.columns else col
        if c in ok.columns:
            v = pd.to_numeric(ok[c], errors="coerce")
            dist[label] = v
            q = np.nanpercentile(v, [5, 50, 95]) if v.notna().any() else [np.nan] * 3
            rep.key_numbers.append((f"{label}, median star", _fmt(q[1]), f"5-95% across the "
                                    f"catalogue [{_fmt(q[0])}, {_fmt(q[2])}]"))
    if dist.shape[1]:
        cols = list(dist.columns)[:3]
        rep.figures.append(("Across the catalogue", "Distributions of each star's median "
                            "core mass fraction and molar ratios.",
                            lambda: plots.distribution_plot(dist, columns=cols)))
    for k in ("complete", "stars_done", "stars_failed", "partitions", "partitions_skipped",
              "seconds_this_run"):
        if k in meta:
            rep.diagnostics.append((k.replace("_", " "), _fmt(meta[k]) if isinstance(
                meta[k], float) else str(meta[k]), ""))
    if (folder / "failed.csv").exists():
        failed = _read_csv(folder / "failed.csv")
        if len(failed):
            rep.tables.append(("Stars that failed", _table_html(failed.head(50))))
    show = [c for c in ("star_id", "status", "core_mass_fraction_median",
                        "Mg/Si_bulk_median", "Fe/Mg_bulk_median", "solar_ratio")
            if c in table.columns]
    rep.tables.append(("Stars (first 50)", _table_html(table[show].head(50))))
    rep.limits.append("Each star's planet uses the same devolatilisation pattern and iron "
                      "split; the spread across the catalogue reflects the stellar "
                      "abundances only.")
    return rep


def _compare_report(folder: Path) -> Report:
    from . import plots

    table = _read_csv(folder / "comparison.csv")
    meta = (_read_json(folder / "comparison.json") if (folder / "comparison.json").exists()
            else {})
    rep = Report(title=f"PSIS-LOO comparison ({folder.name})", kind="compare",
                 folder=str(folder), provenance=meta.get("provenance") or {})
    for label, els in (meta.get("left_out") or {}).items():
        rep.notes.append(f"Compared on the {len(meta.get('shared_elements') or [])} elements "
                         f"all runs fitted; left out of {label}: {', '.join(els)}.")
    if "elpd_loo" not in table.columns:
        raise InputError("comparison table without an elpd_loo column",
                         file=str(folder / "comparison.csv"), field="elpd_loo")
    best = table.sort_values("elpd_loo", ascending=False).iloc[0]
    rep.key_numbers.append(("runs compared", str(len(table)), ""))
    rep.key_numbers.append(("best by PSIS-LOO", str(best.get("components", best.get("run"))),
                            f"elpd_loo {_fmt(best['elpd_loo'])}"))
    for _, r in table.iterrows():
        if "log10_bayes_factor_vs_best" in table.columns and pd.notna(
                r.get("log10_bayes_factor_vs_best")):
            rep.key_numbers.append((f"log10 Bayes factor vs best: {r.get('components')}",
                                    _fmt(r["log10_bayes_factor_vs_best"]), "SMC evidence"))
        if pd.notna(r.get("reading")) and r.get("reading"):
            rep.key_numbers.append((f"{r.get('components')}", _fmt(r.get("elpd_diff")),
                                    str(r["reading"])))
        if str(r.get("warning", "")).lower() in ("true", "1"):
            high = r.get("pareto_k_high")
            which = f" for {high}" if isinstance(high, str) and high else ""
            rep.diagnostics.append((
                f"PSIS warning: {r.get('components')}", f"Pareto k > 0.7{which}",
                "the leave-one-out estimate of these elements is unreliable: each dominates "
                "its own fit (often an element off the trend); refit without it and score "
                "it exactly, or exclude it in every run, before reading the differences "
                "(Vehtari, Gelman & Gabry 2017)"))
        if "gate" in table.columns and str(r.get("gate")) != "passed":
            rep.diagnostics.append((f"gate: {r.get('components')}", str(r.get("gate")),
                                    "this run failed its convergence gate"))
    shown = table.assign(status="optimal")
    rep.figures.append(("Hypothesis ranking (PSIS-LOO)", "Difference in expected log "
                        "predictive density from the best run (error bars: standard error "
                        "of the difference).",
                        lambda: plots.ranking_plot(shown, criterion="elpd_loo")))
    first = [c for c in ("rank", "components", "elpd_loo", "se", "elpd_diff", "dse",
                         "within_uncertainty", "pareto_k_max", "pareto_k_high", "reading",
                         "gate") if c in table.columns]
    rest = [c for c in table.columns if c not in first and c not in ("scale", "warning")]
    rep.tables.append(("Comparison (elpd in nats; dse: standard error of the difference)",
                       _table_html(table[first + rest])))
    rep.limits.append("PSIS-LOO compares runs fitted to the same target and elements; "
                      "it says which predicts held-out elements best, not whether any is "
                      "adequate.")
    return rep


_BUILDERS: dict[str, Callable[[Path], Report]] = {
    "fit": _fit_report, "rank": _rank_report, "sample": _sample_report,
    "star": _star_report, "batch": _batch_report, "compare": _compare_report,
    "sensitivity": lambda folder: _sensitivity_report(folder),
}


def _sensitivity_report(folder: Path) -> Report:
    from .sensitivity import sensitivity_report

    return sensitivity_report(folder)


# --------------------------------------------------------------------------- HTML
_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:1180px;margin:2em auto;
padding:0 1em;color:#1d1d1d;line-height:1.45}
h1{font-size:1.6em;margin-bottom:.1em}h2{border-bottom:2px solid #0072B2;padding-bottom:.15em;
margin-top:1.8em;font-size:1.25em}
.meta{color:#555;font-size:.9em}table{border-collapse:collapse;font-size:.86em;margin:.5em 0;
display:block;max-width:100%;overflow-x:auto}
td,th{border:1px solid #ddd;padding:.25em .55em;text-align:left;vertical-align:top;
overflow-wrap:break-word}
th{background:#f2f6fa}tr:nth-child(even) td{background:#fafafa}
figure{margin:1.2em 0}figure img{max-width:100%;height:auto;box-sizing:border-box;
border:1px solid #eee}
figcaption{font-size:.88em;color:#444}.note{background:#fff8e5;border-left:4px solid #E69F00;
padding:.4em .8em}nav a{margin-right:1em}code{background:#f4f4f4;padding:0 .2em}
"""


def _table_html(df: pd.DataFrame) -> str:
    def cell(v: Any) -> str:
        if isinstance(v, float | np.floating):
            return html.escape(_fmt(v))
        return html.escape(str(v))

    head = "".join(f"<th>{html.escape(str(c))}</th>" for c in df.columns)
    body = "".join("<tr>" + "".join(f"<td>{cell(v)}</td>" for v in row) + "</tr>"
                   for row in df.itertuples(index=False))
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _rows(items: list[tuple[str, str, str]], head: tuple[str, str, str]) -> str:
    body = "".join("<tr>" + "".join(f"<td>{html.escape(_plain(str(x)))}</td>" for x in it)
                   + "</tr>" for it in items)
    hd = "".join(f"<th>{h}</th>" for h in head)
    return f"<table><thead><tr>{hd}</tr></thead><tbody>{body}</tbody></table>"


def render_html(rep: Report, *, figure_dir: Path | None = None) -> str:
    """Render a report as one self-contained HTML page (figures as base64 PNG).

    Parameters
    ----------
    rep : Report
    figure_dir : Path, optional
        Also write each figure as PNG and SVG into this folder.
    """
    import matplotlib.pyplot as plt

    from . import plots

    esc = html.escape
    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
             f"<title>{esc(rep.title)} - planetmix report</title><style>{_CSS}</style>"
             "</head><body>"]
    prov = rep.provenance or {}
    created = datetime.now(UTC).isoformat(timespec="seconds")
    from .output import package_version

    written_by = (f"result written by planetmix {esc(str(prov['planetmix_version']))} · "
                  if prov.get("planetmix_version") else "")
    parts.append(f"<h1>{esc(rep.title)}</h1><p class='meta'>planetmix {esc(rep.kind)} result "
                 f"· folder <code>{esc(rep.folder)}</code> · {written_by}report written "
                 f"{created} by planetmix {esc(package_version())}</p>")
    parts.append("<nav><a href='#key-numbers'>Key numbers</a><a href='#figures'>Figures</a>"
                 "<a href='#diagnostics'>Diagnostics</a><a href='#provenance'>Provenance</a>"
                 "<a href='#limits'>Limits of the model</a></nav>")
    parts.append("<h2 id='key-numbers'>Key numbers</h2>")
    parts.append(_rows(rep.key_numbers, ("quantity", "value", "uncertainty / note"))
                 if rep.key_numbers else "<p>none</p>")
    if rep.findings:
        parts.append("<h3>Findings</h3><ul>" + "".join(f"<li>{esc(x)}</li>"
                                                       for x in rep.findings) + "</ul>")
    parts.append("<h2 id='figures'>Figures</h2>")
    for i, (name, caption, make) in enumerate(rep.figures, start=1):
        try:
            fig = make() if callable(make) else make
        except Exception as err:  # noqa: BLE001 - a figure that fails is reported, not fatal
            parts.append(f"<p class='note'>Figure {i} ({esc(name)}) could not be drawn: "
                         f"{esc(str(err))}</p>")
            continue
        png = base64.b64encode(plots.png_bytes(fig)).decode("ascii")
        if figure_dir is not None:
            stem = "".join(ch if ch.isalnum() else "_" for ch in name.lower()).strip("_")
            plots.save_figure(fig, figure_dir / f"{i:02d}_{stem}")
        plt.close(fig)
        parts.append(f"<figure><img alt='{esc(name)}' src='data:image/png;base64,{png}'>"
                     f"<figcaption><b>Figure {i}. {esc(name)}.</b> {esc(caption)}"
                     "</figcaption></figure>")
    for name, tab in rep.tables:
        parts.append(f"<h3>{esc(name)}</h3>{tab}")
    parts.append("<h2 id='diagnostics'>Diagnostics</h2>")
    parts.append(_rows(rep.diagnostics, ("check", "value", "meaning"))
                 if rep.diagnostics else "<p>none recorded</p>")
    for n in rep.notes:
        parts.append(f"<p class='note'>{esc(_plain(n))}</p>")
    parts.append("<h2 id='provenance'>Provenance</h2>")
    parts.append(_provenance_html(prov))
    parts.append("<h2 id='limits'>Limits of the model</h2><ul>"
                 + "".join(f"<li>{esc(x)}</li>" for x in rep.limits) + "</ul>")
    parts.append("<p class='meta'>Self-contained: this file loads nothing from the network."
                 "</p></body></html>")
    return "\n".join(parts)


_PYLIST = re.compile(r"\[((?:'[^']*'(?:, )?)+)\]")


def _plain(text: str) -> str:
    """Python list reprs in a message (``['Te', 'Se']``) as plain words (``Te, Se``)."""
    return _PYLIST.sub(lambda m: m.group(1).replace("'", ""), str(text))


def _plain_value(v: Any) -> str:
    """A provenance value as words: ``key value; key value`` for mappings, no JSON."""
    if isinstance(v, dict):
        return "; ".join(f"{str(k).replace('_', ' ')} {_plain_value(x)}" for k, x in v.items())
    if isinstance(v, list | tuple):
        return ", ".join(_plain_value(x) for x in v)
    if v is None or isinstance(v, float):
        return _fmt(v)
    return _plain(str(v))


def _provenance_html(prov: dict[str, Any]) -> str:
    esc = html.escape
    if not prov:
        return ("<p>This result folder holds no provenance record (versions, tables, "
                "settings): it was written by hand or by an older planetmix.</p>")
    rows = []
    for k in ("planetmix_version", "created_utc", "python", "case_file", "target_table",
              "reference_element", "condensation_table", "seed", "sampler"):
        if k in prov:
            rows.append((k.replace("_", " "), _plain_value(prov[k]), ""))
    if prov.get("packages"):
        rows.append(("packages", ", ".join(f"{k} {v}" for k, v in prov["packages"].items()),
                     ""))
    if prov.get("reference_tables"):
        rows.append(("reference tables",
                     ", ".join(dict.fromkeys(map(str, prov["reference_tables"]))), ""))
    for name, info in (prov.get("components") or {}).items():
        rows.append((f"component {name}", f"{info.get('file', '')}: "
                     f"{info.get('description', '')}",
                     f"sources {', '.join(info.get('sources', []))}; "
                     f"{info.get('recalled_values', 0)} values typed from memory"))
    other = {k: v for k, v in prov.items() if k not in {
        "planetmix_version", "created_utc", "python", "case_file", "target_table",
        "reference_element", "condensation_table", "packages", "reference_tables",
        "components", "sources", "seed", "sampler"}}
    for k, v in other.items():
        note = ""
        if isinstance(v, dict) and v and all(isinstance(x, int | float) for x in v.values()):
            text = ", ".join(f"{a} {_fmt(b, 3)}" for a, b in v.items() if b)
            if any(not b for b in v.values()):
                note = "not listed: 0" + (" (Fe: set by the iron split)"
                                          if k == "partition_coefficients" else "")
        elif isinstance(v, list) and all(isinstance(x, str | int | float) for x in v):
            text = ", ".join(map(str, v))
        else:
            text = _plain_value(v)
        rows.append((k.replace("_", " "), text[:1500] + ("..." if len(text) > 1500 else ""),
                     note))
    out = _rows(rows, ("item", "value", "note"))
    src = _sources_html(prov)
    if src:
        out += "<h3>Sources</h3><ol>" + "".join(f"<li>{esc(s)}</li>" for s in src) + "</ol>"
    return out


def build_report(folder: str | Path, *, out: str | Path | None = None,
                 figures: bool = False) -> Path:
    """Write the HTML report of a result folder.

    Parameters
    ----------
    folder : str or Path
        A result folder of ``planetmix fit``, ``rank``, ``sample``, ``compare``, ``star``
        or ``batch``.
    out : str or Path, optional
        The HTML file (default ``folder/report.html``). Written atomically.
    figures : bool
        Also write each figure as PNG and SVG into ``folder/figures/``.

    Returns
    -------
    Path
        The report file.

    Raises
    ------
    InputError
        When the folder is not a planetmix result ("unknown result folder").
    """
    folder = Path(folder)
    kind = detect_kind(folder)
    fig_dir = None
    try:
        rep = _BUILDERS[kind](folder)
        if figures:
            fig_dir = folder / "figures"
            fig_dir.mkdir(exist_ok=True)
        text = render_html(rep, figure_dir=fig_dir)
    except (KeyError, TypeError, AttributeError, ValueError, IndexError, OverflowError,
            ZeroDivisionError) as err:
        # The result files passed the door (readable, UTF-8, valid JSON/CSV) but a value
        # inside is missing or of the wrong kind: the folder was damaged or edited
        # after planetmix wrote it. A folder planetmix wrote never gets here (the report
        # tests build reports from real runs of every command).
        what = " ".join(f"{type(err).__name__}: {err}".split())[:160]
        raise InputError(f"the {kind} result in this folder is damaged or was edited "
                         f"({what}); rerun the command that wrote it", file=str(folder)
                         ) from None
    target = Path(out) if out is not None else folder / "report.html"
    from .output import atomic_file

    # written beside the target and renamed in place; a killed run's temporary file is
    # removed by the next report written there
    with atomic_file(target) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return target
