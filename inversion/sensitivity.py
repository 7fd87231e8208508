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
intervals are skipped to keep it cheap). A conclusion "changes" when it moves by more than
the thresholds of :data:`CHANGE_THRESHOLDS` (our choice, stated in the output) or, for the
dominant block and the off-trend elements, when it differs at all.
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

__all__ = ["Variant", "variants", "run_sensitivity", "spread_table", "sensitivity_plot",
           "CHANGE_THRESHOLDS", "TABLES"]

#: What a sensitivity run can vary (the ``--vary`` choices).
TABLES = ("CI", "BSE", "Tc", "partition", "imputation")
#: A quantity "changes" when it moves by more than this from the baseline (our choice).
CHANGE_THRESHOLDS = {"weight": 0.10, "T0": 50.0, "slope_rel": 0.25,
                     "late_accretion_fraction": 0.002, "core_mass_fraction": 0.01}
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


def _row(v: Variant, p: Problem, r: Any) -> dict[str, Any]:
    row: dict[str, Any] = {"variant": v.name, "table": v.table, "choice": v.choice,
                           "status": r.status, "n_elements": r.n_elements, "chi2": r.chi2}
    # the alternative CI stands in for CI: its weight is reported in CI's column
    weights = {("CI" if v.table == "CI" and name == ALT_CI else name): w
               for name, w in r.weights.items()}
    for name, w in weights.items():
        row[f"w_{name}"] = w
    row["dominant"] = max(weights, key=weights.get) if weights else ""
    for k, val in r.volatility.items():
        row[k] = val
    row["late_accretion_fraction"] = r.late_accretion_fraction
    row["core_mass_fraction"] = r.core_mass_fraction
    res = r.residuals
    off = res[(res["fitted"]) & (res["flag"].isin(["above model", "below model"]))]
    row["off_trend"] = " ".join(sorted(off["element"]))
    return row


def run_sensitivity(case: Case, *, vary: tuple[str, ...] = TABLES,
                    settings: Any = None) -> pd.DataFrame:
    """Fit the baseline and each alternative; one row per run with its conclusions and a
    ``changed`` column naming what moved beyond :data:`CHANGE_THRESHOLDS`."""
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
        rows.append(_row(v, p, fit_problem(p, settings)))
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
    if row["status"] != base["status"]:
        out.append(f"status {base['status']} -> {row['status']}")
    return "; ".join(out)


def spread_table(table: pd.DataFrame) -> pd.DataFrame:
    """Baseline value, minimum, maximum and range of each numeric conclusion over runs."""
    cols = [c for c in table.columns if c.startswith("w_")] + [
        c for c in ("T0", "slope", "late_accretion_fraction", "core_mass_fraction", "chi2",
                    "n_elements") if c in table.columns]
    table = table[table["status"] != "not applicable"].reset_index(drop=True)
    num = table[cols].apply(pd.to_numeric, errors="coerce")
    return pd.DataFrame({"baseline": num.iloc[0], "min": num.min(), "max": num.max(),
                         "range": num.max() - num.min(),
                         "argmin": [table["variant"].iloc[int(np.nanargmin(num[c]))]
                                    for c in cols],
                         "argmax": [table["variant"].iloc[int(np.nanargmax(num[c]))]
                                    for c in cols]}).rename_axis("quantity")


def sensitivity_plot(table: pd.DataFrame, *, title: str | None = None):
    """One panel per conclusion: its value in each run, the baseline as a line."""
    import matplotlib.pyplot as plt

    from .plots import plot_style

    qs = [c for c in table.columns if c.startswith("w_")] + [
        c for c in ("T0", "slope", "late_accretion_fraction", "core_mass_fraction")
        if c in table.columns]
    with plot_style():
        n = len(qs)
        ncol = min(3, n)
        nrow = int(np.ceil(n / ncol))
        fig, axes = plt.subplots(nrow, ncol, figsize=(3.4 * ncol, 0.35 * len(table) * nrow + 1.2),
                                 squeeze=False)
        y = np.arange(len(table))
        for ax, q in zip(axes.flat, qs, strict=False):
            vals = pd.to_numeric(table[q], errors="coerce").to_numpy(float)
            ax.axvline(vals[0], color="0.6", lw=1)
            ax.plot(vals, y, "o", ms=4)
            ax.set_yticks(y, table["variant"] if ax in axes[:, 0] else [""] * len(y))
            ax.invert_yaxis()
            ax.set_title(q.replace("w_", "weight "), fontsize=9)
        for ax in list(axes.flat)[n:]:
            ax.set_visible(False)
        if title:
            fig.suptitle(title, fontsize=10)
        fig.tight_layout()
    return fig


@register("sensitivity", "re-fit a case over the alternative reference tables and report "
                         "which conclusions change")
def _sensitivity(parser: argparse.ArgumentParser):
    parser.add_argument("case", help="case file (TOML)")
    parser.add_argument("--out", required=True, help="result folder")
    parser.add_argument("--vary", nargs="+", choices=TABLES, default=list(TABLES),
                        help="which tables to vary (default: all offered)")

    def run(args: argparse.Namespace) -> int:
        from .case import load_case
        from .output import atomic_folder, case_provenance, write_json
        from .plots import save_figure

        case = load_case(args.case)
        table = run_sensitivity(case, vary=tuple(args.vary))
        spread = spread_table(table)
        base_p = compile_problem(case)
        with atomic_folder(args.out) as tmp:
            table.to_csv(tmp / "sensitivity.csv", index=False)
            spread.to_csv(tmp / "spread.csv")
            ran = table[table["status"] != "not applicable"].reset_index(drop=True)
            save_figure(sensitivity_plot(ran, title=case.title), tmp / "sensitivity")
            write_json(tmp / "summary.json", {
                "what": "sensitivity of the convex fit's conclusions to the reference tables",
                "runs": table.to_dict(orient="records"),
                "spread": spread.reset_index().to_dict(orient="records"),
                "change_thresholds": CHANGE_THRESHOLDS,
                "provenance": case_provenance(case, base_p, tables=[
                    "typedcopy_pyrolite_chondrite_pon", "palmeoneill2014", "lodders2003",
                    "mcdonoughsun1995"], extra={"varied": list(args.vary)}),
            })
        print(f"{case.title}: {len(table) - 1} alternatives")
        for _, r in table.iterrows():
            if r["status"] == "not applicable":
                print(f"  {r['variant']:<24} not applicable: {r['reason']}")
                continue
            print(f"  {r['variant']:<24} {r['status']:<18} n={int(r['n_elements']):<3} "
                  f"chi2={r['chi2']:.1f}  {r['changed'] or 'no change'}")
        return EXIT_OK

    return run
