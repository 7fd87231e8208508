"""Sensitivity of a case's conclusions to the reference tables (``planetmix sensitivity``).

The case is fitted once as given (the baseline) and once per alternative table the library
offers, each alternative changing one thing:

``CI``
    every CI building block and a CI late component replaced by the second CI compilation
    (``CI_PO14``, Palme & O'Neill 2014 via pyrolite) instead of Lodders (2003);
``BSE``
    a library silicate-reference target replaced by the other library estimate(s)
    (McDonough & Sun 1995 <-> Palme & O'Neill 2014), same reference element and the same
    default uncertainty for rows without one;
``Tc``
    the other 50% condensation-temperature table (elements without a value there leave
    the mass balance), and that table where it gives a value with the case's own
    elsewhere;
``partition``
    every core-mantle partition coefficient moved up, then down, by its stated log10
    spread (the partition table's own uncertainty);
``imputation``
    elements some candidate lacks left out of the fit instead of imputed.

Each run is the convex fit of all candidates together (as ``planetmix fit``; the curvature
intervals are skipped to keep it cheap), followed by the class test of
:func:`inversion.findings.class_test` (one nested fit on the blocks the run uses; skipped
with ``--no-class-test``). The conclusions compared are: the best hypothesis (the blocks
the all-candidates fit gives a weight of at least :data:`HYPOTHESIS_MIN_WEIGHT`; a ranking
of every subset per run is not made), the weights, T0 and slope, the late-accretion
fraction, the core mass fraction, the off-trend elements (|z| > 3) and the class test's
significance and verdict. A conclusion "changes" when it moves by more than the thresholds
of :data:`CHANGE_THRESHOLDS` (our choice, stated in the output) or, for the best
hypothesis, the dominant block, the off-trend elements and the class-test verdict, when it
differs at all. ``planetmix report DIR`` (and the command itself) writes the report page
``report.html`` of the result folder (:func:`sensitivity_report`).
"""

from __future__ import annotations

import argparse
from collections.abc import Callable
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

import components

from .case import CONDENSATION_TABLES, Case, read_target
from .cli import EXIT_OK, register
from .exceptions import InputError
from .model import Problem, compile_problem

__all__ = ["Variant", "variants", "run_sensitivity", "spread_table", "categorical_spread",
           "sensitivity_plot", "sensitivity_report", "CHANGE_THRESHOLDS", "TABLES",
           "HYPOTHESIS_MIN_WEIGHT"]

#: What a sensitivity run can vary (the ``--vary`` choices).
TABLES = ("CI", "BSE", "Tc", "partition", "imputation")
#: A quantity "changes" when it moves by more than this from the baseline (our choice).
CHANGE_THRESHOLDS = {"weight": 0.10, "T0": 50.0, "slope_rel": 0.25,
                     "late_accretion_fraction": 0.002, "core_mass_fraction": 0.01}
#: A block is part of a run's best hypothesis from this weight (reference-element basis; our
#: choice).
HYPOTHESIS_MIN_WEIGHT = 0.01
#: Alternative CI compilation offered by the library.
ALT_CI = "CI_PO14"


@dataclass(frozen=True)
class Variant:
    """One alternative: which table, which choice, and how it is applied."""

    name: str
    table: str
    choice: str
    case: Case
    transform: Callable[[Problem], Problem] | None = None
    fit_imputed: bool = True


def _library_silicates() -> dict[str, Path]:
    return {Path(components.load(n).path).name: Path(components.load(n).path)
            for n in components.available("silicate_reference")}


def _swap_target(case: Case, path: Path) -> Case:
    t = case.target
    rel = (t.uncertainty / t.composition)[list(t.uncertainty_defaulted)]
    pct = float(np.nanmedian(rel) * 100) if len(rel) else None
    comp, unc, defaulted = read_target(path, reference_element=t.reference_element,
                                       default_uncertainty_pct=pct)
    return replace(case, target=replace(t, composition=comp, uncertainty=unc, path=str(path),
                                        uncertainty_defaulted=tuple(defaulted)))


def _scale_D(sign: float) -> Callable[[Problem], Problem]:
    def f(p: Problem) -> Problem:
        D = np.where(p.D > 0, p.D * 10.0 ** (sign * p.D_spread), p.D)
        return replace(p, D=D)
    return f


def _tc_where_given(table: str) -> Callable[[Problem], Problem]:
    def f(p: Problem) -> Problem:
        other = components.elements()[CONDENSATION_TABLES[table]]
        alt = np.array([other.get(e, np.nan) for e in p.elements], dtype=float)
        return replace(p, tc=np.where(np.isfinite(alt), alt, p.tc))
    return f


def variants(case: Case, vary: tuple[str, ...] = TABLES) -> list[Variant]:
    """The baseline and every alternative the library offers for this case.

    Examples
    --------
    >>> from inversion.case import load_case
    >>> vs = variants(load_case("case_studies/earth/case.toml"))
    >>> sorted({v.table for v in vs}) == sorted(["baseline", *TABLES])
    True
    """
    out = [Variant("baseline", "baseline", "as given", case)]
    if "CI" in vary:
        alt = components.load(ALT_CI)
        cands = tuple(alt if c.name == "CI" else c for c in case.candidates)
        late = case.late_component
        late = alt if late is not None and late.name == "CI" else late
        if cands != case.candidates or late is not case.late_component:
            out.append(Variant(f"CI={ALT_CI}", "CI", ALT_CI,
                               replace(case, candidates=cands, late_component=late)))
    if "BSE" in vary:
        lib = _library_silicates()
        here = Path(case.target.path).name
        if here in lib:
            for name, path in lib.items():
                if name != here:
                    label = read_header_name(path)
                    out.append(Variant(f"BSE={label}", "BSE", label, _swap_target(case, path)))
    if "Tc" in vary:
        for table in CONDENSATION_TABLES:
            if table != case.condensation_table:
                out.append(Variant(f"Tc={table}", "Tc", table,
                                   replace(case, condensation_table=table)))
                # the other table where it gives a value, the case's own elsewhere (a
                # partial table, such as wood2019's 15 elements, can still be tested)
                out.append(Variant(f"Tc={table} where given", "Tc",
                                   f"{table}, else {case.condensation_table}", case,
                                   _tc_where_given(table)))
    if "partition" in vary:
        out.append(Variant("D=+1 spread", "partition", "+1 log10 spread", case, _scale_D(1.0)))
        out.append(Variant("D=-1 spread", "partition", "-1 log10 spread", case, _scale_D(-1.0)))
    if "imputation" in vary:
        out.append(Variant("no imputed elements", "imputation", "not fitted", case,
                           fit_imputed=False))
    return out


def read_header_name(path: Path) -> str:
    """Library name of a composition file (its ``# name:`` header)."""
    from components._tables import read_header

    return read_header(path).get("name", path.stem)


def _row(v: Variant, p: Problem, r: Any, *, class_test: bool = False) -> dict[str, Any]:
    row: dict[str, Any] = {"variant": v.name, "table": v.table, "choice": v.choice,
                           "status": r.status, "n_elements": r.n_elements, "chi2": r.chi2}
    # the alternative CI stands in for CI: its weight is reported in CI's column
    weights = {("CI" if v.table == "CI" and name == ALT_CI else name): w
               for name, w in r.weights.items()}
    for name, w in weights.items():
        row[f"w_{name}"] = w
    row["dominant"] = max(weights, key=weights.get) if weights else ""
    row["best_hypothesis"] = " + ".join(
        n for n in sorted(weights, key=lambda n: -weights[n])
        if weights[n] >= HYPOTHESIS_MIN_WEIGHT)
    for k, val in r.volatility.items():
        row[k] = val
    row["late_accretion_fraction"] = r.late_accretion_fraction
    row["core_mass_fraction"] = r.core_mass_fraction
    res = r.residuals
    off = res[(res["fitted"]) & (res["flag"].isin(["above model", "below model"]))]
    row["off_trend"] = " ".join(sorted(off["element"]))
    if class_test:
        from .findings import class_test as run_class_test

        ct = run_class_test(p, r)
        row["class_test"] = ct.get("status", "not run")
        if ct.get("status") == "done":
            row["class_test_sigma"] = ct["significance_sigma"]
            row["class_test_difference"] = ct["slope_difference_dex_per_1000K"]
            row["class_test_differ"] = bool(ct["differ"])
    return row


def run_sensitivity(case: Case, *, vary: tuple[str, ...] = TABLES,
                    settings: Any = None, class_test: bool = True) -> pd.DataFrame:
    """Fit the baseline and each alternative; one row per run with its conclusions and a
    ``changed`` column naming what moved beyond :data:`CHANGE_THRESHOLDS`.

    ``class_test`` False leaves out the class test (one nested fit per run).
    """
    from .fit import FitSettings, fit_problem

    settings = settings or FitSettings(cmf_range=case.cmf_range, intervals=False)
    rows = []
    for v in variants(case, vary):
        try:
            p = compile_problem(v.case, fit_imputed=v.fit_imputed)
        except InputError as err:
            if v.table == "baseline":
                raise
            # e.g. a Tc table without Fe: the alternative cannot be run on this case
            rows.append({"variant": v.name, "table": v.table, "choice": v.choice,
                         "status": "not applicable", "reason": err.reason})
            continue
        if v.transform is not None:
            p = v.transform(p)
        rows.append(_row(v, p, fit_problem(p, settings), class_test=class_test))
    table = pd.DataFrame(rows)
    if "reason" not in table.columns:
        table["reason"] = ""
    table["reason"] = table["reason"].fillna("")
    table["changed"] = [_changes(table.iloc[0], table.iloc[i]) if table["status"].iloc[i]
                        != "not applicable" else "" for i in range(len(table))]
    return table


def _changes(base: pd.Series, row: pd.Series) -> str:
    t = CHANGE_THRESHOLDS
    out = []
    wcols = [c for c in base.index if c.startswith("w_")]
    dw = max((abs(float(row.get(c, 0.0)) - float(base[c])) for c in wcols), default=0.0)
    if dw > t["weight"]:
        out.append(f"weights (max |dw| {dw:.2f})")
    if row["dominant"] != base["dominant"]:
        out.append(f"dominant block {base['dominant']} -> {row['dominant']}")
    if row.get("best_hypothesis") != base.get("best_hypothesis"):
        out.append(f"best hypothesis {base.get('best_hypothesis')} -> "
                   f"{row.get('best_hypothesis')}")
    if "T0" in base.index and abs(row["T0"] - base["T0"]) > t["T0"]:
        out.append(f"T0 {base['T0']:.0f} -> {row['T0']:.0f} K")
    if "slope" in base.index and base["slope"] > 0 and abs(
            row["slope"] / base["slope"] - 1) > t["slope_rel"]:
        out.append(f"slope {base['slope']:.2g} -> {row['slope']:.2g}")
    for q in ("late_accretion_fraction", "core_mass_fraction"):
        if abs(row[q] - base[q]) > t[q]:
            out.append(f"{q} {base[q]:.3g} -> {row[q]:.3g}")
    if row["off_trend"] != base["off_trend"]:
        out.append(f"off-trend [{base['off_trend']}] -> [{row['off_trend']}]")
    if "class_test_differ" in base.index and _verdict(row) != _verdict(base):
        out.append(f"class test {_verdict(base)} -> {_verdict(row)}")
    if row["status"] != base["status"]:
        out.append(f"status {base['status']} -> {row['status']}")
    return "; ".join(out)


def _verdict(row: pd.Series) -> str:
    v = row.get("class_test_differ")
    if v is None or (isinstance(v, float) and not np.isfinite(v)):
        return "not run"
    return "classes differ" if bool(v) else "one trend"


def spread_table(table: pd.DataFrame) -> pd.DataFrame:
    """Baseline value, minimum, maximum and range of each numeric conclusion over runs."""
    cols = [c for c in table.columns if c.startswith("w_")] + [
        c for c in ("T0", "slope", "late_accretion_fraction", "core_mass_fraction",
                    "class_test_sigma", "class_test_difference", "chi2", "n_elements")
        if c in table.columns]
    table = table[table["status"] != "not applicable"].reset_index(drop=True)
    num = table[cols].apply(pd.to_numeric, errors="coerce")
    return pd.DataFrame({"baseline": num.iloc[0], "min": num.min(), "max": num.max(),
                         "range": num.max() - num.min(),
                         "argmin": [table["variant"].iloc[int(np.nanargmin(num[c]))]
                                    for c in cols],
                         "argmax": [table["variant"].iloc[int(np.nanargmax(num[c]))]
                                    for c in cols]}).rename_axis("quantity")


def categorical_spread(table: pd.DataFrame) -> pd.DataFrame:
    """The conclusions that are words, not numbers, across the runs that ran.

    One row per conclusion (best hypothesis, dominant block, class-test verdict) and per
    element off the trend in any run: its baseline value, the distinct values met and
    which runs depart from the baseline.
    """
    ran = table[table["status"] != "not applicable"].reset_index(drop=True)
    rows = []
    verdicts = ran.apply(_verdict, axis=1) if "class_test_differ" in ran else None
    for q, col in (("best hypothesis", ran.get("best_hypothesis")),
                   ("dominant block", ran.get("dominant")),
                   ("class test", verdicts)):
        if col is None:
            continue
        col = col.fillna("").astype(str)
        differ = [v for v, c in zip(ran["variant"], col, strict=True) if c != col.iloc[0]]
        rows.append({"quantity": q, "baseline": col.iloc[0],
                     "values": " | ".join(dict.fromkeys(col)), "n_runs": len(ran),
                     "n_differ": len(differ), "differ_in": ", ".join(differ)})
    off = [set(str(x).split()) for x in ran["off_trend"].fillna("")]
    for el in sorted(set().union(*off), key=str):
        differ = [v for v, o in zip(ran["variant"], off, strict=True)
                  if (el in o) != (el in off[0])]
        rows.append({"quantity": f"off trend: {el}",
                     "baseline": "off" if el in off[0] else "on",
                     "values": f"off in {sum(el in o for o in off)} of {len(ran)} runs",
                     "n_runs": len(ran), "n_differ": len(differ),
                     "differ_in": ", ".join(differ)})
    return pd.DataFrame(rows, columns=["quantity", "baseline", "values", "n_runs",
                                       "n_differ", "differ_in"])


def _numeric_quantities(table: pd.DataFrame) -> list[str]:
    return [c for c in table.columns if c.startswith("w_")] + [
        c for c in ("T0", "slope", "late_accretion_fraction", "core_mass_fraction",
                    "class_test_sigma") if c in table.columns]


_LABELS = {"T0": "T0 [K]", "slope": "slope [dex/K]",
           "late_accretion_fraction": "late accretion (fraction of mantle)",
           "core_mass_fraction": "core mass fraction",
           "class_test_sigma": "class test significance [sigma]"}


def sensitivity_plot(table: pd.DataFrame, *, title: str | None = None):
    """The spread of every conclusion across the runs.

    One panel per numeric conclusion (each block's weight, T0, slope, late-accretion
    fraction, core mass fraction, class-test significance with its threshold dashed): its
    value in each run, the baseline as a grey line. Below, one panel of words: each run's
    best hypothesis (left) and the elements off the trend (filled: off in that run; red
    edge: differs from the baseline).
    """
    import matplotlib.pyplot as plt

    from .findings import CLASS_TEST_SIGMA
    from .plots import plot_style

    table = table.reset_index(drop=True)
    qs = _numeric_quantities(table)
    off = [set(str(x).split()) for x in table["off_trend"].fillna("")] if (
        "off_trend" in table.columns) else [set() for _ in range(len(table))]
    els = sorted(set().union(*off), key=str)
    with plot_style():
        ncol = min(3, max(len(qs), 1))
        nrow = int(np.ceil(len(qs) / ncol))
        h_row = 0.3 * len(table) + 1.0
        fig = plt.figure(figsize=(3.6 * ncol + 1.6, h_row * (nrow + 1) + 0.8))
        gs = fig.add_gridspec(nrow + 1, ncol)
        y = np.arange(len(table))
        for i, q in enumerate(qs):
            ax = fig.add_subplot(gs[i // ncol, i % ncol])
            vals = pd.to_numeric(table[q], errors="coerce").to_numpy(float)
            if np.isfinite(vals[0]):
                ax.axvline(vals[0], color="0.6", lw=1)
            if q == "class_test_sigma":
                ax.axvline(CLASS_TEST_SIGMA, color="0.3", lw=1, ls="--")
            ax.plot(vals, y, "o", ms=4)
            if q.startswith("w_"):
                ax.set_xlim(-0.05, 1.05)
            ax.set_yticks(y, table["variant"] if i % ncol == 0 else [""] * len(y))
            ax.set_ylim(len(table) - 0.5, -0.5)
            ax.set_title(_LABELS.get(q, q.replace("w_", "weight ")), fontsize=9)
        ax = fig.add_subplot(gs[nrow, :])
        hyp = table.get("best_hypothesis", pd.Series([""] * len(table))).fillna("")
        ax.set_yticks(y, [f"{v}: {h}" for v, h in zip(table["variant"], hyp, strict=True)])
        ax.set_ylim(len(table) - 0.5, -0.5)
        for j, el in enumerate(els):
            for k, o in enumerate(off):
                changed = (el in o) != (el in off[0])
                ax.plot(j, k, "s", ms=7, mfc="C0" if el in o else "white",
                        mec="C3" if changed else "0.5", mew=1.5 if changed else 0.8)
        ax.set_xticks(range(len(els)), els)
        ax.set_xlim(-0.7, max(len(els), 1) - 0.3)
        ax.set_title("best hypothesis (y labels) and elements off the trend (filled: off; "
                     "red edge: differs from the baseline)", fontsize=9)
        if title:
            fig.suptitle(title, fontsize=10)
        # leave room for the title above the first row of panels
        fig.tight_layout(rect=(0, 0, 1, 1 - 0.35 / fig.get_figheight()) if title else None)
    return fig


def sensitivity_report(folder: str | Path) -> Any:
    """The report page of a ``planetmix sensitivity`` folder (a :class:`~inversion.report.
    Report`, rendered by :func:`inversion.report.build_report`).

    Raises
    ------
    InputError
        When the folder lacks ``sensitivity.csv`` or holds no baseline run.
    """
    from .report import Report, _fmt, _read_csv, _read_json, _table_html

    folder = Path(folder)
    table = _read_csv(folder / "sensitivity.csv")
    meta = _read_json(folder / "summary.json") if (folder / "summary.json").exists() else {}
    if not len(table) or table["variant"].iloc[0] != "baseline":
        raise InputError("sensitivity table without a baseline run in its first row",
                         file=str(folder / "sensitivity.csv"), field="variant")
    for col in ("reason", "changed", "off_trend", "best_hypothesis", "dominant"):
        if col in table.columns:
            table[col] = table[col].fillna("").astype(str)
    ran = table[table["status"] != "not applicable"].reset_index(drop=True)
    title = meta.get("title") or f"sensitivity ({folder.name})"
    rep = Report(title=f"{title}: sensitivity to the reference tables", kind="sensitivity",
                 folder=str(folder), provenance=meta.get("provenance") or {})
    base = ran.iloc[0]
    rep.key_numbers.append(("runs", str(len(table)), f"baseline and {len(table) - 1} "
                            f"alternatives; {len(table) - len(ran)} not applicable"))
    rep.key_numbers.append(("alternative tables", ", ".join(
        dict.fromkeys(table["table"].iloc[1:].astype(str))) or "none", ""))
    rep.key_numbers.append(("baseline best hypothesis", str(base.get("best_hypothesis", "")),
                            f"blocks with weight >= {HYPOTHESIS_MIN_WEIGHT} in the fit of "
                            "all candidates"))
    num = spread_table(table) if len(ran) else pd.DataFrame()
    for q, r in num.iterrows():
        if q in ("chi2", "n_elements"):
            continue
        rep.key_numbers.append((_LABELS.get(q, q.replace("w_", "weight of ")),
                                _fmt(r["baseline"]),
                                f"range over runs [{_fmt(r['min'])}, {_fmt(r['max'])}] "
                                f"(min: {r['argmin']}; max: {r['argmax']})"))
    cat = categorical_spread(table)
    for _, r in cat.iterrows():
        if not str(r["quantity"]).startswith("off trend"):
            rep.key_numbers.append((str(r["quantity"]), str(r["baseline"]),
                                    f"differs in {r['n_differ']} of {r['n_runs']} runs"
                                    + (f": {r['differ_in']}" if r["differ_in"] else "")))
    offs = cat[cat["quantity"].astype(str).str.startswith("off trend")]
    moved = offs[offs["n_differ"] > 0]
    rep.key_numbers.append(("off-trend elements (baseline)", str(base.get("off_trend", ""))
                            or "none", f"{len(moved)} of {len(offs)} elements off the trend "
                            "in some run change status across runs"))
    for _, r in table.iterrows():
        if r["status"] == "not applicable":
            rep.diagnostics.append((f"not applicable: {r['variant']}", str(r["reason"]),
                                    "this alternative cannot run on the case"))
        elif r["variant"] != "baseline":
            rep.diagnostics.append((f"{r['variant']}", str(r["status"]),
                                    str(r["changed"]) or "no conclusion changed"))
    th = meta.get("change_thresholds") or CHANGE_THRESHOLDS
    rep.notes.append("A conclusion changes when it moves by more than: " + ", ".join(
        f"{k.replace('_', ' ')} {v}" for k, v in th.items()) + " (slope relative); the best "
        "hypothesis, dominant block, off-trend elements and class-test verdict when they "
        "differ at all (thresholds: our choice).")
    rep.figures.append(("Spread of the conclusions over the tables",
                        "Each conclusion in each run (one row per run); the grey line is the "
                        "baseline, the dashed line the class test's threshold. Bottom: each "
                        "run's best hypothesis and the elements off the trend.",
                        lambda: sensitivity_plot(ran, title=title)))
    show = [c for c in ("variant", "status", "n_elements", "chi2", "best_hypothesis")
            if c in table.columns] + [c for c in table.columns if c.startswith("w_")] + [
        c for c in ("T0", "slope", "late_accretion_fraction", "core_mass_fraction",
                    "class_test_sigma", "class_test_difference", "off_trend", "changed")
        if c in table.columns]
    rep.tables.append(("Runs (weights on the reference-element basis)",
                       _table_html(table[show])))
    if len(num):
        rep.tables.append(("Spread of the numeric conclusions",
                           _table_html(num.reset_index())))
    rep.tables.append(("Spread of the conclusions in words", _table_html(cat)))
    rep.limits.append("Each run is the convex fit of all candidates together; the best "
                      "hypothesis is that fit's support, not a ranking of every subset "
                      "(planetmix rank) per table.")
    rep.limits.append("Only the alternatives the library offers are tried, one at a time; "
                      "their combined effect and tables the library lacks are not.")
    return rep


@register("sensitivity", "re-fit a case over the alternative reference tables and report "
                         "which conclusions change")
def _sensitivity(parser: argparse.ArgumentParser):
    parser.add_argument("case", help="case file (TOML)")
    parser.add_argument("--out", required=True, help="result folder")
    parser.add_argument("--vary", nargs="+", choices=TABLES, default=list(TABLES),
                        help="which tables to vary (default: all offered)")
    parser.add_argument("--no-class-test", action="store_true",
                        help="leave out the class test (one nested fit per run)")

    def run(args: argparse.Namespace) -> int:
        from .case import load_case
        from .output import atomic_folder, case_provenance, write_json
        from .plots import save_figure

        case = load_case(args.case)
        table = run_sensitivity(case, vary=tuple(args.vary),
                                class_test=not args.no_class_test)
        spread = spread_table(table)
        words = categorical_spread(table)
        base_p = compile_problem(case)
        with atomic_folder(args.out) as tmp:
            table.to_csv(tmp / "sensitivity.csv", index=False)
            spread.to_csv(tmp / "spread.csv")
            words.to_csv(tmp / "spread_words.csv", index=False)
            ran = table[table["status"] != "not applicable"].reset_index(drop=True)
            save_figure(sensitivity_plot(ran, title=case.title), tmp / "sensitivity")
            write_json(tmp / "summary.json", {
                "what": "sensitivity of the convex fit's conclusions to the reference tables",
                "title": case.title,
                "runs": table.to_dict(orient="records"),
                "spread": spread.reset_index().to_dict(orient="records"),
                "spread_words": words.to_dict(orient="records"),
                "hypothesis_min_weight": HYPOTHESIS_MIN_WEIGHT,
                "change_thresholds": CHANGE_THRESHOLDS,
                "provenance": case_provenance(case, base_p, tables=[
                    "typedcopy_pyrolite_chondrite_pon", "palmeoneill2014", "lodders2003",
                    "mcdonoughsun1995"], extra={"varied": list(args.vary)}),
            })
        from .report import build_report

        page = build_report(args.out)
        print(f"{case.title}: {len(table) - 1} alternatives (report: {page})")
        for _, r in table.iterrows():
            if r["status"] == "not applicable":
                print(f"  {r['variant']:<24} not applicable: {r['reason']}")
                continue
            print(f"  {r['variant']:<24} {r['status']:<18} n={int(r['n_elements']):<3} "
                  f"chi2={r['chi2']:.1f}  {r['changed'] or 'no change'}")
        return EXIT_OK

    return run
