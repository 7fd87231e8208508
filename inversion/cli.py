"""The ``planetmix`` command line.

Exit status: 0 success; 1 a failure that is not the input's fault; 2 bad input or a bad
option (one line naming file, row and field, prefixed ``planetmix: error:``); 3 the best
hypothesis is infeasible; 4 a Bayesian run failed its diagnostics gate; 130 interrupted
(Ctrl-C; no partial output is left); a closed output pipe ends the run silently (141).
"""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from .exceptions import InputError, PlanetmixError

if TYPE_CHECKING:
    import pandas as pd

__all__ = ["main", "register", "EXIT_OK", "EXIT_INPUT", "EXIT_INFEASIBLE", "EXIT_GATE"]

EXIT_OK = 0
EXIT_INPUT = 2
EXIT_INFEASIBLE = 3
EXIT_GATE = 4
EXIT_INTERRUPTED = 130
EXIT_BROKEN_PIPE = 141

#: Sub-commands whose ``--out`` is a result folder (written by
#: :func:`inversion.output.atomic_folder`, or batch partitions).
_FOLDER_OUT = {"fit", "rank", "sample", "compare", "star", "batch"}


class _Parser(argparse.ArgumentParser):
    """argparse with the project's one-line error form and exit status 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        text = " ".join(str(message).split())
        print(f"planetmix: error: {self.prog}: {text} (see '{self.prog} --help')",
              file=sys.stderr)
        raise SystemExit(EXIT_INPUT)

# Sub-commands register themselves here: name -> (configure parser, run).
_COMMANDS: dict[str, tuple[str, Callable[[argparse.ArgumentParser], None],
                           Callable[[argparse.Namespace], int]]] = {}


def register(name: str, help_text: str):
    """Decorator pair: ``@register(name, help)`` on a function ``(parser) -> run``."""

    def deco(configure: Callable[[argparse.ArgumentParser], Callable[[argparse.Namespace], int]]):
        def conf(parser: argparse.ArgumentParser) -> None:
            parser.set_defaults(_run=configure(parser))

        _COMMANDS[name] = (help_text, conf, lambda a: a._run(a))
        return configure

    return deco


# --------------------------------------------------------------------------- library
#: Width the printed tables and text fit in (columns of a terminal).
TERMINAL_WIDTH = 100


def _wrap(text: str, indent: str = "") -> str:
    """Prose wrapped to :data:`TERMINAL_WIDTH`, continuation lines indented."""
    import textwrap

    return textwrap.fill(text, TERMINAL_WIDTH, subsequent_indent=indent or "  ",
                         break_on_hyphens=False)


def _table(df, *, index: bool = True, cell: int = 36) -> str:
    """A table that fits :data:`TERMINAL_WIDTH`: long text cells cut to ``cell``
    characters (with a note), wide tables split into column blocks by pandas."""
    cut = False
    out = df.copy()
    for c in out.columns:
        if out[c].dtype == object:
            long = out[c].astype(str).str.len() > cell
            if long.any():
                cut = True
                out[c] = out[c].astype(str).where(~long, out[c].astype(str).str[:cell - 1]
                                                  + "…")
    text = out.to_string(index=index, line_width=TERMINAL_WIDTH)
    if cut:
        text += (f"\n(text cells longer than {cell} characters are cut; the full text is in "
                 "the library's CSV files, components/data/)")
    return text


@register("library", "list the reference library, or show one table with its sources")
def _library(parser: argparse.ArgumentParser):
    parser.add_argument("name", nargs="?", help="a component name (CI, EH, BSE_MS95...), "
                        "'elements', 'solar', 'isotopes' or 'sources'")

    def run(args: argparse.Namespace) -> int:
        import pandas as pd

        import components

        srcs = components.sources()
        if args.name is None:
            print("Building blocks and reference compositions:")
            for name in components.available():
                c = components.load(name)
                cites = ", ".join(c.source_keys)
                levels = " ".join(f"{k}={v}" for k, v in c.provenance_counts().items())
                print(_wrap(f"  {name:<10} {c.kind:<19} {len(c.composition):>3} elements  "
                            f"({levels})  [{cites}]", " " * 14))
            print(f"\nElement properties: {len(components.elements())} elements "
                  "(Tc50 Lodders 2003 / Wood et al. 2019, classes, oxides)")
            print(f"Solar abundance tables: {', '.join(components.solar_tables())}")
            iso = components.isotopes()
            print(f"Isotope anomalies: {len(iso)} values for {iso['body'].nunique()} bodies "
                  f"({', '.join(sorted(iso['quantity'].unique()))})")
            print("\nShow one with: planetmix library NAME")
            return EXIT_OK
        with pd.option_context("display.max_rows", 200, "display.width", 120):
            if args.name == "elements":
                print(_table(components.elements().drop(columns=["source"])))
                keys = set()
                for s in components.elements()["source"]:
                    keys |= {k.strip() for k in str(s).split(";")}
            elif args.name == "solar":
                tab = components.solar()
                print(_table(tab))
                keys = set(tab["source"])
            elif args.name == "isotopes":
                tab = components.isotopes()
                print(_table(tab, index=False))
                keys = set(tab["source"])
            elif args.name == "sources":
                for key, row in srcs.iterrows():
                    doi = f" doi:{row['doi']}" if isinstance(row.get("doi"), str) and \
                        row["doi"] else ""
                    print(_wrap(f"[{key}] {row['citation']}{doi}", "    "))
                return EXIT_OK
            else:
                c = components.load(args.name)
                print(_wrap(f"{c.name}: {c.description}") + "\n")
                df = c.to_dataframe()
                df["mass_fraction"] = df["mass_fraction"].map(lambda v: f"{v:.4g}")
                df["uncertainty"] = df["uncertainty"].map(lambda v: f"{v:.2g}")
                df = df.rename(columns={"mass_fraction": "mass_fraction [kg/kg]",
                                        "uncertainty": "1-sigma [kg/kg]"})
                print(_table(df))
                print("\n" + _wrap("Provenance: " + ", ".join(
                    f"{v} {k}" for k, v in c.provenance_counts().items())
                    + f" (of {len(c.composition)}); uncertainties: "
                    + ", ".join(f"{v} {k or 'none'}" for k, v in
                                c.uncertainty_basis.value_counts().items())))
                keys = set(c.source_keys)
        print("\nSources:")
        for k in sorted(keys):
            for kk in str(k).split(";"):
                kk = kk.strip()
                if kk in srcs.index:
                    print(_wrap(f"  [{kk}] {srcs.loc[kk, 'citation']}", "      "))
        return EXIT_OK

    return run


# --------------------------------------------------------------------------- fit
def _unit(form: str, name: str) -> str:
    """`` K``, `` dex/K`` or nothing: the unit of a volatility parameter, for printing."""
    from .volatility import FORMS

    spec = FORMS.get(form)
    if spec is None or name not in spec.params:
        return ""
    u = spec.units[spec.params.index(name)]
    return "" if u == "1" else f" {u}"


def _interval_text(key: str, q: dict, form: str) -> str:
    """``T0 [1287, 1321] K``: one Laplace interval of the fit summary, with its unit."""
    name = key.split(":")[-1]
    lo, hi = q["p2.5"], q["p97.5"]
    if key == "late_accretion_fraction":
        return f"late accretion [{100 * lo:.3g}, {100 * hi:.3g}] % of the mantle"
    if key == "core_mass_fraction":
        return f"core mass fraction [{lo:.3g}, {hi:.3g}]"
    if key.startswith("weight:"):
        # a weight at its bound has a numerically zero interval end (1e-18): shown as 0
        lo, hi = (0.0 if abs(v) < 1e-9 else v for v in (lo, hi))
        return f"{name} [{lo:.3g}, {hi:.3g}]"
    unit = _unit(form, name) if key.startswith("volatility:") else ""
    return f"{name} [{lo:.4g}, {hi:.4g}]{unit}"


def _write_fit(out: Path, case, p, result, findings: dict,
               staged: dict | None = None) -> None:
    from .conditions import conditions_block
    from .fit import planet_of
    from .isotopes import figure_data
    from .output import atomic_folder, case_provenance, write_json

    planet = planet_of(p, result) if result.feasible else None
    data = {
        "title": case.title,
        "status": result.status,
        "reasons": list(result.reasons),
        "components": list(result.components),
        "weights": result.weights,
        "weights_basis": f"{p.reference} (reference-element) basis",
        "mass_fractions": result.mass_fractions,
        "volatility": {"form": result.volatility_form, **result.volatility},
        "late_accretion_component": p.late_name,
        "late_accretion_fraction": result.late_accretion_fraction,
        "core_mass_fraction": result.core_mass_fraction,
        "optimality": result.optimality,
        "intervals": result.intervals,
        "chi2": result.chi2,
        "aic": result.aic,
        "bic": result.bic,
        "n_elements": result.n_elements,
        "n_params": result.n_params,
        "fit_elements": p.fit_elements,
        # elements some block lacked: imputed for those blocks and fitted (model.py _impute)
        "imputed": {p.elements[j]: [p.components[k] for k in range(len(p.components))
                                    if p.imputed[k, j]]
                    for j in p.fit_index if p.imputed[:, j].any()},
        "isotopes_observed": {k: {"value": v, "sigma": s} for k, (v, s) in
                              case.isotopes.items()},
        "isotopes_predicted": result.isotopes,
        # observed windows and reachable intervals of the hypothesis and of each block
        # (the report's isotope figure; inversion.isotopes.figure_data)
        "isotope_figure": (figure_data(p, np.asarray(result.u) if result.feasible
                                       and result.u else None) if p.isotopes else None),
        "planet_mass_kg": case.target.planet_mass_kg,
        "core_conditions": conditions_block(p),
        **({"staged_accretion": staged} if staged is not None else {}),
        "findings": findings,
        "notes": list(p.notes),
        "normaliser": p.normaliser,
        "dropped_elements": [{"element": e, "reason": r} for e, r in p.dropped],
        "implausible_values": list(p.implausible),
        "provenance": case_provenance(case, p, extra={
            "solver": result.settings.record}),
    }
    with atomic_folder(out) as tmp:
        write_json(tmp / "fit.json", data)
        result.residuals.to_csv(tmp / "residuals.csv", index=False)
        if planet is not None:
            from .handoff import fit_handoff

            planet.to_csv(tmp / "planet.csv", index=False)
            fit_handoff(tmp, p, result, planet_mass_kg=case.target.planet_mass_kg,
                        meta={"title": case.title})


def _staged_fit(case, result) -> dict:
    """``[accretion] stages = 2``: early and late mixtures from the isotopes
    (:func:`inversion.staged.fit_case`), with k from ``core_mass_fraction`` or the fit."""
    from .staged import fit_case

    cmf = case.accretion.core_mass_fraction
    source = "[accretion] core_mass_fraction"
    if cmf is None and result.feasible:
        cmf, source = float(result.core_mass_fraction), "the convex fit"
    if cmf is None:
        return {"status": "not run", "reason": "the convex fit is infeasible and "
                "[accretion] core_mass_fraction is not given: the siderophile retention "
                "needs the core/mantle mass ratio"}
    out = fit_case(case, core_mass_fraction=cmf)
    return {"status": "fitted", "core_mass_fraction_from": source, **out}


def _staged_lines(staged: dict | None) -> list[str]:
    """Printed summary of the staged fit."""
    if staged is None:
        return []
    if staged.get("status") != "fitted":
        return [f"two stages: not run ({staged.get('reason')})"]

    def mix(d: dict) -> str:
        return ", ".join(f"{k} {v:.3f}" for k, v in d.items())

    return [f"two stages (late stage {staged['late_stage_fraction']:g} of the mass; "
            f"core mass fraction {staged['core_mass_fraction']:.3f} from "
            f"{staged['core_mass_fraction_from']}):",
            f"  early mixture (mass fractions): {mix(staged['early'])}",
            f"  late mixture: {mix(staged['late'])}",
            f"  one mixture throughout: {mix(staged['single'])}",
            f"  BIC two stages {staged['bic_staged']:.2f}, one mixture "
            f"{staged['bic_single']:.2f} -> {staged['preferred']} preferred; likelihood "
            f"ratio p = {staged['lr_pvalue']:.3g}"]


@register("fit", "fit a case with all its building blocks (convex inversion)")
def _fit(parser: argparse.ArgumentParser):
    parser.add_argument("case", help="case file (TOML)")
    parser.add_argument("--out", required=True, help="result folder")

    def run(args: argparse.Namespace) -> int:
        from .case import load_case
        from .findings import findings, summary_lines
        from .fit import FitSettings, fit_problem
        from .model import compile_problem

        case = load_case(args.case, staged=True)
        P_core = case.core.pressure_GPa
        if case.core.partitioning != "effective":
            from .conditions import free_conditions, start_problem

            p = start_problem(case)  # inferred conditions start at mid-range
        else:
            p = compile_problem(case)
        from .model import implausible_lines

        for line in implausible_lines(p.implausible):
            print("warning: " + line)
        if case.accretion.stages == 2:
            from .staged import case_systems

            case_systems(case, core_mantle_ratio=1.0)  # refuse missing values before fitting
        settings = FitSettings(cmf_range=case.cmf_range)
        if case.core.partitioning == "single-stage":
            from .conditions import fit_at_conditions, infer_conditions

            if free_conditions(case):
                result, p = infer_conditions(p, case, settings)
            else:
                result, p, _ = fit_at_conditions(p, case, P_core, settings)
        elif case.core.partitioning == "continuous":
            from .conditions import fit_continuous

            result, p = fit_continuous(p, case, settings)
        else:
            result = fit_problem(p, settings)
        f = findings(p, result, planet_mass_kg=case.target.planet_mass_kg)
        staged = _staged_fit(case, result) if case.accretion.stages == 2 else None
        _write_fit(Path(args.out), case, p, result, f, staged)
        print(f"{case.title}: {'+'.join(result.components)} -> {result.status}")
        from .conditions import conditions_lines

        for line in conditions_lines(p):
            print("  " + line)
        for line in _staged_lines(staged):
            print("  " + line)
        if not result.feasible:
            for r in result.reasons:
                print(f"  infeasible: {r}")
            return EXIT_INFEASIBLE
        o = result.optimality
        print(f"  optimality: {o['agreeing']} of {o['starts']} starts reach chi2 "
              f"{result.chi2:.4f} (within {o['agreement_tolerance_relative']:g} relative); "
              f"first-order residual {o['kkt_residual']:.1e} (tolerance "
              f"{o['kkt_tolerance']:g})")
        print("  weights (" + p.reference + " basis): " + ", ".join(
            f"{k} {v:.3f}" for k, v in result.weights.items()))
        print("  mass fractions: " + ", ".join(f"{k} {v:.3f}"
                                               for k, v in result.mass_fractions.items()))
        print(f"  volatility ({result.volatility_form}): " + ", ".join(
            f"{k} = {v:.4g}{_unit(result.volatility_form, k)}"
            for k, v in result.volatility.items()))
        print(f"  core mass fraction {result.core_mass_fraction:.3f}; chi2 {result.chi2:.1f} "
              f"on {result.n_elements} elements; AIC {result.aic:.1f}; BIC {result.bic:.1f}")
        q = result.intervals.get("quantities", {})
        if q:
            show = [k for k in q if k.startswith(("weight:", "volatility:"))] + [
                k for k in ("late_accretion_fraction", "core_mass_fraction") if k in q]
            print("  95% intervals (Laplace, curvature at the optimum): " + "; ".join(
                _interval_text(k, q[k], result.volatility_form) for k in show))
        for line in summary_lines(f):
            print("  " + line)
        print(f"  written to {args.out}/fit.json, residuals.csv, planet.csv, and the hand-off "
              "planet.json, planet_draws.csv")
        return EXIT_OK

    return run


@register("rank", "screen every mixture of up to max_mixture_size candidates")
def _rank(parser: argparse.ArgumentParser):
    parser.add_argument("case", help="case file (TOML)")
    parser.add_argument("--out", required=True, help="result folder")
    parser.add_argument("--workers", type=int, default=None,
                        help="processes (default: the machine's cores)")
    parser.add_argument("--top", type=int, default=10, help="rows to print")

    def run(args: argparse.Namespace) -> int:
        import os

        from .case import load_case
        from .fit import SCREEN_SETTINGS, screen
        from .output import atomic_folder, provenance, write_json

        case = load_case(args.case)
        workers = args.workers if args.workers is not None else os.cpu_count() or 1
        if workers < 1:
            raise InputError("must be at least 1", field="--workers", value=args.workers)
        if args.top < 1:
            raise InputError("must be at least 1 (rows to print)", field="--top",
                             value=args.top)
        ranking = screen(case, workers=workers, progress=True)
        table = ranking.table
        with atomic_folder(args.out) as tmp:
            table.to_csv(tmp / "ranking.csv", index=False)
            write_json(tmp / "ranking.json", {
                "title": case.title, "n_hypotheses": len(table),
                "best": table.iloc[0]["components"],
                "provenance": provenance(tables=[case.condensation_table],
                                         component_names=case.candidate_names + ["CI"],
                                         extra={"case_file": case.path,
                                                "solver": {**SCREEN_SETTINGS.record,
                                                           "cmf_range": case.cmf_range}})})
        print(_ranking_text(table.head(args.top), case.volatility_form))
        print(f"{len(table)} hypotheses; written to {args.out}/ranking.csv")
        if table.iloc[0]["status"] == "infeasible":
            print("the best hypothesis is infeasible: " + str(table.iloc[0]["reasons"]))
            return EXIT_INFEASIBLE
        return EXIT_OK

    return run


def _ranking_text(table: pd.DataFrame, form: str) -> str:
    """The ranking's leading rows as a table whose headers carry the units."""
    import pandas as pd

    from .volatility import FORMS

    cols: dict[str, tuple[pd.Series, str]] = {
        "rank": (table["rank"], "{}"), "components": (table["components"], "{}"),
        "status": (table["status"], "{}"), "chi2": (table["chi2"], "{:.2f}"),
        "AIC": (table["aic"], "{:.1f}"), "BIC": (table["bic"], "{:.1f}")}
    for name in (FORMS[form].params if form in FORMS else ()):
        if f"{form}_{name}" in table.columns:
            unit = _unit(form, name).strip() or "1"
            cols[f"{name} [{unit}]"] = (table[f"{form}_{name}"],
                                        "{:.0f}" if unit == "K" else "{:.3g}")
    cols["late [% mantle]"] = (100.0 * table["late_accretion_fraction"], "{:.3g}")
    cols["CMF"] = (table["core_mass_fraction"], "{:.3f}")
    show = pd.DataFrame({k: [fmt.format(v) if pd.notna(v) else "n/a" for v in col]
                         for k, (col, fmt) in cols.items()})
    text = show.to_string(index=False, line_width=100)
    # wider than 100 columns (long names): pandas continues the columns below
    return text + "\n(CMF: core mass fraction of the planet; late: late accretion, mass % " \
        "of the mantle)"


def _load_plugins() -> None:
    """Import modules that register further sub-commands (sample, star, report...)."""
    import importlib

    for mod in ("inversion.bayes_cli", "inversion.star_cli", "inversion.report_cli",
                "inversion.demo", "inversion.diagram", "inversion.sensitivity"):
        try:
            importlib.import_module(mod)
        except ModuleNotFoundError as err:
            if err.name != mod:
                raise


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every registered sub-command."""
    _load_plugins()
    parser = _Parser(
        prog="planetmix",
        description="Planetary bulk composition from chondritic building blocks, volatile "
                    "loss, core formation and late accretion.")
    from .output import package_version

    parser.add_argument("--version", action="version", version=f"planetmix {package_version()}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, (help_text, conf, _run) in _COMMANDS.items():
        conf(sub.add_parser(name, help=help_text, description=help_text))
    return parser


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``planetmix`` command."""
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse usage errors exit 2 already
        return int(exc.code or 0)
    except KeyboardInterrupt:
        print("planetmix: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    if not getattr(args, "command", None):
        parser.print_help()
        print("planetmix: error: give a command (see 'planetmix --help')", file=sys.stderr)
        return EXIT_INPUT
    try:
        _check_common(args)
        return int(args._run(args))
    except InputError as err:
        print(f"planetmix: error: {err}", file=sys.stderr)
        return EXIT_INPUT
    except PlanetmixError as err:
        print(f"planetmix: failed: {' '.join(str(err).split())}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("planetmix: interrupted; no partial output was left", file=sys.stderr)
        return EXIT_INTERRUPTED
    except OSError as err:
        if err.filename is None or isinstance(err, BrokenPipeError):
            if isinstance(err, BrokenPipeError):
                # the reader went away (e.g. `| head`): stop quietly; point stdout at
                # /dev/null so that the interpreter's final flush does not fail again
                devnull = os.open(os.devnull, os.O_WRONLY)
                os.dup2(devnull, sys.stdout.fileno())
                return EXIT_BROKEN_PIPE
            raise
        # a path the user gave cannot be read or written as asked (a folder given for a
        # file, no permission, a name too long, an --out under /proc...)
        print(f"planetmix: error: {err.filename}: {err.strerror or err}", file=sys.stderr)
        return EXIT_INPUT


def _check_common(args: argparse.Namespace) -> None:
    """Checks of options shared by several sub-commands, before any work is done."""
    seed = getattr(args, "seed", None)
    if isinstance(seed, int) and seed < 0:
        raise InputError("must be a whole number >= 0", field="--seed", value=seed)
    diw = getattr(args, "dIW", None)
    if isinstance(diw, float):
        from components.units import check_in_range

        check_in_range(diw, "dIW", field="--dIW")
    out = getattr(args, "out", None)
    if args.command in _FOLDER_OUT and out is not None:
        from .output import check_out_folder

        if args.command == "batch":  # partitions are resumed in place
            if os.path.lexists(out) and not os.path.isdir(out):
                raise InputError("exists and is not a folder; choose a folder name for the "
                                 "results", file=str(out), field="--out")
        else:
            check_out_folder(out)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
